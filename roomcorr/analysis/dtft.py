"""Frequency responses of many impulse responses at arbitrary frequencies, exactly.

``scipy.signal.freqz`` with an array of frequencies evaluates one polynomial
per call by Horner's rule: a Python-level loop over every sample of the
impulse response. For a measurement set (positions x channels, each a
fraction of a second long) on a few hundred log-spaced frequencies that is
most of a design's time. :func:`dtft` evaluates the same sum,

    H(f) = sum_n h[n] exp(-j 2 pi f n / fs),

for all responses at once as matrix products over blocks of samples: the
kernel ``exp(-j 2 pi f m / fs)`` for ``m`` inside one block is computed once,
and each block's start is a phase factor per frequency. The result equals
``freqz`` to rounding (``tests/test_dtft.py`` checks it against scipy).
"""

from __future__ import annotations

import numpy as np

#: Samples per block (the kernel is BLOCK x n_freqs complex values).
BLOCK = 2048


def dtft(h: np.ndarray, freq_hz: np.ndarray, fs: float) -> np.ndarray:
    """Discrete-time Fourier transform of real sequences at arbitrary frequencies.

    Parameters
    ----------
    h : ndarray, shape (..., n_samples)
        Impulse responses, sample 0 at time 0.
    freq_hz : ndarray, shape (n_freqs,)
    fs : float
        Sample rate of ``h``, Hz.

    Returns
    -------
    ndarray, shape (..., n_freqs), complex
        The same as ``scipy.signal.freqz(h, worN=freq_hz, fs=fs)[1]`` for each
        sequence.
    """
    x = np.asarray(h, dtype=float)
    lead = x.shape[:-1]
    n = x.shape[-1]
    x = x.reshape(-1, n)
    f = np.asarray(freq_hz, dtype=float)
    w = 2.0 * np.pi * f / float(fs)
    block = min(BLOCK, max(n, 1))
    phase = np.outer(np.arange(block), w)  # (block, F)
    cos, sin = np.cos(phase), np.sin(phase)  # real products: one BLAS call each
    out = np.zeros((x.shape[0], f.size), dtype=complex)
    for start in range(0, n, block):
        seg = x[:, start : start + block]
        m = seg.shape[1]
        part = seg @ cos[:m] - 1j * (seg @ sin[:m])
        out += part * np.exp(-1j * w * start)[None, :]
    return out.reshape(lead + (f.size,))
