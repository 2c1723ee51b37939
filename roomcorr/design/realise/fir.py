"""Minimum-phase FIR correction filters synthesised from a gain curve.

The correction curve lives on the rate-independent log-frequency grid
(``roomcorr.grid``). For each sample rate a filter is synthesised from that
curve directly (never by resampling another rate's filter): the curve is
interpolated onto the rfft bins of an oversampled FFT, given minimum phase by
folding the real cepstrum (``roomcorr.design.phase.minphase``), transformed back and
truncated to ``n_taps`` with a half-Hann fade over the last quarter.

References
----------
.. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
       3rd ed., Pearson, 2010, ch. 13 (minimum phase from the cepstrum) and
       ch. 7 (truncating an impulse response with a window).
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sp_fft
from scipy.signal import freqz, zoom_fft

from roomcorr.analysis.dtft import dtft
from roomcorr.design.phase.minphase import DEFAULT_OVERSAMPLE, minimum_phase_spectrum
from roomcorr.grid import interp_log

#: Shortest filter :func:`default_n_taps` returns.
MIN_DEFAULT_N_TAPS = 4096

#: Resolution rule of :func:`default_n_taps`: fs / n_taps must not exceed f_low_hz / this.
RESOLUTION_FACTOR = 12

#: Fraction of the filter length faded out by the half-Hann tail window.
TAIL_FRACTION = 0.25

#: :func:`peak_gain_db` refines local maxima within this many dB of the largest bin...
REFINE_WITHIN_DB = 0.5
REFINE_RATIO = 10.0 ** (-REFINE_WITHIN_DB / 20.0)
#: ...and at most this many of them.
REFINE_MAX_PEAKS = 8


def default_n_taps(fs: float, f_low_hz: float) -> int:
    """Return the default filter length for sample rate ``fs`` and lowest corrected frequency.

    The result is the shortest power of two ``N`` whose frequency resolution
    ``fs / N`` is at most ``f_low_hz / 12``, so that the lowest corrected
    frequency spans at least twelve DFT bins and the narrow (down to 1/48
    octave) correction features of room modes there are followed (common
    practice: several bins per feature; on the demo room 6 bins left 0.6 dB
    of error at a mode, 12 bins under 0.5 dB). It is never below 4096 taps.

    Examples: 48 kHz with ``f_low_hz=20`` gives 32768 taps (1.5 Hz bins);
    96 kHz gives 65536.

    Parameters
    ----------
    fs : float
        Sample rate in Hz, positive.
    f_low_hz : float
        Lowest frequency the correction acts on, positive.

    Returns
    -------
    n_taps : int
    """
    if not fs > 0 or not np.isfinite(fs):
        raise ValueError(f"fs must be a positive number, got {fs}")
    if not f_low_hz > 0 or not np.isfinite(f_low_hz):
        raise ValueError(f"f_low_hz must be a positive number, got {f_low_hz}")
    n_min = RESOLUTION_FACTOR * fs / f_low_hz
    n = 1 << max(0, int(np.ceil(np.log2(n_min))))
    # guard against rounding in log2 at exact powers of two
    while fs / n > f_low_hz / RESOLUTION_FACTOR:
        n *= 2
    return max(n, MIN_DEFAULT_N_TAPS)


def tail_window(n_taps: int, fraction: float = TAIL_FRACTION) -> np.ndarray:
    """Return a window that is 1 except for a falling half-Hann over the last ``fraction``.

    The last sample is small but not zero, so no tap is wasted.

    Returns
    -------
    window : ndarray, shape (n_taps,)
    """
    w = np.ones(n_taps)
    n_tail = int(round(n_taps * fraction))
    if n_tail > 0:
        k = np.arange(1, n_tail + 1)
        w[n_taps - n_tail :] = 0.5 * (1.0 + np.cos(np.pi * k / (n_tail + 1)))
    return w


def synthesize_fir(
    grid_hz: np.ndarray,
    gain_db: np.ndarray,
    fs: float,
    n_taps: int,
    oversample: int = DEFAULT_OVERSAMPLE,
) -> np.ndarray:
    """Synthesise a minimum-phase FIR filter whose magnitude follows a gain curve.

    The curve is interpolated (linearly in log frequency,
    :func:`roomcorr.grid.interp_log`) onto all rfft bins of an
    ``oversample * n_taps``-point FFT, DC and Nyquist included; bins below
    the grid start hold the first value, bins above the grid end hold the
    last. The minimum-phase spectrum with that magnitude is transformed back,
    truncated to ``n_taps`` and faded out with a half-Hann window over the
    last quarter of the taps.

    Parameters
    ----------
    grid_hz : ndarray, shape (n_freqs,)
        Increasing frequencies of the curve in Hz (normally the log grid).
    gain_db : ndarray, shape (n_freqs,)
        Gain in dB at ``grid_hz``.
    fs : float
        Sample rate of the filter in Hz.
    n_taps : int
        Filter length.
    oversample : int
        FFT length as a multiple of ``n_taps`` (limits cepstral aliasing).

    Returns
    -------
    h : ndarray, shape (n_taps,), float64

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal
           Processing, 3rd ed., ch. 13.
    """
    grid_hz = np.asarray(grid_hz, dtype=np.float64)
    gain_db = np.asarray(gain_db, dtype=np.float64)
    if grid_hz.ndim != 1 or grid_hz.shape != gain_db.shape or grid_hz.size < 2:
        raise ValueError(
            f"grid_hz and gain_db must be 1-D with the same length >= 2, "
            f"got shapes {grid_hz.shape} and {gain_db.shape}"
        )
    if not (np.all(np.isfinite(grid_hz)) and np.all(np.isfinite(gain_db))):
        raise ValueError("grid_hz and gain_db must be finite")
    if np.any(grid_hz <= 0) or np.any(np.diff(grid_hz) <= 0):
        raise ValueError("grid_hz must be positive and strictly increasing")
    if not fs > 0:
        raise ValueError(f"fs must be positive, got {fs}")
    n_taps = int(n_taps)
    if n_taps < 1:
        raise ValueError(f"n_taps must be at least 1, got {n_taps}")
    if oversample < 1:
        raise ValueError(f"oversample must be at least 1, got {oversample}")

    n_fft = int(oversample) * n_taps
    bins_hz = np.fft.rfftfreq(n_fft, 1.0 / fs)
    gain_bins_db = interp_log(bins_hz, grid_hz, gain_db)
    gain_bins_db[0] = gain_db[0]  # DC holds the first value
    magnitude = 10.0 ** (gain_bins_db / 20.0)
    spectrum = minimum_phase_spectrum(magnitude, n_fft)
    h = np.fft.irfft(spectrum, n_fft)[:n_taps]
    return h * tail_window(n_taps)


def fir_response_db(h: np.ndarray, fs: float, freq_hz: np.ndarray) -> np.ndarray:
    """Return the magnitude response of FIR ``h`` in dB at ``freq_hz``.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    fs : float
        Sample rate in Hz.
    freq_hz : ndarray, shape (n_freqs,)
        Frequencies in Hz (any spacing).

    Returns
    -------
    gain_db : ndarray, shape (n_freqs,)
        ``20 log10 |H|``; exact zeros give ``-inf``.
    """

    freq_hz = np.atleast_1d(np.asarray(freq_hz, dtype=np.float64))
    _, resp = freqz(np.asarray(h, dtype=np.float64), worN=freq_hz, fs=fs)
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(resp))


def own_length(h: np.ndarray) -> int:
    """Taps up to and including the last non-zero one (a row zero-padded to a longer
    common length has its own, shorter length; at least 1)."""
    nz = np.flatnonzero(h)
    return int(nz[-1]) + 1 if nz.size else 1


def dense_fft_length(n_taps: int) -> int:
    """FFT length of the dense look at a filter's response (:func:`peak_gain_db`,
    :func:`cap_excess_db`): at least eight times ``n_taps`` and 16384, the next length
    pocketfft transforms fast (``scipy.fft.next_fast_len``: factors 2, 3, 5 and 7
    ...), so the bins are never further apart than ``fs / (8 n_taps)``; a length just
    above a power of two no longer doubles the transform."""
    return int(sp_fft.next_fast_len(max(8 * int(n_taps), 1 << 14), real=True))


def peak_gain_db(h: np.ndarray, fs: float, f_lo: float = 20.0, f_hi: float = 20000.0) -> float:
    """Return the largest gain in dB of FIR ``h`` between ``f_lo`` and ``f_hi`` Hz.

    Evaluated in two steps so that a peak between grid points is not missed:
    first all rfft bins of a zero-padded FFT of at least eight times the
    filter length (bin spacing ``fs / (8 n_taps)`` or finer) plus the two band
    edges; then, around every local maximum within ``REFINE_WITHIN_DB`` of
    the largest bin (at most ``REFINE_MAX_PEAKS`` of them), the response is
    evaluated again on 65 points spanning one bin either side with a chirp-z
    zoom FFT (``scipy.signal.zoom_fft``). The result is within about 1e-3 dB
    of the true maximum (checked against a direct DTFT in the tests).
    ``f_hi`` above Nyquist is limited to Nyquist.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    fs : float
        Sample rate in Hz.
    f_lo, f_hi : float
        Band in Hz, ``0 <= f_lo <= f_hi``.

    Returns
    -------
    peak_db : float

    References
    ----------
    .. [1] L. R. Rabiner, R. W. Schafer and C. M. Rader, "The chirp
           z-transform algorithm", IEEE Trans. Audio Electroacoust. 17(2),
           1969 (zoomed DTFT evaluation).
    """

    h = np.asarray(h, dtype=np.float64)
    f_hi = min(float(f_hi), fs / 2.0)
    if not 0.0 <= f_lo <= f_hi:
        raise ValueError(f"need 0 <= f_lo <= f_hi <= fs/2, got f_lo={f_lo}, f_hi={f_hi}")
    n_fft = dense_fft_length(h.shape[-1])
    mag = np.abs(sp_fft.rfft(h, n_fft))
    bins_hz = np.fft.rfftfreq(n_fft, 1.0 / fs)
    inside = np.flatnonzero((bins_hz >= f_lo) & (bins_hz <= f_hi))
    # band edges: the DTFT sum directly (two frequencies, O(n_taps)); DC and Nyquist are
    # the plain and the alternating sum of the taps (a DTFT at 0 and at fs / 2)
    edges = []
    for f in (f_lo, f_hi):
        if f == 0.0:
            edges.append(abs(float(np.sum(h))))
        elif f == fs / 2.0:
            edges.append(abs(float(np.sum(h[0::2]) - np.sum(h[1::2]))))
        else:
            edges.append(float(np.abs(dtft(h, np.array([f]), fs))[0]))
    best = max(edges)
    if inside.size:
        m = mag[inside]
        best = max(best, float(np.max(m)))
        # local maxima of the sampled magnitude (ends of the band count too), among the
        # few bins near the top
        near = np.flatnonzero(m >= best * REFINE_RATIO)
        left = np.where(near > 0, m[np.maximum(near - 1, 0)], -np.inf)
        right = np.where(near < m.size - 1, m[np.minimum(near + 1, m.size - 1)], -np.inf)
        peaks = near[(m[near] >= left) & (m[near] >= right)]
        peaks = peaks[np.argsort(m[peaks])[::-1][:REFINE_MAX_PEAKS]]
        df = fs / n_fft
        # |H|^2 is a trigonometric polynomial of degree n_taps - 1, so by Bernstein's
        # inequality its curvature is at most (n_taps - 1)^2 times its maximum M^2; at
        # a maximum the slope is zero, and the nearest bin (at most half a bin away)
        # holds at least M * sqrt(1 - (pi (n_taps - 1) / n_fft)^2 / 2), 0.961 M or more
        # at eight times oversampling. A local maximum of the bins below ``best`` times
        # that cannot hide anything above ``best``, nor can any lower one after it.
        # (G. G. Lorentz, Approximation of Functions, 1966, ch. 2: Bernstein's inequality.)
        reach = np.sqrt(1.0 - 0.5 * (np.pi * (h.shape[-1] - 1) / n_fft) ** 2)
        for k in peaks:
            if m[k] < best * reach:
                break
            f0 = bins_hz[inside[k]]
            a, b = max(f_lo, f0 - df), min(f_hi, f0 + df)
            if b > a:
                zoom = zoom_fft(h, [a, b], m=65, fs=fs, endpoint=True)
                best = max(best, float(np.max(np.abs(zoom))))
    with np.errstate(divide="ignore"):
        return float(20.0 * np.log10(best))


def worst_case_gain_db(h: np.ndarray) -> float:
    """Return the worst-case gain ``20 log10(sum |h|)`` in dB.

    This is the largest output amplitude for any input bounded by 1 (reached
    by a signal whose samples have the signs of the time-reversed filter), so
    it bounds the magnitude response at every frequency (triangle
    inequality).

    Parameters
    ----------
    h : ndarray, shape (n_taps,)

    Returns
    -------
    gain_db : float
    """
    total = float(np.sum(np.abs(np.asarray(h, dtype=np.float64))))
    with np.errstate(divide="ignore"):
        return float(20.0 * np.log10(total))


def taps_for_latency(n_taps: int, latency_samples: int) -> int:
    """Length (``n_taps`` doubled as needed) that holds ``latency_samples`` with room after.

    A mixed-phase filter has its main peak ``latency_samples`` into the filter
    and needs as many taps after it as before (the pre-ringing half and the
    decaying half), so the length must exceed ``2 * latency_samples``.

    Parameters
    ----------
    n_taps : int
        The length the resolution rule asks for (:func:`default_n_taps`).
    latency_samples : int
        Latency in samples at the filter's rate, ``>= 0``.

    Returns
    -------
    n_taps : int
    """
    need = 2 * int(latency_samples) + 1
    n = int(n_taps)
    while n < need:
        n *= 2
    return n


def cap_excess_db(
    h: np.ndarray, fs: float, grid_hz: np.ndarray, limit_db: float, width_hz: float
) -> np.ndarray:
    """How far the realised response of FIR ``h`` rises above ``limit_db``, per grid frequency.

    The magnitude is evaluated from DC to Nyquist on every bin of a zero-padded
    FFT (at least eight times the filter length, as :func:`peak_gain_db`).
    Each grid frequency gets the largest excess found within ``width_hz`` of it
    or halfway to its neighbours, whichever reaches further (so an excess
    between two grid points is given to both); the first grid point also takes
    every bin below it (down to DC) and the last every bin above it (up to
    Nyquist), because :func:`synthesize_fir` holds the end values there.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    fs : float
        Sample rate in Hz.
    grid_hz : ndarray, shape (n_freqs,)
        Increasing frequencies of the correction curve.
    limit_db : float
        The gain the filter must not exceed.
    width_hz : float
        Half-width of the neighbourhood each grid point answers for (about
        two bins of the filter length, ``2 fs / n_taps``, the width of a
        truncation ripple).

    Returns
    -------
    excess_db : ndarray, shape (n_freqs,)
        ``>= 0``; zero where the response stays at or below ``limit_db``.
    """
    h = np.asarray(h, dtype=np.float64)
    grid_hz = np.asarray(grid_hz, dtype=np.float64)
    n_fft = dense_fft_length(h.shape[-1])
    with np.errstate(divide="ignore"):
        mag_db = 20.0 * np.log10(np.abs(sp_fft.rfft(h, n_fft)))
    bins_hz = np.fft.rfftfreq(n_fft, 1.0 / fs)
    over = np.maximum(mag_db - limit_db, 0.0)
    out = np.zeros(grid_hz.size)
    hot = np.flatnonzero(over > 0)
    if hot.size == 0:
        return out
    mid = np.sqrt(grid_hz[1:] * grid_hz[:-1])  # halfway (in log frequency) between grid points
    lo_hz = np.minimum(np.r_[-np.inf, mid], grid_hz - width_hz)
    hi_hz = np.maximum(np.r_[mid, np.inf], grid_hz + width_hz)
    lo = np.searchsorted(bins_hz, lo_hz, side="left")
    hi = np.searchsorted(bins_hz, hi_hz, side="right")
    n_hot = np.searchsorted(hot, hi) - np.searchsorted(hot, lo)
    for i in np.flatnonzero(n_hot > 0):
        out[i] = float(np.max(over[lo[i] : hi[i]]))
    return out
