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
    from roomcorr.analysis.onset import find_onset

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
    from roomcorr.analysis.smoothing import smooth_bins_to_grid

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
    from roomcorr.analysis.bands import band_centres_hz, nominal_hz

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
    from scipy.ndimage import uniform_filter1d
    from scipy.signal import find_peaks

    from roomcorr.grid import points_per_octave_of

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
) -> dict:
    """Compare two impulse-response sets of the same loudspeakers, channel by channel.

    Positions are paired by index when both sets have the same number and the
    same sample rate (arrival change by cross-correlation); otherwise the
    mean absolute arrivals are compared.

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

    Returns
    -------
    dict
        ``temperature_c, speed_of_sound_m_s, paired_positions, lf_bands_hz,
        channels`` (one dict per channel with ``index, name,
        arrival_before_ms, arrival_after_ms, arrival_change_ms,
        distance_change_m, position_distance_change_m, polarity_inverted,
        level_change_db, direct_level_change_db, lf_band_change_db,
        extrema``).
    """
    from roomcorr.grid import log_grid

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
        if paired:
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
    return {
        "temperature_c": temperature_c,
        "speed_of_sound_m_s": round(c, 3),
        "paired_positions": paired,
        "lf_bands_hz": [round(float(x), 2) for x in centres],
        "channels": channels,
    }
