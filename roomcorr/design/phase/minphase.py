"""Minimum-phase spectra and impulse responses by folding the real cepstrum.

A minimum-phase filter has the least possible delay for its magnitude
response: all its energy sits as early as the magnitude allows, with no
pre-ringing. Correction filters are built this way so that they add no
latency beyond what their magnitude response requires.

The method is homomorphic: take log|H|, transform it to the real cepstrum
c[n], fold the anti-causal half onto the causal half,
ĉ[n] = c[n] (2u[n] - δ[n]) (weight 1 at n = 0 and, for even N, at n = N/2),
and transform back; exp of the result is the minimum-phase spectrum with the
same magnitude.

The DFT makes the cepstrum periodic, so the true (infinitely long) cepstrum
is aliased. The aliasing falls roughly exponentially with the FFT length and
grows with the depth of notches, so the spectrum is sampled on an FFT several
times longer than the response (oversampling).

References
----------
.. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
       3rd ed., Pearson, 2010, ch. 13 (real cepstrum, minimum-phase
       reconstruction, eq. 13.42b).
.. [2] J. S. Lim and A. V. Oppenheim, Advanced Topics in Signal Processing,
       Prentice Hall, 1988, pp. 472-473 (oversampling to limit cepstral
       aliasing).
"""

from __future__ import annotations

import numpy as np

#: Magnitudes are floored at this fraction of their maximum before the log
#: (-240 dB), which keeps the log finite at exact zeros.
MAGNITUDE_FLOOR_REL = 1e-12

#: Default oversampling of the FFT relative to the response length.
DEFAULT_OVERSAMPLE = 8

#: Largest FFT length :func:`minimum_phase` grows to when asked for an error bound.
MAX_N_FFT = 1 << 24

#: Magnitude errors are judged on bins within this many dB of the peak.
CHECK_RANGE_DB = 60.0


def fold_window(n_fft: int) -> np.ndarray:
    """Return the cepstral folding window 2u[n] - δ[n] for an ``n_fft``-point DFT.

    Weight 1 at n = 0, 2 for 0 < n < N/2, 1 at n = N/2 when N is even, 0 for
    the rest (the anti-causal half).

    Returns
    -------
    window : ndarray, shape (n_fft,)

    References
    ----------
    .. [1] Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed.,
           eq. 13.42b and its DFT form in section 13.6.
    """
    if n_fft < 1:
        raise ValueError(f"n_fft must be at least 1, got {n_fft}")
    w = np.zeros(n_fft)
    w[0] = 1.0
    half = n_fft // 2
    if n_fft % 2 == 0:
        w[1:half] = 2.0
        if half > 0:
            w[half] = 1.0
    else:
        w[1 : half + 1] = 2.0
    return w


def minimum_phase_spectrum(magnitude: np.ndarray, n_fft: int) -> np.ndarray:
    """Return the minimum-phase spectrum with the given magnitude.

    Parameters
    ----------
    magnitude : ndarray, shape (..., n_fft // 2 + 1)
        Linear magnitude (not dB) on the rfft bins of an ``n_fft``-point DFT,
        DC first, Nyquist last for even ``n_fft``. Must be finite and
        non-negative. Values below ``MAGNITUDE_FLOOR_REL`` times the maximum
        (along the last axis) are raised to that floor to keep the log finite.
    n_fft : int
        DFT length the bins belong to (even or odd).

    Returns
    -------
    spectrum : complex ndarray, shape (..., n_fft // 2 + 1)
        Minimum-phase spectrum; ``numpy.fft.irfft(spectrum, n_fft)`` is the
        (periodic) minimum-phase impulse response.

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal
           Processing, 3rd ed., ch. 13.
    """
    mag = np.asarray(magnitude, dtype=np.float64)
    if mag.shape[-1:] != (n_fft // 2 + 1,):
        raise ValueError(
            f"magnitude has {mag.shape[-1:]} bins on its last axis; "
            f"an n_fft of {n_fft} needs {n_fft // 2 + 1}"
        )
    if not np.all(np.isfinite(mag)) or np.any(mag < 0):
        raise ValueError("magnitude must be finite and non-negative")
    peak = np.max(mag, axis=-1, keepdims=True)
    floor = np.maximum(peak * MAGNITUDE_FLOOR_REL, np.finfo(np.float64).tiny)
    log_mag = np.log(np.maximum(mag, floor))
    cep = np.fft.irfft(log_mag, n_fft, axis=-1)
    cep *= fold_window(n_fft)
    return np.exp(np.fft.rfft(cep, axis=-1))


def fft_length(n: int, oversample: int = DEFAULT_OVERSAMPLE) -> int:
    """Return the power of two at least ``oversample * n`` (the FFT length used).

    Parameters
    ----------
    n : int
        Length of the response in samples.
    oversample : int
        Oversampling factor, at least 1.
    """
    if n < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    if oversample < 1:
        raise ValueError(f"oversample must be at least 1, got {oversample}")
    return 1 << int(np.ceil(np.log2(oversample * n)))


def minimum_phase(
    h: np.ndarray,
    oversample: int = DEFAULT_OVERSAMPLE,
    *,
    max_error_db: float | None = None,
    max_n_fft: int = MAX_N_FFT,
) -> np.ndarray:
    """Return the minimum-phase impulse response with the same magnitude as ``h``.

    Unlike ``scipy.signal.minimum_phase`` with its default ``half=True``, the
    magnitude is kept (not square-rooted) and the length is unchanged.

    How the FFT length is chosen: the magnitude of ``h`` is sampled on an FFT
    of ``fft_length(n, oversample)`` points, the power of two at least
    ``oversample * n``. A length-n FIR has an exactly length-n minimum-phase
    equivalent, so truncating the result to ``n`` samples only removes the
    cepstral aliasing, and the magnitude error is what that aliasing leaves.
    It falls roughly exponentially with the FFT length and grows as zeros of
    ``h`` approach the unit circle (deep, narrow notches). With the default
    ``oversample=8`` it stays below 0.01 dB for the smooth responses filter
    design produces and for low-order filters whose zeros are not very close
    to the unit circle (checked in ``tests/test_minphase.py``). Raw, truncated
    room responses can have near-unit-circle zeros: the 2**18-tap invented
    room in ``benchmarks/bench_minphase.py`` reaches 0.016 dB at 8x, and
    noise-like tails can need 64x to 256x. Pass ``max_error_db=0.01`` to
    let the function double the FFT length until the error, measured on the
    FFT bins within ``CHECK_RANGE_DB`` of the peak, is at most that (or
    ``max_n_fft`` is reached).

    Parameters
    ----------
    h : ndarray, shape (..., n)
        Real impulse responses along the last axis.
    oversample : int
        FFT oversampling factor, at least 1 (the starting factor when
        ``max_error_db`` is given).
    max_error_db : float or None
        If given, the largest magnitude error in dB accepted; the FFT length
        is doubled until it is met. ``None`` (default) uses one FFT length.
    max_n_fft : int
        Upper limit of the FFT length when ``max_error_db`` is given.

    Returns
    -------
    h_min : ndarray, shape (..., n), float64

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal
           Processing, 3rd ed., ch. 13.
    .. [2] J. S. Lim and A. V. Oppenheim, Advanced Topics in Signal
           Processing, 1988, pp. 472-473.
    """
    h = np.asarray(h)
    if np.iscomplexobj(h):
        raise ValueError("h must be real")
    h = h.astype(np.float64, copy=False)
    n = h.shape[-1]
    n_fft = fft_length(n, oversample)
    while True:
        mag = np.abs(np.fft.rfft(h, n_fft, axis=-1))
        spec = minimum_phase_spectrum(mag, n_fft)
        h_min = np.fft.irfft(spec, n_fft, axis=-1)[..., :n]
        if max_error_db is None or n_fft >= max_n_fft:
            return h_min
        if magnitude_error_db(h_min, mag, n_fft) <= max_error_db:
            return h_min
        n_fft *= 2


def magnitude_error_db(
    h_min: np.ndarray, magnitude: np.ndarray, n_fft: int, range_db: float | None = None
) -> float:
    """Return the largest magnitude error of ``h_min`` against ``magnitude`` in dB.

    Parameters
    ----------
    h_min : ndarray, shape (..., n)
        Impulse responses.
    magnitude : ndarray, shape (..., n_fft // 2 + 1)
        Reference linear magnitude on the rfft bins of ``n_fft`` points.
    n_fft : int
    range_db : float or None
        Only bins within this many dB of each response's peak count
        (default ``CHECK_RANGE_DB``), so that the depth of exact notches does
        not dominate.

    Returns
    -------
    error_db : float
        ``max |20 log10(|H_min| / magnitude)|`` over the counted bins.
    """
    if range_db is None:
        range_db = CHECK_RANGE_DB
    got = np.abs(np.fft.rfft(h_min, n_fft, axis=-1))
    ref = np.asarray(magnitude, dtype=np.float64)
    peak = np.max(ref, axis=-1, keepdims=True)
    counted = ref >= peak * 10.0 ** (-range_db / 20.0)
    with np.errstate(divide="ignore"):
        err = np.abs(20.0 * np.log10(got[counted] / ref[counted]))
    return float(np.max(err)) if err.size else 0.0
