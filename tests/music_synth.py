"""Synthetic music for the playback tests: an invented tune, seeded, no recording of anyone.

A bass line, three-note chords with decaying partials, and a noise hi-hat, in
stereo with a little panning; the level is set by ``rms_dbfs``.
"""

from __future__ import annotations

import numpy as np


def synth_music(fs: int, seconds: float, rms_dbfs: float = -20.0, seed: int = 5) -> np.ndarray:
    """Stereo music-like test signal, shape (2, n)."""
    rng = np.random.default_rng(seed)
    n = int(round(fs * seconds))
    t = np.arange(n) / fs
    y = np.zeros((2, n))
    beat = 0.5  # s
    roots_hz = [55.0, 73.42, 61.74, 82.41]
    for k in range(int(seconds / beat) + 1):
        start = int(k * beat * fs)
        if start >= n:
            break
        seg = slice(start, min(n, start + int(2 * beat * fs)))
        tt = t[seg] - t[start]
        root = roots_hz[(k // 4) % len(roots_hz)]
        env = np.exp(-tt / 0.35)
        bass = env * (np.sin(2 * np.pi * root * tt) + 0.3 * np.sin(4 * np.pi * root * tt))
        y[:, seg] += 0.5 * bass
        for j, ratio in enumerate((2.0, 2.52, 3.0)):
            f0 = root * 2 * ratio
            tone = np.exp(-tt / 0.6) * sum(
                np.sin(2 * np.pi * f0 * m * tt + rng.uniform(0, 2 * np.pi)) / m**1.5
                for m in range(1, 6)
            )
            pan = (0.8, 0.4) if j == 0 else (0.4, 0.8) if j == 1 else (0.6, 0.6)
            y[0, seg] += 0.15 * pan[0] * tone
            y[1, seg] += 0.15 * pan[1] * tone
        hat = np.exp(-tt / 0.03) * rng.standard_normal(tt.size)
        hat = np.diff(hat, prepend=0.0)
        y[:, seg] += 0.05 * hat
    rms = np.sqrt(np.mean(y**2))
    return y * (10 ** (rms_dbfs / 20) / rms)
