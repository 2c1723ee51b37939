"""Frequency-dependent windowing: from an impulse response to power on a log grid.

Reflections are judged the way a listener hears them: a long window at low
frequencies (the room's modes count there), a short one at high frequencies
(mostly the direct sound and early reflections). The window length at a
frequency f is ``cycles / f`` seconds, kept between ``min_s`` and ``max_s``.
"""

from __future__ import annotations

import numpy as np

#: Window length in cycles of each frequency (common practice: 6 to 15).
DEFAULT_CYCLES = 15.0
#: Shortest and longest window after the arrival, in seconds.
DEFAULT_MIN_S = 0.005
DEFAULT_MAX_S = 0.5
#: Fade-in before the arrival, in seconds.
DEFAULT_PRE_S = 0.001


def asymmetric_window(
    n: int, onset: float, pre: int, post: int, start: int = 0, stop: int | None = None
) -> np.ndarray:
    """Window of ``n`` samples: half-Hann rise of ``pre`` samples ending at the onset,
    flat for the first half of ``post``, half-Hann fall over the second half; only its
    samples ``start`` to ``stop`` (the same values as the whole window's there)."""
    stop = n if stop is None else stop
    w = np.zeros(stop - start)
    t = np.arange(start, stop) - onset
    rise = (t >= -pre) & (t < 0)
    w[rise] = 0.5 - 0.5 * np.cos(np.pi * (t[rise] + pre) / max(pre, 1))
    flat_end = post / 2.0
    flat = (t >= 0) & (t < flat_end)
    w[flat] = 1.0
    fall = (t >= flat_end) & (t < post)
    w[fall] = 0.5 + 0.5 * np.cos(np.pi * (t[fall] - flat_end) / max(post - flat_end, 1))
    return w


def window_lengths_s(
    freq_hz: np.ndarray,
    cycles: float = DEFAULT_CYCLES,
    min_s: float = DEFAULT_MIN_S,
    max_s: float = DEFAULT_MAX_S,
) -> np.ndarray:
    """Window length after the arrival, in seconds, for each frequency."""
    return np.clip(cycles / np.asarray(freq_hz, dtype=float), min_s, max_s)


def fdw_power(
    ir: np.ndarray,
    fs: int,
    onset: float,
    freq_hz: np.ndarray,
    cycles: float = DEFAULT_CYCLES,
    min_s: float = DEFAULT_MIN_S,
    max_s: float = DEFAULT_MAX_S,
    pre_s: float = DEFAULT_PRE_S,
) -> np.ndarray:
    """Power spectrum of ``ir`` with a frequency-dependent window, on ``freq_hz``.

    A handful of windowed FFTs (lengths a third of an octave apart between
    the shortest and longest window needed) are taken, each is read at the
    grid frequencies by linear interpolation of the power, and the result
    at each frequency is interpolated in dB between the two lengths that
    bracket its own window length. The cost is a few FFTs of the response,
    not one per frequency.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
    fs : int
    onset : float
        Direct-sound arrival in samples (see :func:`roomcorr.analysis.onset.find_onset`).
    freq_hz : ndarray, shape (n_freqs,)
        Log grid. Frequencies above fs/2 take the value at fs/2.

    Returns
    -------
    power : ndarray, shape (n_freqs,)
        |H(f)|^2 with the window applied (no smoothing yet).

    References
    ----------
    .. [1] Frequency-dependent windowing as "cycles per frequency" is common
       practice in loudspeaker and room measurement.
    """
    x = np.asarray(ir, dtype=float)
    n = x.size
    avail_s = max((n - onset) / fs, 2.0 / fs)
    max_s = min(max_s, avail_s)
    min_s = min(min_s, max_s)
    f = np.minimum(np.asarray(freq_hz, dtype=float), fs / 2)
    want = window_lengths_s(f, cycles, min_s, max_s)
    n_len = max(1, int(np.ceil(np.log2(max_s / min_s) * 3)) + 1)
    lengths = np.geomspace(min_s, max_s, n_len) if n_len > 1 else np.array([max_s])
    pre = max(1, int(round(pre_s * fs)))
    per_len = np.empty((lengths.size, f.size))
    for k, length in enumerate(lengths):
        post = int(round(length * fs))
        start = max(0, int(np.floor(onset)) - pre - 1)
        stop = min(n, int(np.ceil(onset)) + post + 1)
        # the window is zero outside start:stop, so only that part is made
        seg = x[start:stop] * asymmetric_window(n, onset, pre, post, start, stop)
        n_fft = int(2 ** np.ceil(np.log2(max(seg.size * 4, 1024))))
        spec = np.abs(np.fft.rfft(seg, n_fft)) ** 2
        bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
        per_len[k] = np.interp(f, bins, spec)
    if lengths.size == 1:
        return per_len[0]
    pos = np.interp(np.log(want), np.log(lengths), np.arange(lengths.size))
    lo = np.clip(np.floor(pos).astype(int), 0, lengths.size - 2)
    frac = pos - lo
    cols = np.arange(f.size)
    db_lo = 10 * np.log10(np.maximum(per_len[lo, cols], 1e-30))
    db_hi = 10 * np.log10(np.maximum(per_len[lo + 1, cols], 1e-30))
    return 10 ** (((1 - frac) * db_lo + frac * db_hi) / 10)
