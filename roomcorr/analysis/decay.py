"""Room decay: Schroeder curves, EDT/T20/T30 in octave bands, and a low-frequency decay map.

Everything here is a pure function on numpy arrays. The main entry point is
:func:`octave_band_decay`, which filters an impulse response into octave bands
(63 Hz to 8 kHz), integrates each band backwards with a noise-floor
compensation and evaluates EDT, T20 and T30 by linear regression over the
ISO 3382-1 ranges. :func:`low_frequency_decay_map` gives a time-frequency view
of the first few hundred milliseconds below 300 Hz, where room modes ring.

Noise-floor compensation (what :func:`schroeder_decay` does)
-------------------------------------------------------------
A measured impulse response ends in background noise. Integrating the noise
along with the decay bends the Schroeder curve up and lengthens T30. We follow
the iterative idea of Lundeby et al. (1995), simplified:

1. Estimate the noise power from the last 10 % of the response.
2. Average the squared response in 10 ms blocks and fit a straight line (in dB)
   from the peak down to 10 dB above the noise.
3. The *truncation point* is where that line meets the noise level. The noise
   is re-estimated from the part of the response that lies a further 10 dB of
   decay beyond the truncation point (or the last 10 %, whichever is longer),
   and steps 2 and 3 are repeated until the truncation point settles.
4. The decay curve is ``EDC(t) = sum_{t}^{t_c} (h^2 - noise) + C``: the
   estimated noise power is subtracted, integration stops at the truncation
   point ``t_c``, and ``C`` adds back the energy the fitted exponential would
   still have had after ``t_c``. Beyond ``t_c`` the curve is NaN.

References
----------
.. [1] M. R. Schroeder, "New method of measuring reverberation time",
   J. Acoust. Soc. Am. 37, 409-412, 1965.
.. [2] A. Lundeby, T. E. Vigran, H. Bietz, M. Vorlaender, "Uncertainties of
   measurements in room acoustics", Acustica 81, 344-355, 1995.
.. [3] ISO 3382-1:2009, Acoustics - Measurement of room acoustic parameters -
   Part 1: Performance spaces (EDT 0 to -10 dB, T20 -5 to -25 dB,
   T30 -5 to -35 dB, each extrapolated to 60 dB).
.. [4] IEC 61260-1:2014, Electroacoustics - Octave-band and fractional-octave-band
   filters - Part 1: Specifications (base-10 mid-band frequencies).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

#: ISO 3382-1 evaluation ranges in dB below the start of the decay curve.
RANGES_DB: dict[str, tuple[float, float]] = {
    "edt": (0.0, -10.0),
    "t20": (-5.0, -25.0),
    "t30": (-5.0, -35.0),
}

#: The noise floor must sit this far below the end of an evaluation range
#: (ISO 3382-1, from memory) for the value to count as valid.
NOISE_MARGIN_DB = 10.0

_G = 10.0 ** (3.0 / 10.0)  # IEC 61260-1 octave ratio, base 10

#: A band filter rings for a while of its own: where the product of its bandwidth and
#: the decay time is below this, the band's decay is partly the filter's and unreliable
#: (Jacobsen 1987, from memory; our analytic check, tests/test_explore.py: a pure
#: exponential with T = 0.3 s is off by 30 % in the 63 Hz third-octave band, B T = 4.4,
#: and within 1 % (T20, T30) and 5 % (EDT) wherever B T >= 16).
MIN_BANDWIDTH_TIME = 16.0


def octave_band_centres(f_lo_hz: float = 63.0, f_hi_hz: float = 8000.0) -> np.ndarray:
    """Exact octave mid-band frequencies between two nominal frequencies.

    Parameters
    ----------
    f_lo_hz, f_hi_hz : float
        Nominal first and last band (e.g. 63 and 8000); bands whose exact
        mid-band frequency lies within a third of an octave of the span are kept.

    Returns
    -------
    centres_hz : ndarray, shape (n_bands,)
        ``1000 * G ** x`` with ``G = 10 ** (3 / 10)`` (IEC 61260-1, odd bandwidth
        designator b = 1).
    """
    try:  # a shared bands module, when the project has one, is the single source
        from roomcorr.analysis import bands  # type: ignore[attr-defined]

        fn = getattr(bands, "octave_centres_hz", None)
        if callable(fn):
            return np.asarray(fn(f_lo_hz, f_hi_hz), dtype=float)
    except ImportError:
        pass
    x = np.arange(-6, 5)
    fm = 1000.0 * _G**x
    tol = 2.0 ** (1.0 / 3.0)
    keep = (fm >= f_lo_hz / tol) & (fm <= f_hi_hz * tol)
    return fm[keep]


def nominal_label(centre_hz: float) -> str:
    """Short nominal label of an octave band, e.g. ``"63"``, ``"1k"``, ``"8k"``."""
    try:  # the shared bands module, when present, is the single source
        from roomcorr.analysis import bands  # type: ignore[attr-defined]

        return str(bands.nominal_label(centre_hz))
    except (ImportError, AttributeError, ValueError):
        pass
    nominal = [31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000, 16000]
    n = min(nominal, key=lambda v: abs(np.log2(v / centre_hz)))
    if n >= 1000:
        return f"{n / 1000:g}k"
    return f"{n:g}"


def octave_band_sos(centre_hz: float, fs: float, order: int = 3) -> np.ndarray:
    """Butterworth band-pass for one octave band: :func:`band_sos` with ``fraction=1``.

    Returns
    -------
    sos : ndarray, shape (order, 6)
        Edges at ``centre_hz * G ** (+-1/2)`` (IEC 61260-1), -3 dB there.
    """
    return band_sos(centre_hz, fs, 1, order)


@dataclass
class SchroederCurve:
    """A backward-integrated energy decay curve and how it was obtained.

    Attributes
    ----------
    time_s : ndarray, shape (n,)
        Time from the decay start.
    edc_db : ndarray, shape (n,)
        Decay curve, 0 dB at the start; NaN after the truncation point.
    noise_db : float
        Noise power per sample, dB relative to the peak of the 10 ms envelope.
    truncation_s : float
        Where integration stopped (end of response when not compensated).
    start_index : int
        Sample of the original response where the curve starts.
    """

    time_s: np.ndarray
    edc_db: np.ndarray
    noise_db: float
    truncation_s: float
    start_index: int

    @property
    def dynamic_range_db(self) -> float:
        """Peak-to-noise ratio of the response in dB (positive)."""
        return -self.noise_db


def _block_envelope(e: np.ndarray, block: int) -> tuple[np.ndarray, np.ndarray]:
    n_blocks = len(e) // block
    if n_blocks < 2:
        raise ValueError("impulse response too short for decay analysis")
    levels = e[: n_blocks * block].reshape(n_blocks, block).mean(axis=1)
    centres = (np.arange(n_blocks) + 0.5) * block
    return centres, levels


def _decay_start(e: np.ndarray) -> int:
    """First sample within 20 dB of the maximum (ISO 3382-1 A.3.4 idea, from memory)."""
    peak = float(e.max())
    return int(np.argmax(e >= peak * 1e-2))


def schroeder_decay(
    ir: np.ndarray, fs: float, compensate: bool = True, block_s: float = 0.01
) -> SchroederCurve:
    """Schroeder backward integration, optionally with noise-floor compensation.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
        One (band-filtered) impulse response.
    fs : float
        Sample rate in Hz.
    compensate : bool
        If True, subtract the estimated noise and truncate as described in the
        module docstring; if False, integrate the whole response as it is.
    block_s : float
        Block length of the energy envelope used for the noise and slope estimates.

    Returns
    -------
    SchroederCurve

    References
    ----------
    Schroeder (1965); Lundeby et al. (1995); see the module docstring.
    """
    ir = np.asarray(ir, dtype=float)
    e_full = ir**2
    if not np.any(e_full > 0):
        raise ValueError("impulse response is all zeros")
    start = _decay_start(e_full)
    e = e_full[start:]
    n = len(e)
    block = max(1, int(round(block_s * fs)))
    centres, levels = _block_envelope(e, block)
    peak_power = float(levels.max())
    tail = max(block, n // 10)
    noise = float(e[-tail:].mean())

    t_c = n
    tail_energy = 0.0
    if compensate:
        lv_db = 10.0 * np.log10(np.maximum(levels, 1e-300) / peak_power)
        i_peak = int(np.argmax(levels))
        t_prev = -1.0
        for _ in range(8):
            noise_db = 10.0 * np.log10(max(noise, 1e-300) / peak_power)
            below = np.nonzero(lv_db[i_peak:] < noise_db + 10.0)[0]
            i_end = i_peak + (int(below[0]) if below.size else len(lv_db) - i_peak)
            if i_end - i_peak < 2:
                i_end = min(len(lv_db), i_peak + 2)
            slope, icpt = np.polyfit(centres[i_peak:i_end], lv_db[i_peak:i_end], 1)
            if slope >= 0:  # no decay visible: integrate everything
                t_c, tail_energy = n, 0.0
                break
            t_c = int(np.clip((noise_db - icpt) / slope, block, n))
            # energy of the fitted exponential after t_c: p(t_c) * 10 / (|slope| ln 10)
            p_tc = peak_power * 10.0 ** ((icpt + slope * t_c) / 10.0)
            tail_energy = p_tc * 10.0 / (-slope * np.log(10.0))
            # re-estimate the noise 10 dB of decay beyond t_c, at least the last 10 %
            i_noise = min(int(t_c + 10.0 / -slope), n - tail)
            noise = float(e[i_noise:].mean())
            if abs(t_c - t_prev) < 1e-3 * fs:
                break
            t_prev = t_c
        seg = e[:t_c] - noise
        edc = np.cumsum(seg[::-1])[::-1] + tail_energy
        edc = np.maximum(edc, edc[0] * 1e-30) if edc[0] > 0 else np.abs(edc) + 1e-300
        edc_full = np.full(n, np.nan)
        edc_full[:t_c] = edc
    else:
        edc_full = np.cumsum(e[::-1])[::-1]
    edc_db = 10.0 * np.log10(edc_full / edc_full[0])
    noise_db = 10.0 * np.log10(max(noise, 1e-300) / peak_power)
    return SchroederCurve(
        time_s=np.arange(n) / fs,
        edc_db=edc_db,
        noise_db=float(noise_db),
        truncation_s=t_c / fs,
        start_index=start,
    )


def decay_time(
    time_s: np.ndarray, edc_db: np.ndarray, start_db: float, end_db: float
) -> float:
    """Decay time from a straight-line fit over one evaluation range, extrapolated to 60 dB.

    Parameters
    ----------
    time_s, edc_db : ndarray, shape (n,)
        A decay curve (0 dB at its start; NaN where undefined).
    start_db, end_db : float
        Range, e.g. -5 and -25 for T20 (ISO 3382-1).

    Returns
    -------
    float
        ``-60 / slope`` in seconds; NaN if the curve never reaches ``end_db``.
    """
    valid = np.isfinite(edc_db)
    below_start = np.nonzero(valid & (edc_db <= start_db))[0]
    below_end = np.nonzero(valid & (edc_db <= end_db))[0]
    if below_start.size == 0 or below_end.size == 0:
        return float("nan")
    i0 = int(below_start[0]) if start_db < 0 else 0
    i1 = int(below_end[0])
    if i1 - i0 < 2:
        return float("nan")
    sel = slice(i0, i1 + 1)
    slope = np.polyfit(time_s[sel], edc_db[sel], 1)[0]
    if slope >= 0:
        return float("nan")
    return float(-60.0 / slope)


@dataclass
class BandDecay:
    """Decay parameters of one octave band.

    Attributes
    ----------
    centre_hz : float
        Exact mid-band frequency (``label`` gives the nominal one).
    edt_s, t20_s, t30_s : float
        ISO 3382-1 parameters in seconds (NaN if the range was not reached).
    valid : dict
        ``{"edt": bool, "t20": bool, "t30": bool}``: the noise floor lies at least
        :data:`NOISE_MARGIN_DB` below the end of the range.
    curve : SchroederCurve
        The compensated decay curve the values come from.
    """

    centre_hz: float
    label: str
    edt_s: float
    t20_s: float
    t30_s: float
    valid: dict[str, bool] = field(default_factory=dict)
    curve: SchroederCurve | None = None

    @property
    def dynamic_range_db(self) -> float:
        return self.curve.dynamic_range_db if self.curve is not None else float("nan")


def decay_parameters(curve: SchroederCurve) -> tuple[dict[str, float], dict[str, bool]]:
    """EDT, T20 and T30 of one decay curve, with the noise-floor check.

    Returns
    -------
    values : dict
        ``{"edt": s, "t20": s, "t30": s}``.
    valid : dict
        Whether the peak-to-noise ratio covers the range end plus the margin.
    """
    values = {}
    valid = {}
    for name, (a, b) in RANGES_DB.items():
        values[name] = decay_time(curve.time_s, curve.edc_db, a, b)
        valid[name] = bool(
            np.isfinite(values[name]) and curve.dynamic_range_db >= -b + NOISE_MARGIN_DB
        )
    return values, valid


def band_sos(centre_hz: float, fs: float, fraction: int = 1, order: int = 3) -> np.ndarray:
    """Butterworth band-pass for one 1/``fraction``-octave band, as second-order sections.

    Parameters
    ----------
    centre_hz : float
        Exact mid-band frequency.
    fs : float
        Sample rate in Hz.
    fraction : int
        Bandwidth designator b (1 octave, 3 third-octave).
    order : int
        Butterworth prototype order (the band-pass has twice this order).

    Returns
    -------
    sos : ndarray, shape (order, 6)
        Edges at ``centre_hz * G ** (+-1 / (2 b))`` (IEC 61260-1), -3 dB there.
    """
    return _band_sos(float(centre_hz), float(fs), int(fraction), int(order)).copy()  # cached


@functools.lru_cache(maxsize=256)
def _band_sos(centre_hz: float, fs: float, fraction: int, order: int) -> np.ndarray:
    """:func:`band_sos`, designed once per band and rate (every position uses the same)."""
    from scipy.signal import butter

    lo = centre_hz * _G ** (-0.5 / fraction)
    hi = centre_hz * _G ** (0.5 / fraction)
    if hi >= 0.49 * fs:
        raise ValueError(f"band {centre_hz:.0f} Hz does not fit below Nyquist at fs={fs}")
    return butter(order, [lo, hi], btype="bandpass", fs=fs, output="sos")


def band_decay(
    ir: np.ndarray,
    fs: float,
    fraction: int = 1,
    f_lo_hz: float = 63.0,
    f_hi_hz: float = 8000.0,
    compensate: bool = True,
) -> list[BandDecay]:
    """EDT, T20 and T30 per octave (``fraction=1``) or third-octave (``3``) band.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
        Room impulse response (direct sound anywhere near the start).
    fs : float
        Sample rate in Hz.
    fraction : int
        1 for octave bands, 3 for third-octave bands.
    f_lo_hz, f_hi_hz : float
        Nominal first and last band (bands that do not fit below Nyquist are skipped).
    compensate : bool
        Noise-floor compensation in the backward integration.

    Returns
    -------
    list of BandDecay, one per band from low to high.

    References
    ----------
    ISO 3382-1 (ranges; octave or one-third-octave bands); IEC 61260-1 (band
    centres and edges); Schroeder (1965); Lundeby et al. (1995).
    """
    from scipy.signal import sosfilt

    from roomcorr.analysis.bands import band_centres_hz

    if fraction not in (1, 3):
        raise ValueError(f"fraction must be 1 (octave) or 3 (third-octave), not {fraction!r}")
    ir = np.asarray(ir, dtype=float)
    centres = (
        octave_band_centres(f_lo_hz, f_hi_hz)
        if fraction == 1
        else band_centres_hz(3, f_lo_hz, f_hi_hz)
    )
    out = []
    for fc in centres:
        if fc * _G ** (0.5 / fraction) >= 0.49 * fs:
            continue
        band = sosfilt(band_sos(fc, fs, fraction), ir)
        curve = schroeder_decay(band, fs, compensate=compensate)
        values, valid = decay_parameters(curve)
        out.append(
            BandDecay(
                centre_hz=float(fc),
                label=nominal_label(fc),
                edt_s=values["edt"],
                t20_s=values["t20"],
                t30_s=values["t30"],
                valid=valid,
                curve=curve,
            )
        )
    return out


def octave_band_decay(
    ir: np.ndarray,
    fs: float,
    f_lo_hz: float = 63.0,
    f_hi_hz: float = 8000.0,
    compensate: bool = True,
) -> list[BandDecay]:
    """EDT, T20 and T30 per octave band of one impulse response.

    :func:`band_decay` with ``fraction=1`` (the report's bands); parameters,
    result and references as there.
    """
    return band_decay(ir, fs, 1, f_lo_hz, f_hi_hz, compensate)


def band_width_hz(centre_hz: float | np.ndarray, fraction: int = 1) -> float | np.ndarray:
    """Bandwidth of a 1/``fraction``-octave band: ``f_m * (G ** (1/2b) - G ** (-1/2b))``.

    References
    ----------
    IEC 61260-1:2014, band edges (equations (4) and (5)).
    """
    half = _G ** (0.5 / fraction)
    return np.asarray(centre_hz, dtype=float) * (half - 1.0 / half)


def filter_limited(centre_hz: float, fraction: int, decay_s: float) -> bool:
    """Whether a band's decay time is too short for its filter (bandwidth x time < 16).

    Parameters
    ----------
    centre_hz : float
        Mid-band frequency.
    fraction : int
        1 octave, 3 third-octave.
    decay_s : float
        A decay time of that band (NaN gives False: nothing to judge).

    References
    ----------
    F. Jacobsen, "A note on acoustic decay measurements", J. Sound Vib. 115, 163-170,
    1987 (B T > 16, from memory); see :data:`MIN_BANDWIDTH_TIME`.
    """
    if not np.isfinite(decay_s):
        return False
    return bool(float(band_width_hz(centre_hz, fraction)) * decay_s < MIN_BANDWIDTH_TIME)


def mean_band_decay(per_position: list[list[BandDecay]]) -> list[BandDecay]:
    """Band values averaged over positions (the report's and the app's combined view).

    Parameters
    ----------
    per_position : list of list of BandDecay
        :func:`band_decay` of each position, same bands.

    Returns
    -------
    list of BandDecay
        EDT, T20 and T30 the mean over positions (NaN ignored); ``valid`` only
        where every position's value is valid; the curve of the first position.
    """

    def mean(values: list[float]) -> float:  # NaN when no position has a value, silently
        finite = [v for v in values if np.isfinite(v)]
        return float(np.mean(finite)) if finite else float("nan")

    out = []
    for k, first in enumerate(per_position[0]):
        rows = [pos[k] for pos in per_position if k < len(pos)]
        out.append(
            BandDecay(
                centre_hz=first.centre_hz,
                label=first.label,
                edt_s=mean([r.edt_s for r in rows]),
                t20_s=mean([r.t20_s for r in rows]),
                t30_s=mean([r.t30_s for r in rows]),
                valid={key: all(r.valid[key] for r in rows) for key in first.valid},
                curve=first.curve,
            )
        )
    return out


@dataclass
class DecayMap:
    """Low-frequency time-frequency decay map.

    Attributes
    ----------
    time_s : ndarray, shape (n_times,)
        Start of each analysis slice after the direct sound.
    freq_hz : ndarray, shape (n_freqs,)
    level_db : ndarray, shape (n_times, n_freqs)
        Level of each slice, dB relative to the loudest bin of the first slice.
    """

    time_s: np.ndarray
    freq_hz: np.ndarray
    level_db: np.ndarray


def low_frequency_decay_map(
    ir: np.ndarray,
    fs: float,
    f_lo_hz: float = 20.0,
    f_hi_hz: float = 300.0,
    window_s: float = 0.3,
    step_s: float = 0.01,
    duration_s: float = 0.6,
) -> DecayMap:
    """Sliding-window spectra of the low-frequency decay (a cumulative-spectral-decay view).

    The response is resampled to about 1 kHz, then for each start time ``t_k``
    (every ``step_s`` up to ``duration_s`` after the peak) a segment of
    ``window_s`` is weighted with a falling half-Hann window and transformed.
    A room mode shows as a ridge that stays high while its neighbours fall away.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
    fs : float
        Sample rate in Hz.
    f_lo_hz, f_hi_hz : float
        Frequency span of the map.
    window_s, step_s, duration_s : float
        Slice length, slice spacing and how far the slices reach.

    Returns
    -------
    DecayMap
    """
    from scipy.signal import resample_poly

    ir = np.asarray(ir, dtype=float)
    dec = max(1, int(fs // 1000))
    x = resample_poly(ir, 1, dec) if dec > 1 else ir
    fs_w = fs / dec
    peak = int(np.argmax(np.abs(x)))
    start = max(0, peak - int(round(0.002 * fs_w)))
    win = int(round(window_s * fs_w))
    step = max(1, int(round(step_s * fs_w)))
    n_t = int(duration_s / step_s) + 1
    need = start + (n_t - 1) * step + win
    if len(x) < need:
        x = np.concatenate([x, np.zeros(need - len(x))])
    w = np.hanning(2 * win)[win:]
    nfft = 1 << int(np.ceil(np.log2(4 * win)))
    f = np.fft.rfftfreq(nfft, 1.0 / fs_w)
    keep = (f >= f_lo_hz) & (f <= f_hi_hz)
    idx = start + np.arange(n_t)[:, None] * step + np.arange(win)[None, :]
    spec = np.abs(np.fft.rfft(x[idx] * w, nfft, axis=1))[:, keep]
    ref = float(spec[0].max()) if spec[0].max() > 0 else 1.0
    level = 20.0 * np.log10(np.maximum(spec / ref, 1e-10))
    return DecayMap(time_s=np.arange(n_t) * step / fs_w, freq_hz=f[keep], level_db=level)


def ringing_modes(
    decay_map: DecayMap,
    drop_db: float = 20.0,
    n_modes: int = 3,
    floor_db: float = -20.0,
    late_s: float = 0.2,
) -> list[tuple[float, float]]:
    """The spectral peaks of a decay map that are still loudest after a while.

    Peaks of the first slice (at least 3 dB prominent and within ``-floor_db``
    of the loudest bin) are followed through the slices; a straight line fitted
    to each peak's level over its first ``drop_db`` of decay gives an equivalent
    60 dB decay time. Peaks are ranked by the level that line predicts at
    ``late_s``: a mode that is both loud and slow to decay is heard most.

    Returns
    -------
    list of (freq_hz, decay_s)
        At most ``n_modes``, most audible ringing first. A peak that never falls
        ``drop_db`` is fitted over the whole map.
    """
    from scipy.signal import find_peaks

    lv = decay_map.level_db
    t = decay_map.time_s
    peaks, _ = find_peaks(lv[0], prominence=3.0)
    out = []
    for i in peaks:
        if lv[0, i] < floor_db:
            continue
        rel = lv[:, i] - lv[0, i]
        fell = np.nonzero(rel <= -drop_db)[0]
        end = int(fell[0]) if fell.size else len(t) - 1
        if end < 2:
            end = min(2, len(t) - 1)
        slope = np.polyfit(t[: end + 1], rel[: end + 1], 1)[0]
        decay_s = float(-60.0 / slope) if slope < 0 else float("inf")
        late_db = float(lv[0, i] + min(slope, 0.0) * late_s)
        out.append((late_db, float(decay_map.freq_hz[i]), decay_s))
    out.sort(key=lambda c: -c[0])
    return [(f, d) for _, f, d in out[:n_modes]]
