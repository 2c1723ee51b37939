"""Responses the report draws: the filters' own, and the measurements through them
(predicted at every position).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.signal import fftconvolve, freqz, sosfreqz

from roomcorr.pipeline import analyse_positions


def fir_for(curves: dict[str, Any], index: int) -> tuple[np.ndarray | None, int | None]:
    """The exported filter at the measurement rate (or the nearest rate)."""
    firs = curves.get("firs") or {}
    if not firs:
        return None, None
    fs = int(curves["fs_in"])
    rate = fs if fs in firs else min(firs, key=lambda r: abs(r - fs))
    return np.asarray(firs[rate][index], dtype=float), int(rate)


def corrected_responses(irs: np.ndarray, fir: np.ndarray) -> np.ndarray:
    """Each position's response convolved with the filter, cut to the original length.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_samples)
    fir : ndarray, shape (n_taps,)

    Returns
    -------
    corrected_irs : ndarray, shape (n_positions, n_samples)
    """

    return fftconvolve(irs, fir[None, :], axes=-1)[:, : irs.shape[-1]]


def predicted_responses(
    irs: np.ndarray, fs: int, fir: np.ndarray, freq_hz: np.ndarray, measured_db: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Each position convolved with the filter, analysed exactly like the measurement.

    The pipeline's own position analysis (onset, frequency-dependent window,
    smoothing) is run on the convolved and on the raw responses; their
    difference is added to ``measured_db``, so the calibration applied to the
    measurement carries over unchanged.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_samples)
    fs : int
    fir : ndarray, shape (n_taps,)
    freq_hz : ndarray, shape (n_freqs,)
    measured_db : ndarray, shape (n_positions, n_freqs)

    Returns
    -------
    predicted_db : ndarray, shape (n_positions, n_freqs)
    corrected_irs : ndarray, shape (n_positions, n_samples)
        Convolved responses cut to the original length.
    """

    conv = corrected_responses(irs, fir)
    after, _ = analyse_positions(conv[:, None, :], fs, freq_hz)
    before, _ = analyse_positions(irs[:, None, :], fs, freq_hz)
    return measured_db + after[:, 0] - before[:, 0], conv


def filter_response(
    fir: np.ndarray, fs: int, freq_hz: np.ndarray, min_fft: int = 1 << 18
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Gain (dB), wrapped phase (degrees) and group delay (ms) of an FIR on ``freq_hz``.

    One zero-padded FFT of the taps and one of ``n * h[n]``; group delay is
    ``Re(FFT(n h) / FFT(h))`` (the standard FIR identity, as in
    :func:`scipy.signal.group_delay`), read at ``freq_hz`` by linear
    interpolation between bins at most ``fs / min_fft`` apart; where the delay
    changes by more than 1 µs between two bins (a notch) the frequency is
    evaluated exactly (:func:`scipy.signal.freqz`). Frequencies at or above
    Nyquist give NaN.
    """
    h = np.asarray(fir, dtype=float)
    f = np.asarray(freq_hz, dtype=float)
    ok = f < fs / 2
    n_fft = max(min_fft, 1 << int(np.ceil(np.log2(8 * h.size))))
    spec = np.fft.rfft(h, n_fft)
    ramp = np.fft.rfft(np.arange(h.size) * h, n_fft)
    bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
    with np.errstate(divide="ignore", invalid="ignore"):
        gd_bins = np.real(ramp / spec)
    re = np.interp(f[ok], bins, spec.real)
    im = np.interp(f[ok], bins, spec.imag)
    gain = np.full(f.shape, np.nan)
    phase = np.full(f.shape, np.nan)
    gd = np.full(f.shape, np.nan)
    with np.errstate(divide="ignore"):
        gain[ok] = 20 * np.log10(np.hypot(re, im))
    phase[ok] = np.degrees(np.arctan2(im, re))
    gd[ok] = np.interp(f[ok], bins, gd_bins) / fs * 1000.0
    # Near a notch the delay changes fast between two bins and a line between
    # them misreads it: evaluate those few frequencies exactly (scipy's freqz,
    # the same identity as scipy.signal.group_delay).
    idx = np.flatnonzero(ok)
    k = np.clip(np.searchsorted(bins, f[idx]), 1, bins.size - 1)
    sel = idx[np.abs(gd_bins[k] - gd_bins[k - 1]) > 0.001 * fs / 1000.0]
    if sel.size:
        _, s_sel = freqz(h, worN=f[sel], fs=fs)
        _, r_sel = freqz(np.arange(h.size) * h, worN=f[sel], fs=fs)
        with np.errstate(divide="ignore", invalid="ignore"):
            gain[sel] = 20 * np.log10(np.abs(s_sel))
            gd[sel] = np.real(r_sel / s_sel) / fs * 1000.0
        phase[sel] = np.degrees(np.angle(s_sel))
    return gain, phase, gd


def iir_response_db(doc: dict[str, Any], freq_hz: np.ndarray) -> np.ndarray:
    """Response in dB of one biquad document (cascade and pre-gain) on ``freq_hz``.

    Coefficients ``[b0, b1, b2, a1, a2]`` with ``a0 = 1``, evaluated with
    :func:`scipy.signal.sosfreqz`; NaN at and above Nyquist.
    """

    fs = float(doc["sample_rate"])
    f = np.asarray(freq_hz, dtype=float)
    out = np.full(f.shape, np.nan)
    ok = f < fs / 2
    gain = float(doc.get("pre_gain_linear", 10 ** (float(doc.get("pre_gain_db", 0)) / 20)))
    secs = doc.get("sections") or []
    if secs:
        sos = np.array([[c[0], c[1], c[2], 1.0, c[3], c[4]]
                        for c in (s["coefficients"] for s in secs)], dtype=float)
        _, h = sosfreqz(sos, worN=f[ok], fs=fs)
    else:
        h = np.ones(int(ok.sum()))
    with np.errstate(divide="ignore"):
        out[ok] = 20 * np.log10(np.abs(h) * gain)
    return out
