"""Figures of merit of a correction, at measured and at held-out seats.

Definitions (so anyone can recompute them):

* Spectra are those of the whole impulse response (steady state, no time
  window), filtered by the correction when one is given, with 1/N-octave
  power smoothing read on the log grid.
* **ripple**: RMS deviation (dB) of the 1/6-octave response from its own
  mean between 1.25x the loudspeaker's true high-pass corner and 300 Hz
  (grid points equally spaced in log frequency, so every octave weighs the
  same).
* **peak**: RMS of the part of that band which stands above its median
  (what is heard as boom).
* **broadband**: RMS deviation of the 1/3-octave response over 300 Hz to
  8 kHz after removing a straight line fitted over log frequency.
* **bass drive**: the filter's largest gain below 0.8x the true corner
  minus its 200 Hz to 2 kHz median.
* **pre-ringing**: the largest level (dB re the filter's peak) of any tap
  more than 1 ms before the peak tap.
"""

from __future__ import annotations

import numpy as np

from roomcorr.analysis.smoothing import smooth_bins_to_grid

#: Upper end of the modal band of ripple and peak, Hz.
MODAL_TOP_HZ = 300.0
#: The modal band starts at this multiple of the loudspeaker's true corner.
MODAL_START_FACTOR = 1.25
#: Broadband band, Hz.
BROADBAND_HZ = (300.0, 8000.0)
#: Bass drive looks below this multiple of the true corner ...
DRIVE_BELOW_FACTOR = 0.8
#: ... and down to this frequency, Hz.
DRIVE_LOWEST_HZ = 10.0
#: Reference band of the bass drive (the filter's midrange), Hz.
MID_BAND_HZ = (200.0, 2000.0)
#: Pre-ringing is looked for this long before the filter's peak, s.
PRE_RING_S = 0.001


def steady_state_db(
    irs: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    width_oct: float,
    fir: np.ndarray | None = None,
) -> np.ndarray:
    """Smoothed power response of whole impulse responses, optionally filtered.

    Parameters
    ----------
    irs : ndarray, shape (..., n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
        Log grid to read at.
    width_oct : float
        Smoothing width in octaves (1/6, 1/3).
    fir : ndarray, shape (n_taps,) or broadcastable to ``irs[..., :]``, optional
        Filter applied (full linear convolution, computed by FFT).

    Returns
    -------
    level_db : ndarray, shape (..., n_freqs)
    """
    x = np.asarray(irs, dtype=float)
    n = x.shape[-1] + (0 if fir is None else np.asarray(fir).shape[-1] - 1)
    n_fft = 1 << int(np.ceil(np.log2(max(n, 2))))
    spec = np.fft.rfft(x, n_fft)
    if fir is not None:
        spec = spec * np.fft.rfft(np.asarray(fir, dtype=float), n_fft)
    bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
    power = smooth_bins_to_grid(np.abs(spec) ** 2, bins, freq_hz, width_oct)
    return 10.0 * np.log10(np.maximum(power, 1e-30))


def _band(freq_hz: np.ndarray, lo: float, hi: float) -> np.ndarray:
    f = np.asarray(freq_hz)
    return (f >= lo) & (f <= hi)


def ripple_db(level_db: np.ndarray, freq_hz: np.ndarray, corner_hz: float) -> np.ndarray:
    """RMS deviation from the mean in the modal band; shape ``level_db.shape[:-1]``."""
    x = level_db[..., _band(freq_hz, MODAL_START_FACTOR * corner_hz, MODAL_TOP_HZ)]
    return np.sqrt(np.mean((x - x.mean(axis=-1, keepdims=True)) ** 2, axis=-1))


def peak_db(level_db: np.ndarray, freq_hz: np.ndarray, corner_hz: float) -> np.ndarray:
    """RMS of what stands above the median in the modal band; shape ``level_db.shape[:-1]``."""
    x = level_db[..., _band(freq_hz, MODAL_START_FACTOR * corner_hz, MODAL_TOP_HZ)]
    above = np.maximum(x - np.median(x, axis=-1, keepdims=True), 0.0)
    return np.sqrt(np.mean(above**2, axis=-1))


def broadband_db(level_db: np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
    """RMS deviation from a straight line over log frequency, 300 Hz to 8 kHz."""
    m = _band(freq_hz, *BROADBAND_HZ)
    lf = np.log2(np.asarray(freq_hz)[m])
    x = np.asarray(level_db)[..., m]
    flat = x.reshape(-1, lf.size)
    a = np.vstack([lf, np.ones_like(lf)]).T
    coef, *_ = np.linalg.lstsq(a, flat.T, rcond=None)
    resid = flat - (a @ coef).T
    return np.sqrt(np.mean(resid**2, axis=-1)).reshape(x.shape[:-1])


def bass_drive_db(filter_db: np.ndarray, freq_hz: np.ndarray, corner_hz: float) -> float:
    """Largest filter gain below 0.8x the corner minus the filter's 200 Hz-2 kHz median."""
    low = _band(freq_hz, DRIVE_LOWEST_HZ, DRIVE_BELOW_FACTOR * corner_hz)
    mid = _band(freq_hz, *MID_BAND_HZ)
    return float(np.max(filter_db[low]) - np.median(filter_db[mid]))


def pre_ringing_db(h: np.ndarray, fs: int) -> float:
    """Largest tap more than 1 ms before the peak tap, dB re the peak (-inf if none)."""
    a = np.abs(np.asarray(h, dtype=float))
    k = int(np.argmax(a))
    early = a[: max(0, k - int(round(PRE_RING_S * fs)))]
    if early.size == 0 or not np.any(early > 0):
        return float("-inf")
    return float(20.0 * np.log10(early.max() / a[k]))
