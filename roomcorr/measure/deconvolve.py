"""Deconvolution of sweep recordings into linear and harmonic impulse responses.

The recording is multiplied in the frequency domain by an inverse of the
sweep spectrum. Two inverses are offered:

``"division"`` (default)
    Regularised division by the sweep's own DFT, ``X* / (|X|^2 + beta(f))``
    (Kirkeby et al. 1998), with ``beta`` negligible (1e-8 of the in-band
    power) inside the sweep band and growing where the band taper falls, so
    out-of-band noise is not amplified. Exact in band.
``"analytic"``
    The analytic inverse spectrum of Novak et al. (2015, eq. 43). It is an
    asymptotic (stationary-phase) result: its error falls about 6 dB per octave
    and is only about -34 dB at 100 Hz for ``L = 0.3 s``, so it is kept for
    reference and for quick looks.

The result is circular: lag 0 is the sweep start, the linear
impulse response sits at small positive lags and the k-th harmonic response
at lag ``-L ln k``, i.e. wrapped near the end of the buffer.

References
----------
.. [1] A. Farina, "Simultaneous measurement of impulse response and distortion
   with a swept-sine technique", AES 108th Convention, Paris, 2000.
.. [2] A. Novak, L. Simon, P. Lotton, "Synchronized swept-sine: theory,
   application, and implementation", J. Audio Eng. Soc. 63(10), 2015.
.. [3] O. Kirkeby, P. A. Nelson, H. Hamada, F. Orduna-Bustamante, "Fast
   deconvolution of multichannel systems using regularization", IEEE Trans.
   Speech Audio Proc. 6(2), 1998.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import scipy.fft

from roomcorr.analysis.bands import band_centres_hz
from roomcorr.measure.sweep import Sweep, band_taper


@functools.lru_cache(maxsize=4)
def inverse_spectrum(sweep: Sweep, n_fft: int, method: str = "division") -> np.ndarray:
    """Inverse of the sweep spectrum on the ``rfft`` bins of length ``n_fft``.

    Scaled so that deconvolving the sweep itself gives a (band-limited) unit
    impulse at lag 0. See the module docstring for the two methods. Cached
    (the same sweep is deconvolved for every loudspeaker and position); the
    returned array is read-only.

    Returns
    -------
    ndarray, shape (n_fft // 2 + 1,), complex
    """
    inv = _inverse_spectrum(sweep, n_fft, method)
    inv.flags.writeable = False
    return inv


def _inverse_spectrum(sweep: Sweep, n_fft: int, method: str) -> np.ndarray:
    if method == "analytic":
        return sweep.inverse_spectrum(n_fft)
    if method != "division":
        raise ValueError(f"unknown deconvolution method {method!r}")
    spec = scipy.fft.rfft(sweep.signal(), n_fft)
    f = np.fft.rfftfreq(n_fft, 1.0 / sweep.fs)
    taper = band_taper(f, sweep.f_start_hz, sweep.f_end_hz, sweep.fs)
    power = np.abs(spec) ** 2
    in_band = (f >= sweep.f_start_hz) & (f <= sweep.f_end_hz)
    p_ref = float(np.median(power[in_band]))
    beta = p_ref * (1e-8 + 1e-2 * (1.0 - taper))
    return np.conj(spec) / (power + beta) * taper


def deconvolve(
    recording: np.ndarray, sweep: Sweep, n_fft: int | None = None, method: str = "division"
) -> np.ndarray:
    """Return the circular deconvolution of ``recording`` by ``sweep``.

    Parameters
    ----------
    recording : ndarray, shape (..., n_samples)
        Recording(s) whose sample 0 is the sweep start as played.
    sweep : Sweep
    n_fft : int, optional
        FFT length; default ``next_fast_len(n_samples + sweep.n_samples)``, long
        enough that the harmonic responses (negative lags) do not overlap the
        linear one.
    method : {"division", "analytic"}
        Inverse used (module docstring).

    Returns
    -------
    ndarray, shape (..., n_fft)
        Impulse response; index ``i`` is lag ``i`` (negative lags wrap to the end).
    """
    rec = np.asarray(recording, dtype=float)
    if n_fft is None:
        n_fft = scipy.fft.next_fast_len(rec.shape[-1] + sweep.n_samples, real=True)
    spec = scipy.fft.rfft(rec, n_fft, axis=-1)
    return scipy.fft.irfft(spec * inverse_spectrum(sweep, n_fft, method), n_fft, axis=-1)


def peak_lag(h: np.ndarray) -> float:
    """Lag of the largest magnitude sample, refined by parabolic interpolation (samples)."""
    h = np.asarray(h, dtype=float)
    i = int(np.argmax(np.abs(h)))
    if 0 < i < len(h) - 1:
        a, b, c = np.abs(h[i - 1 : i + 2])
        den = a - 2 * b + c
        if den != 0:
            return i + 0.5 * (a - c) / den
    return float(i)


def fractional_shift(h: np.ndarray, shift_samples: float) -> np.ndarray:
    """Circularly delay ``h`` (last axis) by ``shift_samples`` (may be fractional, or negative).

    Uses the Fourier shift theorem (linear phase ``exp(-j 2 pi f tau)``).
    """
    n = h.shape[-1]
    f = np.fft.rfftfreq(n)
    spec = scipy.fft.rfft(h, axis=-1) * np.exp(-2j * np.pi * f * shift_samples)
    return scipy.fft.irfft(spec, n, axis=-1)


@dataclass
class HarmonicSplit:
    """Linear and harmonic impulse responses cut from one deconvolution.

    Attributes
    ----------
    linear : ndarray, shape (n_ir,)
        Lags ``0 .. n_ir - 1`` of the deconvolution (after any shift).
    harmonic_window : ndarray, shape (n_orders, n_win)
        Orders 1..n_orders cut with identical windows, each starting
        ``pre`` samples before the expected arrival of that order; row 0 is the
        linear response cut the same way (the reference for distortion ratios).
    orders : list[int]
        ``[1, 2, ..., n_orders]``.
    arrival_samples : float
        Lag of the linear response's peak.
    """

    linear: np.ndarray
    harmonic_window: np.ndarray
    orders: list[int]
    arrival_samples: float


def split_harmonics(
    h: np.ndarray, sweep: Sweep, n_ir: int, n_orders: int = 5, pre_s: float = 0.002
) -> HarmonicSplit:
    """Cut the linear response and harmonic responses 2..``n_orders`` out of ``h``.

    The k-th harmonic response is expected at ``arrival - L ln k`` (Farina 2000;
    exactly, with synchronised phase, for the Novak sweep). Each order gets the
    same window length, limited by the gap to the neighbouring order
    ``L ln(n/(n-1))`` so orders do not leak into each other.

    Parameters
    ----------
    h : ndarray, shape (n_fft,)
        Output of :func:`deconvolve` for one channel.
    sweep : Sweep
    n_ir : int
        Length of the linear response to keep.
    n_orders : int
        Highest harmonic order (>= 1).
    pre_s : float
        Window start before each arrival, seconds.

    Returns
    -------
    HarmonicSplit
    """
    n_fft = h.shape[-1]
    fs = sweep.fs
    lin_region = h[: min(n_ir, n_fft)]
    arrival = peak_lag(lin_region)
    n_pre = int(round(pre_s * fs))
    if n_orders >= 2:
        gap = sweep.rate_s * np.log(n_orders / (n_orders - 1)) * fs
        n_win = int(min(n_ir, max(16, np.floor(gap) - 2 * n_pre)))
    else:
        n_win = n_ir
    rows = []
    for k in range(1, n_orders + 1):
        start = int(np.floor(arrival + sweep.harmonic_lag_s(k) * fs)) - n_pre
        idx = (start + np.arange(n_win)) % n_fft
        rows.append(h[idx])
    return HarmonicSplit(
        linear=np.array(lin_region, copy=True),
        harmonic_window=np.array(rows),
        orders=list(range(1, n_orders + 1)),
        arrival_samples=float(arrival),
    )


def iec_band_centres(fraction: int, f_lo_hz: float, f_hi_hz: float) -> np.ndarray:
    """Mid-band frequencies of 1/``fraction`` octave bands between two limits.

    Base-10 definition of IEC 61260-1:2014: ``G = 10**(3/10)``,
    ``f_m = 1000 G**(x/b)`` for odd ``b`` and ``1000 G**((2x+1)/(2b))`` for even ``b``
    (computed by :func:`roomcorr.analysis.bands.band_centres_hz`).

    Returns
    -------
    ndarray, shape (n_bands,)
    """

    fm = band_centres_hz(fraction, f_lo_hz, f_hi_hz)
    return fm[(fm >= f_lo_hz * (1 - 1e-9)) & (fm <= f_hi_hz * (1 + 1e-9))]


def harmonic_distortion(
    split: HarmonicSplit, fs: int, f_lo_hz: float, f_hi_hz: float, fraction: int = 3
) -> tuple[np.ndarray, np.ndarray]:
    """Harmonic distortion per order versus fundamental frequency.

    ``HD_k(f) = |H_k(k f)| / |H_1(f)|`` with band powers over 1/``fraction``
    octave bands of the fundamental (IEC 61260-1 mid-bands and edges
    ``f_m G**(+-1/(2b))``); the k-th response is read over the band scaled by k.
    Bands whose k-fold upper edge exceeds ``f_hi_hz`` are NaN for that order.

    Returns
    -------
    freq_hz : ndarray, shape (n_bands,)
        Fundamental mid-band frequencies.
    hd_db : ndarray, shape (n_orders - 1, n_bands)
        Orders 2..n_orders in dB relative to the fundamental.

    References
    ----------
    A. Farina, AES 108th Convention, 2000; IEC 61260-1:2014 (band edges).
    """
    rows = split.harmonic_window
    n = scipy.fft.next_fast_len(max(rows.shape[-1], fs // 10), real=True)
    spec = np.abs(scipy.fft.rfft(rows, n, axis=-1)) ** 2
    f = np.fft.rfftfreq(n, 1.0 / fs)
    g = 10.0**0.3
    centres = iec_band_centres(fraction, f_lo_hz * g ** (1 / (2 * fraction)), f_hi_hz)
    half = g ** (1 / (2 * fraction))
    out = np.full((len(split.orders) - 1, len(centres)), np.nan)
    for j, fm in enumerate(centres):
        sel1 = (f >= fm / half) & (f < fm * half)
        if not sel1.any():
            continue
        p1 = spec[0, sel1].mean()
        for i, k in enumerate(split.orders[1:]):
            if k * fm * half > f_hi_hz:
                continue
            selk = (f >= k * fm / half) & (f < k * fm * half)
            if selk.any() and p1 > 0:
                out[i, j] = 10 * np.log10(max(spec[i + 1, selk].mean(), 1e-30) / p1)
    return centres, out


def band_energy_error_db(
    h_meas: np.ndarray, h_ref: np.ndarray, fs: int, f_lo_hz: float, f_hi_hz: float
) -> float:
    """Energy of ``h_meas - h_ref`` relative to ``h_ref`` inside a band, in dB.

    Both of shape (n,); compared over ``[f_lo_hz, f_hi_hz]`` of their spectra.
    """
    n = max(len(h_meas), len(h_ref))
    a = scipy.fft.rfft(h_meas, n)
    b = scipy.fft.rfft(h_ref, n)
    f = np.fft.rfftfreq(n, 1.0 / fs)
    sel = (f >= f_lo_hz) & (f <= f_hi_hz)
    return float(10 * np.log10(np.sum(np.abs(a[sel] - b[sel]) ** 2) / np.sum(np.abs(b[sel]) ** 2)))
