"""What changed between two measurements of the same room (pure functions).

Given two impulse-response sets ``A`` (before) and ``B`` (after) of the same
loudspeakers, this module works out per channel:

- the change in direct-sound arrival time (sub-sample: cross-correlation of
  the direct-sound segments, band-limited interpolation and a parabolic fit
  of the peak), and the change in distance it implies at the speed of sound
  of the air temperature;
- the change in level (mean power 100 Hz to 10 kHz, positions power-averaged)
  and in the direct sound's peak level;
- the change in the low-frequency response per 1/3-octave band (IEC 61260-1
  mid-band frequencies, band energy from the spectrum);
- which low-frequency peaks and dips appeared, moved or vanished;
- whether existing filters are still fit: the deviation from the target left
  by the old correction on the new measurement, against the deviation a fresh
  design would leave.

Everything here takes arrays and returns arrays or plain dicts; no files.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import uniform_filter1d
from scipy.signal import find_peaks

from roomcorr.analysis.bands import band_centres_hz, nominal_hz
from roomcorr.analysis.onset import find_onset
from roomcorr.analysis.smoothing import smooth_bins_to_grid
from roomcorr.grid import log_grid, points_per_octave_of

#: Speed of sound at 20 °C in m/s (ISO 9613-1, annex A).
C_20_M_S = 343.2

#: Direct-sound segment used for the arrival comparison: before / after the onset, seconds.
DIRECT_PRE_S = 0.001
DIRECT_POST_S = 0.0025
#: Band-limited interpolation factor of the cross-correlation before the parabolic fit.
XCORR_UPSAMPLE = 16

#: Broadband level: mean power over this band on a log-frequency axis.
LEVEL_BAND_HZ = (100.0, 10000.0)
#: Low-frequency band table: 1/3-octave bands with mid-band frequencies in this range.
LF_BANDS_HZ = (20.0, 315.0)
#: Peaks and dips are looked for in this range, on a 1/24-octave smoothed response ...
EXTREMA_RANGE_HZ = (20.0, 500.0)
EXTREMA_SMOOTHING = 24
#: ... relative to a 1-octave trend, and must stand out by this much (common practice).
EXTREMA_PROMINENCE_DB = 3.0
#: A feature in B within this many octaves of one of the same kind in A is the same one.
MATCH_OCTAVES = 1.0 / 6.0
#: A matched feature "moved" when its frequency shifted by at least this (octaves) ...
MOVED_OCTAVES = 1.0 / 48.0
#: ... and "changed" (same frequency) when its height changed by at least this.
CHANGED_DB = 2.0
#: Old filters are "still fit" when the deviation they leave is at most this much
#: worse (RMS, dB) than a fresh design's (common practice; about a just-audible
#: broadband colouration).
FIT_TOLERANCE_DB = 1.0
#: ... and their largest deviation at most this much worse (common practice).
FIT_MAX_TOLERANCE_DB = 3.0


def speed_of_sound_m_s(temperature_c: float) -> float:
    """Speed of sound in air, ``c = 343.2 * sqrt((t + 273.15) / 293.15)`` m/s.

    References
    ----------
    ISO 9613-1:1993, Acoustics - Attenuation of sound during propagation
    outdoors - Part 1, annex A (reference value 343.2 m/s at 20 °C).
    """
    return C_20_M_S * float(np.sqrt((temperature_c + 273.15) / 293.15))


def _parabolic_peak(y: np.ndarray, i: int) -> float:
    """Sub-sample position of the extremum of ``y`` near index ``i`` (3-point parabola)."""
    if i <= 0 or i >= y.size - 1:
        return float(i)
    a, b, c = y[i - 1], y[i], y[i + 1]
    den = a - 2.0 * b + c
    if den == 0:
        return float(i)
    return float(i + 0.5 * (a - c) / den)


def _coarse_onset(ir: np.ndarray, fs: int) -> float:
    return find_onset(ir, fs)


def _direct_segment(ir: np.ndarray, fs: int, onset: float) -> tuple[np.ndarray, int]:
    """Tapered direct-sound segment of ``ir`` and the index of its first sample."""
    pre = max(4, int(round(DIRECT_PRE_S * fs)))
    post = max(8, int(round(DIRECT_POST_S * fs)))
    start = int(np.floor(onset)) - pre
    n = pre + post
    seg = np.zeros(n)
    lo, hi = max(start, 0), min(start + n, ir.size)
    if hi > lo:
        seg[lo - start : hi - start] = ir[lo:hi]
    return seg * _tukey(n, 0.5), start


def _tukey(n: int, alpha: float) -> np.ndarray:
    """Tukey (tapered cosine) window, as ``scipy.signal.windows.tukey(n, alpha)``.

    Written out with numpy so that reading arrival times does not import
    ``scipy.signal`` (slow to load; ``roomcorr history`` uses this).
    """
    k = np.arange(n, dtype=float)
    width = alpha * (n - 1) / 2.0
    w = np.ones(n)
    lo = k < width
    hi = k > (n - 1) - width
    w[lo] = 0.5 * (1 - np.cos(np.pi * k[lo] / width))
    w[hi] = 0.5 * (1 - np.cos(np.pi * ((n - 1) - k[hi]) / width))
    return w


def _upsample(x: np.ndarray, factor: int) -> np.ndarray:
    """Band-limited interpolation by FFT zero padding (as ``scipy.signal.resample``)."""
    n = x.size
    spec = np.fft.rfft(x)
    if n % 2 == 0:
        spec[-1] *= 0.5  # the Nyquist bin is shared by +/- fs/2 in the longer spectrum
    return np.fft.irfft(spec, n * factor) * factor


def direct_arrival_s(ir: np.ndarray, fs: int) -> float:
    """Direct-sound arrival of one impulse response, in seconds from its start.

    The coarse onset (:func:`roomcorr.analysis.onset.find_onset`, a threshold
    crossing) anchors a short tapered segment; the arrival is the largest
    magnitude in that segment after band-limited interpolation
    (:data:`XCORR_UPSAMPLE` times, FFT zero padding), refined by a parabola.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
    fs : int

    Returns
    -------
    float
        Arrival time in seconds (time of the direct sound's peak).
    """
    x = np.asarray(ir, dtype=float)
    seg, start = _direct_segment(x, fs, _coarse_onset(x, fs))
    up = np.abs(_upsample(seg, XCORR_UPSAMPLE))
    i = int(np.argmax(up))
    return (start + _parabolic_peak(up, i) / XCORR_UPSAMPLE) / fs


def arrival_change_s(ir_a: np.ndarray, ir_b: np.ndarray, fs: int) -> tuple[float, bool]:
    """Change in direct-sound arrival from ``ir_a`` to ``ir_b`` (positive: B later).

    The direct-sound segments of both responses (anchored at their coarse
    onsets) are cross-correlated; the correlation is interpolated band-limited
    (zero-padded cross spectrum, :data:`XCORR_UPSAMPLE` times) and the peak of
    its magnitude located with a parabola. A negative peak means the polarity
    of B is inverted relative to A.

    Parameters
    ----------
    ir_a, ir_b : ndarray, shape (n_samples,)
        Same loudspeaker and microphone position, same sample rate.
    fs : int

    Returns
    -------
    delay_s : float
    polarity_inverted : bool

    References
    ----------
    C. H. Knapp and G. C. Carter, "The generalized correlation method for
    estimation of time delay", IEEE Trans. ASSP 24(4), 1976 (plain
    cross-correlation, no pre-whitening, is used here).
    """
    a = np.asarray(ir_a, dtype=float)
    b = np.asarray(ir_b, dtype=float)
    seg_a, start_a = _direct_segment(a, fs, _coarse_onset(a, fs))
    seg_b, start_b = _direct_segment(b, fs, _coarse_onset(b, fs))
    n = seg_a.size
    n_fft = 2 * n
    spec = np.conj(np.fft.rfft(seg_a, n_fft)) * np.fft.rfft(seg_b, n_fft)
    r = np.fft.irfft(spec, n_fft * XCORR_UPSAMPLE) * XCORR_UPSAMPLE
    r = np.fft.fftshift(r)  # lag 0 at the centre
    mag = np.abs(r)
    i = int(np.argmax(mag))
    lag = (_parabolic_peak(mag, i) - r.size // 2) / XCORR_UPSAMPLE
    return (start_b - start_a + lag) / fs, bool(r[i] < 0)


def _spectrum_power(
    irs: np.ndarray, fs: int, min_len_s: float = 2.0
) -> tuple[np.ndarray, np.ndarray]:
    """Power spectrum of the last axis, zero-padded to at least ``min_len_s`` seconds."""
    x = np.asarray(irs, dtype=float)
    n_fft = 1 << int(np.ceil(np.log2(max(x.shape[-1], int(min_len_s * fs)))))
    spec = np.fft.rfft(x, n_fft, axis=-1)
    return np.fft.rfftfreq(n_fft, 1.0 / fs), np.abs(spec) ** 2


def _band_mean_power(
    f_bins: np.ndarray, power: np.ndarray, lo_hz: np.ndarray, hi_hz: np.ndarray
) -> np.ndarray:
    """Mean power between ``lo_hz`` and ``hi_hz`` (trapezoid integral of the bins / width)."""
    df = np.diff(f_bins)
    seg = 0.5 * (power[..., 1:] + power[..., :-1]) * df
    integral = np.concatenate([np.zeros(power.shape[:-1] + (1,)), np.cumsum(seg, axis=-1)], -1)
    flat = integral.reshape(-1, integral.shape[-1])
    at_hi = np.stack([np.interp(hi_hz, f_bins, row) for row in flat])
    at_lo = np.stack([np.interp(lo_hz, f_bins, row) for row in flat])
    width = np.maximum(hi_hz - lo_hz, 1e-12)
    out = (at_hi - at_lo) / width
    return out.reshape(power.shape[:-1] + (np.size(lo_hz),))


def smoothed_response_db(
    irs: np.ndarray, fs: int, freq_hz: np.ndarray, fraction: int = EXTREMA_SMOOTHING
) -> np.ndarray:
    """Power response on ``freq_hz``, smoothed over 1/``fraction`` octave, in dB.

    The spectrum (zero-padded to at least 2 s) is smoothed onto the grid with
    :func:`roomcorr.analysis.smoothing.smooth_bins_to_grid`: the mean power
    over ``[f 2^(-1/(2 fraction)), f 2^(1/(2 fraction))]``, uniform on the
    log-frequency axis.

    Parameters
    ----------
    irs : ndarray, shape (..., n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
    fraction : int

    Returns
    -------
    ndarray, shape (..., n_freqs)
        ``10 log10`` of the smoothed ``|H(f)|^2`` (0 dB for a unit impulse).

    References
    ----------
    J. G. Tylka, B. B. Boren and E. Y. Choueiri, "A generalized method for
    fractional-octave smoothing of transfer functions that preserves log-frequency
    symmetry", JAES 65(3), 2017.
    """

    f_bins, power = _spectrum_power(irs, fs)
    p = smooth_bins_to_grid(power, f_bins, np.asarray(freq_hz, dtype=float), 1.0 / fraction)
    return 10.0 * np.log10(np.maximum(p, 1e-30))


def third_octave_centres_hz(f_lo_hz: float, f_hi_hz: float) -> np.ndarray:
    """IEC 61260-1 third-octave mid-band frequencies between the limits (inclusive).

    From :func:`roomcorr.analysis.bands.band_centres_hz` (base-ten
    ``f_m = 1000 G^(x/3)``, ``G = 10^(3/10)``), keeping the bands whose
    nominal frequency (20, 25, 31.5 ... Hz) lies in the range.

    References
    ----------
    IEC 61260-1:2014, Electroacoustics - Octave-band and fractional-octave-band
    filters - Part 1: Specifications, clause 5.
    """

    fc = np.asarray(band_centres_hz(3, f_lo_hz, f_hi_hz), dtype=float)
    nom = np.array([nominal_hz(f) for f in fc])
    return fc[(nom >= f_lo_hz) & (nom <= f_hi_hz)]


def band_levels_db(
    irs: np.ndarray, fs: int, centres_hz: np.ndarray, fraction: int = 3
) -> np.ndarray:
    """Energy in each fractional-octave band (IEC 61260-1 edges ``f_m G^(±1/(2b))``), dB.

    Parameters
    ----------
    irs : ndarray, shape (..., n_samples)
    fs : int
    centres_hz : ndarray, shape (n_bands,)
    fraction : int
        ``b`` of the 1/b-octave bands.

    Returns
    -------
    ndarray, shape (..., n_bands)
        Mean power in the band in dB (0 dB for a unit impulse).
    """
    g = 10.0**0.3
    c = np.asarray(centres_hz, dtype=float)
    f_bins, power = _spectrum_power(irs, fs)
    p = _band_mean_power(f_bins, power, c * g ** (-0.5 / fraction), c * g ** (0.5 / fraction))
    return 10.0 * np.log10(np.maximum(p, 1e-30))


def power_mean_db(levels_db: np.ndarray, axis: int = 0) -> np.ndarray:
    """Power average of dB values along ``axis``."""
    return 10.0 * np.log10(np.mean(10.0 ** (np.asarray(levels_db) / 10.0), axis=axis))


def band_mean_db(
    freq_hz: np.ndarray, response_db: np.ndarray, band_hz: tuple[float, float]
) -> np.ndarray:
    """Power mean of a log-grid response within ``band_hz`` (equal weight per grid point)."""
    m = (freq_hz >= band_hz[0]) & (freq_hz <= band_hz[1])
    return power_mean_db(np.asarray(response_db)[..., m], axis=-1)


@dataclass
class Extremum:
    """A peak or dip of a response relative to its 1-octave trend."""

    kind: str  # "peak" or "dip"
    freq_hz: float
    height_db: float  # deviation from the trend (positive for peaks, negative for dips)
    prominence_db: float


def find_extrema(
    freq_hz: np.ndarray,
    response_db: np.ndarray,
    range_hz: tuple[float, float] = EXTREMA_RANGE_HZ,
    min_prominence_db: float = EXTREMA_PROMINENCE_DB,
) -> list[Extremum]:
    """Peaks and dips of a log-grid response, relative to its 1-octave running mean.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
        Log-spaced grid (:func:`roomcorr.grid.log_grid`).
    response_db : ndarray, shape (n_freqs,)
    range_hz : (float, float)
    min_prominence_db : float
        Smallest prominence (``scipy.signal.find_peaks``) that counts.

    Returns
    -------
    list of Extremum, sorted by frequency.
    """


    f = np.asarray(freq_hz, dtype=float)
    y = np.asarray(response_db, dtype=float)
    ppo = points_per_octave_of(f)
    trend = uniform_filter1d(y, size=max(3, int(round(ppo)) | 1), mode="nearest")
    dev = y - trend
    inside = (f >= range_hz[0]) & (f <= range_hz[1])
    out: list[Extremum] = []
    for kind, sign in (("peak", 1.0), ("dip", -1.0)):
        idx, props = find_peaks(sign * dev, prominence=min_prominence_db)
        for i, prom in zip(idx, props["prominences"], strict=True):
            if inside[i]:
                fi = float(
                    2.0
                    ** np.interp(_parabolic_peak(sign * dev, int(i)), np.arange(f.size), np.log2(f))
                )
                out.append(Extremum(kind, fi, float(dev[i]), float(prom)))
    return sorted(out, key=lambda e: e.freq_hz)


def match_extrema(
    before: list[Extremum],
    after: list[Extremum],
    weak_before: list[Extremum] | None = None,
    weak_after: list[Extremum] | None = None,
) -> list[dict]:
    """Pair the peaks and dips of two responses and say what happened to each.

    Features of the same kind within :data:`MATCH_OCTAVES` are paired,
    closest first. Status: ``"appeared"`` (only after), ``"vanished"`` (only
    before), ``"moved"`` (frequency shifted by :data:`MOVED_OCTAVES` or more),
    ``"changed"`` (same frequency, height changed by :data:`CHANGED_DB` or
    more) or ``"unchanged"``.

    ``weak_before`` / ``weak_after`` (features found with a lower prominence
    threshold) give hysteresis: a feature just above the threshold on one side
    and just below it on the other is paired with its weak twin instead of
    being reported as appeared or vanished.

    Returns
    -------
    list of dict
        Keys ``kind, status, freq_before_hz, freq_after_hz, height_before_db,
        height_after_db, shift_octaves``; ``None`` where a side is missing.
        Sorted by frequency.
    """
    pool_a = list(before) + [e for e in (weak_before or []) if not _near(e, before)]
    pool_b = list(after) + [e for e in (weak_after or []) if not _near(e, after)]
    strong_a, strong_b = len(before), len(after)
    pairs: list[tuple[float, int, int]] = []
    for i, a in enumerate(pool_a):
        for j, b in enumerate(pool_b):
            if a.kind == b.kind and (i < strong_a or j < strong_b):
                d = abs(np.log2(b.freq_hz / a.freq_hz))
                if d <= MATCH_OCTAVES:
                    pairs.append((float(d), i, j))
    pairs.sort()
    used_a: set[int] = set()
    used_b: set[int] = set()
    rows: list[dict] = []
    for _, i, j in pairs:
        if i in used_a or j in used_b:
            continue
        used_a.add(i)
        used_b.add(j)
        a, b = pool_a[i], pool_b[j]
        shift = float(np.log2(b.freq_hz / a.freq_hz))
        if abs(shift) >= MOVED_OCTAVES:
            status = "moved"
        elif abs(b.height_db - a.height_db) >= CHANGED_DB:
            status = "changed"
        else:
            status = "unchanged"
        rows.append(_row(a.kind, status, a, b, shift))
    rows += [
        _row(a.kind, "vanished", a, None, None) for i, a in enumerate(before) if i not in used_a
    ]
    rows += [
        _row(b.kind, "appeared", None, b, None) for j, b in enumerate(after) if j not in used_b
    ]
    return sorted(rows, key=lambda r: r["freq_after_hz"] or r["freq_before_hz"])


def _near(e: Extremum, feats: list[Extremum], octaves: float = 1.0 / 96.0) -> bool:
    return any(f.kind == e.kind and abs(np.log2(f.freq_hz / e.freq_hz)) <= octaves for f in feats)


def _row(
    kind: str, status: str, a: Extremum | None, b: Extremum | None, shift: float | None
) -> dict:
    return {
        "kind": kind,
        "status": status,
        "freq_before_hz": None if a is None else round(a.freq_hz, 2),
        "freq_after_hz": None if b is None else round(b.freq_hz, 2),
        "height_before_db": None if a is None else round(a.height_db, 2),
        "height_after_db": None if b is None else round(b.height_db, 2),
        "shift_octaves": None if shift is None else round(shift, 4),
    }


def corrected_deviation_db(
    freq_hz: np.ndarray,
    response_db: np.ndarray,
    correction_db: np.ndarray,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
) -> tuple[float, float]:
    """Deviation of a corrected response from its target inside the band.

    ``d = response + correction - target``, made level-free by removing its
    mean over the band (playback volume is arbitrary).

    Parameters
    ----------
    freq_hz, response_db, correction_db, target_db : ndarray, shape (n_freqs,)
    band_hz : (float, float)

    Returns
    -------
    rms_db, max_abs_db : float
    """
    m = (freq_hz >= band_hz[0]) & (freq_hz <= band_hz[1])
    d = (np.asarray(response_db) + np.asarray(correction_db) - np.asarray(target_db))[m]
    d = d - d.mean()
    return float(np.sqrt(np.mean(d**2))), float(np.max(np.abs(d)))


def filter_fit(
    freq_hz: np.ndarray,
    new_response_db: np.ndarray,
    old_correction_db: np.ndarray,
    fresh_correction_db: np.ndarray,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
    tolerance_db: float = FIT_TOLERANCE_DB,
) -> dict:
    """Are the old filters still fit for the new measurement?

    Compares the corrected deviation (:func:`corrected_deviation_db`) of the
    new averaged response with the old correction against that with a fresh
    design's correction. The old filters are fit when their RMS deviation is
    at most ``tolerance_db`` worse and their largest deviation at most
    :data:`FIT_MAX_TOLERANCE_DB` worse.

    Returns
    -------
    dict
        ``old_rms_db, old_max_db, fresh_rms_db, fresh_max_db, still_fit,
        tolerance_db``.
    """
    o_rms, o_max = corrected_deviation_db(
        freq_hz, new_response_db, old_correction_db, target_db, band_hz
    )
    f_rms, f_max = corrected_deviation_db(
        freq_hz, new_response_db, fresh_correction_db, target_db, band_hz
    )
    return {
        "old_rms_db": round(o_rms, 2),
        "old_max_db": round(o_max, 2),
        "fresh_rms_db": round(f_rms, 2),
        "fresh_max_db": round(f_max, 2),
        "still_fit": bool(o_rms - f_rms <= tolerance_db and o_max - f_max <= FIT_MAX_TOLERANCE_DB),
        "tolerance_db": tolerance_db,
    }


def compare_sets(
    irs_a: np.ndarray,
    fs_a: int,
    irs_b: np.ndarray,
    fs_b: int,
    temperature_c: float = 20.0,
    channel_names: list[str] | None = None,
    with_curves: bool = False,
    origin: str = "absolute",
    reference_index: int | None = None,
) -> dict:
    """Compare two impulse-response sets of the same loudspeakers, channel by channel.

    Positions are paired by index when both sets have the same number and the
    same sample rate (arrival change by cross-correlation); otherwise the
    mean absolute arrivals are compared.

    When the arrivals do not share an absolute origin (``origin`` ``"reference"``
    or ``"unknown"``), a measured distance change is only relative to the
    origin's own move, so which loudspeaker moved is decided from evidence that
    does not depend on the origin: each loudspeaker's early reflections relative
    to its own direct sound (:func:`pattern_change`, :func:`attribute_move`).

    Parameters
    ----------
    irs_a, irs_b : ndarray, shape (n_positions, n_channels, n_samples)
        Before and after; the channel counts must agree.
    fs_a, fs_b : int
    temperature_c : float
        Air temperature for the speed of sound.
    channel_names : list of str, optional
    with_curves : bool
        Also return, per channel, ``curves = {freq_hz, before_db, after_db}``
        (position-averaged 1/24-octave responses, arrays) for plotting.
    origin : {"absolute", "reference", "unknown"}
        What the two runs' arrivals share
        (:func:`roomcorr.measure.timing.common_origin`).
    reference_index : int, optional
        With ``origin="reference"``: the channel of the reference loudspeaker.

    Returns
    -------
    dict
        ``temperature_c, speed_of_sound_m_s, paired_positions, lf_bands_hz,
        channels`` (one dict per channel with ``index, name,
        arrival_before_ms, arrival_after_ms, arrival_change_ms,
        distance_change_m, position_distance_change_m, polarity_inverted,
        level_change_db, direct_level_change_db, lf_band_change_db,
        extrema, relative_distance_change_m, reflections_changed``; with an origin
        that is not absolute, ``distance_change_m`` is the attributed change when the
        attribution is sure and None when it is not) and ``move`` (the
        :func:`attribute_move` result plus ``origin``; None for an absolute origin).
    """

    a = np.asarray(irs_a, dtype=float)
    b = np.asarray(irs_b, dtype=float)
    if a.ndim != 3 or b.ndim != 3:
        raise ValueError("irs must have shape (n_positions, n_channels, n_samples)")
    if a.shape[1] != b.shape[1]:
        raise ValueError(f"channel counts differ: {a.shape[1]} before, {b.shape[1]} after")
    c = speed_of_sound_m_s(temperature_c)
    paired = a.shape[0] == b.shape[0] and fs_a == fs_b
    grid = log_grid()
    centres = third_octave_centres_hz(*LF_BANDS_HZ)
    channels = []
    for ch in range(a.shape[1]):
        arr_a = np.array([direct_arrival_s(a[p, ch], fs_a) for p in range(a.shape[0])])
        arr_b = np.array([direct_arrival_s(b[p, ch], fs_b) for p in range(b.shape[0])])
        inverted = False
        pattern = None
        if paired:
            pcs = [pattern_change(a[p, ch], b[p, ch], fs_a) for p in range(a.shape[0])]
            ratio = float(np.median([x["ratio"] for x in pcs]))
            snr = float(np.median([x["snr_db"] for x in pcs]))
            prob = round(moved_probability(ratio), 3) if snr >= PATTERN_MIN_SNR_DB else None
            pattern = {"ratio": round(ratio, 3), "snr_db": round(snr, 1), "probability": prob}
            res = [arrival_change_s(a[p, ch], b[p, ch], fs_a) for p in range(a.shape[0])]
            per_pos = np.array([r[0] for r in res])
            inverted = sum(r[1] for r in res) > len(res) / 2
            change = float(np.mean(per_pos))
        else:
            per_pos = np.array([])
            change = float(arr_b.mean() - arr_a.mean())
        resp_a = power_mean_db(smoothed_response_db(a[:, ch], fs_a, grid), axis=0)
        resp_b = power_mean_db(smoothed_response_db(b[:, ch], fs_b, grid), axis=0)
        lvl = float(
            band_mean_db(grid, resp_b, LEVEL_BAND_HZ) - band_mean_db(grid, resp_a, LEVEL_BAND_HZ)
        )
        peak_a = power_mean_db(20 * np.log10(np.max(np.abs(a[:, ch]), axis=-1)), axis=0)
        peak_b = power_mean_db(20 * np.log10(np.max(np.abs(b[:, ch]), axis=-1)), axis=0)
        bands_a = power_mean_db(band_levels_db(a[:, ch], fs_a, centres), axis=0)
        bands_b = power_mean_db(band_levels_db(b[:, ch], fs_b, centres), axis=0)
        weak = EXTREMA_PROMINENCE_DB / 2
        extrema = match_extrema(
            find_extrema(grid, resp_a),
            find_extrema(grid, resp_b),
            find_extrema(grid, resp_a, min_prominence_db=weak),
            find_extrema(grid, resp_b, min_prominence_db=weak),
        )
        channels.append(
            {
                "index": ch,
                "name": channel_names[ch]
                if channel_names and ch < len(channel_names)
                else f"ch{ch + 1}",
                "arrival_before_ms": round(float(arr_a.mean()) * 1e3, 4),
                "arrival_after_ms": round(float(arr_b.mean()) * 1e3, 4),
                "arrival_change_ms": round(change * 1e3, 4),
                "distance_change_m": round(change * c, 4),
                "relative_distance_change_m": round(change * c, 4),
                "reflections_changed": pattern,
                "position_distance_change_m": [round(float(x) * c, 4) for x in per_pos],
                "polarity_inverted": bool(inverted),
                "level_change_db": round(lvl, 2),
                "direct_level_change_db": round(float(peak_b - peak_a), 2),
                "lf_band_change_db": [
                    {
                        "centre_hz": round(float(fc), 2),
                        "before_db": round(float(x), 2),
                        "after_db": round(float(y), 2),
                        "change_db": round(float(y - x), 2),
                    }
                    for fc, x, y in zip(centres, bands_a, bands_b, strict=True)
                ],
                "extrema": extrema,
            }
        )
        if with_curves:
            channels[-1]["curves"] = {"freq_hz": grid, "before_db": resp_a, "after_db": resp_b}
    move = None
    if origin != "absolute":
        names = [chn["name"] for chn in channels]
        probs = np.array(
            [
                np.nan
                if chn["reflections_changed"] is None
                or chn["reflections_changed"]["probability"] is None
                else chn["reflections_changed"]["probability"]
                for chn in channels
            ]
        )
        rel = np.array([chn["relative_distance_change_m"] for chn in channels])
        ref = reference_index if origin == "reference" else None
        move = attribute_move(rel, probs, ref, names)
        move["origin"] = origin
        if not paired:
            move["sentence"] += " (positions differ between the runs: reflections not compared)"
        for j, chn in enumerate(channels):
            best = move["readings"][0]["distance_change_m"][j]
            chn["distance_change_m"] = best if move["sure"] else None
    return {
        "temperature_c": temperature_c,
        "speed_of_sound_m_s": round(c, 3),
        "move": move,
        "paired_positions": paired,
        "lf_bands_hz": [round(float(x), 2) for x in centres],
        "channels": channels,
    }


# --------------------------------------------------------------------------- who moved
#: Early-reflection window after a loudspeaker's own direct sound (seconds): from just
#: after the direct sound to 15 ms, where floor, ceiling and the near walls arrive in a
#: domestic room (path-length differences of about 0.3 to 5 m).
PATTERN_START_S = 0.0006
PATTERN_END_S = 0.015
#: Band of the pattern comparison: reflection timing shows at mid and high frequencies.
PATTERN_BAND_HZ = (500.0, 16000.0)
#: Smallest decorrelation counted as a change whatever the noise (rule of our own:
#: 1e-3 is the decorrelation of a 0.5 % amplitude difference in the reflections).
PATTERN_FLOOR = 1e-3
#: Pattern-change ratio (decorrelation over its noise expectation) at which a move is as
#: likely as not, and the width of the logistic step (factors of ten) around it.
PATTERN_MID_RATIO = 10.0
PATTERN_STEP_DECADES = 0.25
#: Below this signal-to-noise ratio of the reflection window (dB) the pattern tells nothing.
PATTERN_MIN_SNR_DB = 20.0
#: A loudspeaker whose distance changed by less than this did not move (in distance).
MIN_MOVE_M = 0.01
#: Attribution is stated as sure at or above this confidence (rule of our own).
SURE_CONFIDENCE = 0.9
#: Prior odds of a loudspeaker moving between two runs (rule of our own: one move is
#: more likely than two); keeps the simplest reading when the evidence is even.
MOVE_PRIOR = 0.2


def _frac_shift(x: np.ndarray, shift_samples: float) -> np.ndarray:
    """``x`` delayed by ``shift_samples`` (band-limited, FFT phase, zero-padded)."""
    n = x.size
    n_fft = 1 << int(np.ceil(np.log2(2 * n)))
    f = np.fft.rfftfreq(n_fft)
    spec = np.fft.rfft(x, n_fft) * np.exp(-2j * np.pi * f * shift_samples)
    return np.fft.irfft(spec, n_fft)[:n]


def _band_spectrum(seg: np.ndarray, fs: int, n_fft: int) -> np.ndarray:
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    hi = min(PATTERN_BAND_HZ[1], 0.4 * fs)
    m = (f >= PATTERN_BAND_HZ[0]) & (f <= hi)
    return np.fft.rfft(seg, n_fft)[m]


def pattern_change(ir_a: np.ndarray, ir_b: np.ndarray, fs: int) -> dict:
    """How much a loudspeaker's early reflections changed relative to its own direct sound.

    Both responses are aligned on their own direct sounds (:func:`direct_arrival_s`,
    band-limited fractional shift), so the time origin of either run does not
    matter. Over the window :data:`PATTERN_START_S` to :data:`PATTERN_END_S` after the
    direct sound (Tukey-tapered), in the band :data:`PATTERN_BAND_HZ`, the normalised
    cross-spectrum gives the correlation ``rho`` of the two reflection patterns. A
    loudspeaker that moved changes the path-length differences between its direct
    sound and its images in floor, ceiling and walls (image-source method), which
    decorrelates the patterns; one that stayed keeps ``rho`` near 1 up to noise.

    The noise expectation of ``1 - rho`` for an unchanged pattern is
    ``(N_a / E_a + N_b / E_b) / 2`` (``E``: window energy in the band; ``N``: the
    same-length window's energy in the band taken from the last 20 % of the
    response, the noise floor).

    Parameters
    ----------
    ir_a, ir_b : ndarray, shape (n_samples,)
        One loudspeaker at one microphone position, before and after; same ``fs``.
    fs : int

    Returns
    -------
    dict
        ``decorrelation`` (``1 - rho``), ``noise`` (its expectation without a
        change, plus :data:`PATTERN_FLOOR`), ``ratio`` (the two divided) and
        ``snr_db`` (the window's energy in the band over the noise's, the worse run;
        below :data:`PATTERN_MIN_SNR_DB` the pattern is no evidence, e.g. a subwoofer
        with nothing above 500 Hz).

    References
    ----------
    J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
    small-room acoustics", JASA 65(4), 1979 (reflections as image sources whose
    delays follow the source position).
    """
    a = np.asarray(ir_a, dtype=float)
    b = np.asarray(ir_b, dtype=float)
    t_a = direct_arrival_s(a, fs)
    t_b = direct_arrival_s(b, fs)
    b = _frac_shift(b, (t_a - t_b) * fs)
    i0 = int(round(t_a * fs + PATTERN_START_S * fs))
    n = min(int(round((PATTERN_END_S - PATTERN_START_S) * fs)), a.size - i0, b.size - i0)
    if n < 16:  # the direct sound sits at the very end: no window to compare
        return {"decorrelation": 0.0, "noise": 1.0, "ratio": 0.0, "snr_db": -300.0}
    win = _tukey(n, 0.2)
    n_fft = 1 << int(np.ceil(np.log2(2 * n)))
    spec_a = _band_spectrum(a[i0 : i0 + n] * win, fs, n_fft)
    spec_b = _band_spectrum(b[i0 : i0 + n] * win, fs, n_fft)
    e_a = float(np.sum(np.abs(spec_a) ** 2))
    e_b = float(np.sum(np.abs(spec_b) ** 2))
    rho = float(np.real(np.sum(np.conj(spec_a) * spec_b)) / max(np.sqrt(e_a * e_b), 1e-300))
    noise = []
    for x, e in ((ir_a, e_a), (ir_b, e_b)):
        tail = np.asarray(x, dtype=float)[-max(n, int(0.2 * len(x))) :][-n:]
        noise.append(
            float(np.sum(np.abs(_band_spectrum(tail * win, fs, n_fft)) ** 2)) / max(e, 1e-300)
        )
    expect = 0.5 * (noise[0] + noise[1]) + PATTERN_FLOOR
    d = max(1.0 - rho, 0.0)
    snr = float(-10.0 * np.log10(max(noise[0], noise[1], 1e-30)))
    return {"decorrelation": d, "noise": expect, "ratio": d / expect, "snr_db": snr}


def moved_probability(ratio: float) -> float:
    """Probability that a loudspeaker moved, from its pattern-change ratio.

    A logistic step in ``log10(ratio)`` centred on :data:`PATTERN_MID_RATIO` with
    width :data:`PATTERN_STEP_DECADES`, kept within 0.01 to 0.99 (rule of our own,
    calibrated on the synthetic rooms of ``tests/move_rooms.py``).
    """
    z = (np.log10(max(ratio, 1e-12)) - np.log10(PATTERN_MID_RATIO)) / PATTERN_STEP_DECADES
    return float(np.clip(1.0 / (1.0 + np.exp(-z)), 0.01, 0.99))


def early_reflections_s(ir: np.ndarray, fs: int, n: int = 4) -> list[dict]:
    """The strongest early reflections, as delays after the response's own direct sound.

    Peaks of the band-limited-interpolated magnitude (:data:`XCORR_UPSAMPLE` times)
    between :data:`PATTERN_START_S` and :data:`PATTERN_END_S` after the direct sound,
    at least 0.3 ms apart, strongest first, each refined with a parabola.

    Returns
    -------
    list of dict
        ``delay_s`` (after the direct sound), ``level_db`` (relative to it).
    """
    x = np.asarray(ir, dtype=float)
    t0 = direct_arrival_s(x, fs)
    lo = int(np.floor(t0 * fs + PATTERN_START_S * fs))
    hi = min(x.size, int(np.ceil(t0 * fs + PATTERN_END_S * fs)))
    up = np.abs(_upsample(x[lo:hi], XCORR_UPSAMPLE))
    direct = float(np.max(np.abs(x))) or 1.0
    gap = int(0.0003 * fs * XCORR_UPSAMPLE)
    out: list[dict] = []
    work = up.copy()
    while len(out) < n and work.size and work.max() > 0:
        i = int(np.argmax(work))
        t = (lo + _parabolic_peak(up, i) / XCORR_UPSAMPLE) / fs
        out.append({"delay_s": t - t0, "level_db": float(20 * np.log10(up[i] / direct))})
        work[max(0, i - gap) : i + gap + 1] = 0.0
    return out


def attribute_move(
    relative_change_m: np.ndarray,
    moved_prob: np.ndarray,
    reference_index: int | None,
    names: list[str],
    min_move_m: float = MIN_MOVE_M,
) -> dict:
    """Which loudspeaker moved, when arrivals rest on a reference that may have moved.

    The arrivals of each run share an origin tied to one loudspeaker (the reference)
    or an unknown one, so the measured change of channel ``j`` is
    ``r_j = d_j - u`` with ``d_j`` its true distance change and ``u`` the origin's
    (the reference loudspeaker's own) change. Every reading ``u`` in
    ``{0} + {r_j}`` (one loudspeaker taken as unmoved) gives distance changes
    ``d = r - u``; each is scored with the origin-independent evidence
    ``moved_prob`` (from :func:`pattern_change`): ``prod p_j`` over the channels it
    says moved times ``prod (1 - p_j)`` over those it says stayed, times
    :data:`MOVE_PRIOR` per moved loudspeaker. The confidence is the best reading's
    share of the total.

    Parameters
    ----------
    relative_change_m : ndarray, shape (n_channels,)
        Measured distance changes (arrival change times the speed of sound).
    moved_prob : ndarray, shape (n_channels,)
        Probability from the reflection pattern that each loudspeaker moved; NaN
        where unknown (then 0.5).
    reference_index : int or None
        Channel of the reference loudspeaker (its ``r`` is 0 by construction); None
        when the origin is not one of the measured loudspeakers (unknown basis).
    names : list of str

    Returns
    -------
    dict
        ``sure``, ``confidence``, ``readings`` (best first: ``distance_change_m``
        per channel, ``moved`` names, ``likelihood``, ``sentence``) and
        ``sentence`` (plain words, both readings when unsure).
    """
    r = np.asarray(relative_change_m, dtype=float)
    p = np.where(np.isfinite(moved_prob), np.asarray(moved_prob, dtype=float), 0.5)
    cands = [0.0]
    for x in r:
        if all(abs(x - c) >= min_move_m for c in cands):
            cands.append(float(x))
    readings = []
    for u in cands:
        d = r - u
        moved = np.abs(d) >= min_move_m
        lik = float(np.prod(np.where(moved, p, 1.0 - p)) * MOVE_PRIOR ** int(moved.sum()))
        if reference_index is None and abs(u) >= min_move_m:
            lik *= MOVE_PRIOR  # the (unmeasured) origin moved as well
        readings.append({"u": u, "d": d, "moved": moved, "likelihood": lik})
    total = sum(x["likelihood"] for x in readings) or 1.0
    readings.sort(key=lambda x: -x["likelihood"])
    out_readings = []
    for x in readings:
        movers = [names[j] for j in np.flatnonzero(x["moved"])]
        out_readings.append(
            {
                "distance_change_m": [round(float(v), 4) for v in x["d"]],
                "moved": movers,
                "likelihood": round(x["likelihood"] / total, 4),
                "sentence": _reading_sentence(x["d"], x["moved"], names),
            }
        )
    conf = out_readings[0]["likelihood"]
    sure = conf >= SURE_CONFIDENCE
    if len(out_readings) == 1:
        sure, conf = True, 1.0
        out_readings[0]["likelihood"] = 1.0
    if sure:
        sentence = f"{out_readings[0]['sentence']} (confidence {conf:.0%})"
    else:
        alt = out_readings[1]["sentence"]
        sentence = (
            f"unsure which loudspeaker moved: either {out_readings[0]['sentence']} or "
            f"{alt} (the timing rests on one loudspeaker's arrival and the reflections "
            f"do not decide it; confidence {conf:.0%})"
        )
        if np.all(p < 0.5) and np.any(np.abs(r) >= min_move_m):
            sentence += (
                "; the reflections of no loudspeaker changed, so the arrival change may be a "
                "changed delay in the signal path (latency, a processor's delay) rather than a move"
            )
    return {
        "sure": bool(sure),
        "confidence": round(float(conf), 3),
        "readings": out_readings,
        "sentence": sentence,
    }


def _reading_sentence(d: np.ndarray, moved: np.ndarray, names: list[str]) -> str:
    parts = []
    for j in np.flatnonzero(moved):
        v = float(d[j])
        parts.append(f"the {names[j]} moved {abs(v):.2f} m {'away' if v > 0 else 'closer'}")
    if not parts:
        return "no loudspeaker moved (in distance)"
    return " and ".join(parts)


# --------------------------------------------------------------------------- what the filters carry
#: Relative arrival between main loudspeakers that the old alignment may be off by and stay
#: fit (rule of our own): 0.05 ms is 18 degrees at 1 kHz, where two equal loudspeakers lose
#: 20 log10(cos(9 deg)) = 0.11 dB in their sum (analytic: |1 + e^(j phi)| = 2 cos(phi / 2)).
ALIGN_TOLERANCE_MS = 0.05
#: Frequency at which the alignment tolerance of main loudspeakers is stated as a phase.
ALIGN_PHASE_HZ = 1000.0
#: Phase error at the crossover that a subwoofer's old delay may leave (rule of our own:
#: 20 degrees costs the Linkwitz-Riley sum 0.13 dB there, as above).
XO_PHASE_TOLERANCE_DEG = 20.0
#: Relative level between loudspeakers the old trims may be off by (rule of our own: half
#: of 0.5 dB, about the smallest level difference listeners notice in an A/B, common practice).
TRIM_TOLERANCE_DB = 0.25
#: The crossover frequency a fresh design picks may move this much (octaves) before the old
#: crossover counts as stale (rule of our own: a sixth of an octave).
XO_TOLERANCE_OCT = 1.0 / 6.0
#: A relative level change between loudspeakers above this suggests a fault (a loose cable, a
#: changed amplifier setting) rather than a move: measure again first (rule of our own).
REMEASURE_LEVEL_DB = 6.0


def phase_deg(delay_ms: float, freq_hz: float) -> float:
    """Phase in degrees that a delay causes at a frequency: ``360 f tau`` (analytic)."""
    return 360.0 * freq_hz * delay_ms * 1e-3


def system_fit(
    old_outputs: list[dict],
    new_outputs: list[dict],
    old_crossover: dict | None,
    new_crossover: dict | None,
    polarity_flipped: list[bool],
) -> dict:
    """Do the old design's delays, trims, polarities and crossover still fit?

    The old design's per-output ``delay_ms``, ``gain_db`` and ``polarity`` (its
    manifest's ``outputs``) are set against those a fresh design from the new
    measurement chose. Only relative changes matter (a common delay or volume does
    not), so each change is taken against the smallest one. Main loudspeakers must
    agree within :data:`ALIGN_TOLERANCE_MS` (stated also as the phase error at
    :data:`ALIGN_PHASE_HZ`), a subwoofer within :data:`XO_PHASE_TOLERANCE_DEG` at
    the crossover; trims within :data:`TRIM_TOLERANCE_DB`; polarity must not have
    flipped (``polarity_flipped``: from the arrival cross-correlation, or the
    designs' polarity choices differing); the crossover frequency within
    :data:`XO_TOLERANCE_OCT`.

    Parameters
    ----------
    old_outputs, new_outputs : list of dict
        Same channels in the same order (keys ``name, role, delay_ms, gain_db,
        polarity``).
    old_crossover, new_crossover : dict or None
        The manifests' ``system.crossover`` (``frequency_hz``, ...) with a subwoofer.
    polarity_flipped : list of bool, one per channel

    Returns
    -------
    dict
        ``channels`` (per channel ``name, delay_change_ms, trim_change_db,
        phase_error_deg, phase_at_hz, polarity_flipped``), ``alignment_ok``,
        ``trims_ok``, ``polarity_ok``, ``crossover_ok``, ``reasons`` (plain words
        for what no longer fits) and the tolerances used.
    """
    n = len(old_outputs)
    d = np.array(
        [
            float(nw["delay_ms"]) - float(od["delay_ms"])
            for od, nw in zip(old_outputs, new_outputs, strict=True)
        ]
    )
    g = np.array(
        [
            float(nw["gain_db"]) - float(od["gain_db"])
            for od, nw in zip(old_outputs, new_outputs, strict=True)
        ]
    )
    mains = [j for j in range(n) if old_outputs[j].get("role") != "sub"]
    base = mains or list(range(n))
    d = d - float(np.min(d[base]))
    g = g - float(np.median(g[base])) if len(base) > 2 else g - float(np.max(g[base]))
    fc = float(old_crossover["frequency_hz"]) if old_crossover else None
    chans = []
    reasons: list[str] = []
    align_ok = trims_ok = pol_ok = True
    for j in range(n):
        name = str(old_outputs[j].get("name", f"ch{j + 1}"))
        is_sub = old_outputs[j].get("role") == "sub" and fc is not None
        at_hz = fc if is_sub else ALIGN_PHASE_HZ
        if is_sub:  # the subwoofer against the mains' mean change
            dj = float(d[j] - np.mean(d[mains])) if mains else float(d[j])
        else:
            dj = float(d[j])
        ph = phase_deg(dj, at_hz)
        flipped = bool(polarity_flipped[j]) or int(old_outputs[j].get("polarity", 1)) != int(
            new_outputs[j].get("polarity", 1)
        )
        ok_t = abs(ph) <= XO_PHASE_TOLERANCE_DEG if is_sub else abs(dj) <= ALIGN_TOLERANCE_MS
        if not ok_t:
            align_ok = False
            reasons.append(
                f"delay of {name} off by {dj:+.3f} ms against the old alignment "
                f"({ph:+.0f} degrees at {at_hz:.0f} Hz)"
            )
        if abs(g[j]) > TRIM_TOLERANCE_DB:
            trims_ok = False
            reasons.append(f"level of {name} off by {g[j]:+.2f} dB against the old trims")
        if flipped:
            pol_ok = False
            reasons.append(f"polarity of {name} inverted since the design's measurement")
        chans.append(
            {
                "name": name,
                "delay_change_ms": round(dj, 4),
                "phase_error_deg": round(ph, 1),
                "phase_at_hz": round(at_hz, 1),
                "trim_change_db": round(float(g[j]), 2),
                "polarity_flipped": flipped,
            }
        )
    xo_ok = True
    if old_crossover and new_crossover:
        shift = float(
            np.log2(float(new_crossover["frequency_hz"]) / float(old_crossover["frequency_hz"]))
        )
        if abs(shift) > XO_TOLERANCE_OCT:
            xo_ok = False
            reasons.append(
                f"crossover {float(old_crossover['frequency_hz']):.0f} Hz; a fresh design "
                f"picks {float(new_crossover['frequency_hz']):.0f} Hz"
            )
    return {
        "channels": chans,
        "alignment_ok": align_ok,
        "trims_ok": trims_ok,
        "polarity_ok": pol_ok,
        "crossover_ok": xo_ok,
        "reasons": reasons,
        "align_tolerance_ms": ALIGN_TOLERANCE_MS,
        "align_tolerance_deg": round(phase_deg(ALIGN_TOLERANCE_MS, ALIGN_PHASE_HZ), 1),
        "align_phase_hz": ALIGN_PHASE_HZ,
        "crossover_phase_tolerance_deg": XO_PHASE_TOLERANCE_DEG,
        "trim_tolerance_db": TRIM_TOLERANCE_DB,
    }


def fit_verdict(
    magnitude: list[dict],
    system: dict | None,
    level_change_db: list[float],
    gates_failed: list[str],
) -> dict:
    """Keep, re-design or re-measure first, with the reasons in plain words.

    ``"re-measure first"`` when the new measurement failed quality gates or the
    loudspeakers' levels changed against each other by more than
    :data:`REMEASURE_LEVEL_DB` (a fault is likelier than a move); else
    ``"re-design"`` when any channel's magnitude (:func:`filter_fit`) or anything
    :func:`system_fit` checks no longer fits; else ``"keep"``.

    Parameters
    ----------
    magnitude : list of dict
        :func:`filter_fit` results, with ``name``.
    system : dict or None
        :func:`system_fit` result (None for a single channel).
    level_change_db : list of float
        Broadband level change per channel between the runs.
    gates_failed : list of str
        Quality gates the new measurement failed.

    Returns
    -------
    dict
        ``verdict``, ``reasons``, ``still_fit`` (verdict is keep).
    """
    reasons: list[str] = []
    lv = np.asarray(level_change_db, dtype=float)
    if gates_failed:
        reasons.append("the new measurement failed quality checks: " + ", ".join(gates_failed))
    if lv.size > 1 and float(lv.max() - lv.min()) > REMEASURE_LEVEL_DB:
        reasons.append(
            f"the loudspeakers' levels changed against each other by "
            f"{float(lv.max() - lv.min()):.1f} dB: check cables and amplifier settings"
        )
    if reasons:
        return {"verdict": "re-measure first", "reasons": reasons, "still_fit": False}
    for m in magnitude:
        if not m["still_fit"]:
            reasons.append(
                f"response of {m['name']}: the old filters leave {m['old_rms_db']:.2f} dB RMS "
                f"from the target, a fresh design {m['fresh_rms_db']:.2f} dB"
            )
    if system is not None:
        reasons += system["reasons"]
    verdict = "re-design" if reasons else "keep"
    return {"verdict": verdict, "reasons": reasons, "still_fit": verdict == "keep"}
