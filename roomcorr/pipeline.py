"""The design pipeline: impulse responses in, safe FIR filters out.

``run_design`` follows the data flow of DEVELOPERS.md: align and window,
smooth, average positions, target, correction curve, FIR synthesis per
sample rate, safety. It reads no files itself except the target preset or
target/calibration text files named in the settings (resolved up front by
:func:`resolve_target` and :func:`resolve_calibration`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from scipy.signal import oaconvolve, sosfilt

from roomcorr.analysis.average import power_average
from roomcorr.analysis.balance import steady_balance_set
from roomcorr.analysis.dtft import dtft
from roomcorr.analysis.onset import find_onset
from roomcorr.analysis.smoothing import smooth_log_grid, variable_width_oct
from roomcorr.analysis.window import fdw_power
from roomcorr.audio_io import read_curve_file
from roomcorr.checked import regular_file
from roomcorr.design.curve.area import Prediction, design_channel
from roomcorr.design.curve.correction import align_target, correction_curve
from roomcorr.design.curve.target import AUTO_LIMITS_HZ, target_from_points, target_from_table
from roomcorr.design.phase.mixedphase import MixedPhaseDesign, apply_mixed_phase, latency_samples
from roomcorr.design.realise.fir import default_n_taps, synthesize_fir, taps_for_latency
from roomcorr.design.realise.safety import FilterStats, apply_safety, fit_under_cap
from roomcorr.design.system.align import SystemPlan, apply_plan, plan_system, subwoofer_band_hz
from roomcorr.design.system.crossover import crossover_candidates
from roomcorr.design.system.feeds import feed_fir
from roomcorr.design.system.subwoofers import (
    SubArrayPlan,
    crossover_cases,
    cut_sos,
    leave_one_out_spread_db,
    listening_cases,
    plan_subwoofers,
    spread_crossover_hz,
    spread_grid_hz,
)
from roomcorr.errors import InputFileError, SettingsError
from roomcorr.grid import interp_log, log_grid, points_per_octave_of
from roomcorr.settings import (
    DesignSettings,
    Settings,
    find_preset,
    is_preset_name,
    preset_names,
    read_toml,
    subwoofer_names,
)
from roomcorr.sidejob import SideJob, thread_map

__all__ = [
    "ChannelDesign",
    "DesignResult",
    "FilterStats",
    "Analysis",
    "analyse",
    "analyse_positions",
    "design_curves",
    "resolve_calibration",
    "resolve_target",
    "run_design",
]

#: Smoothing used to find the band edges (octaves).
BAND_SMOOTHING_OCT = 1.0


@dataclass
class ChannelDesign:
    """Curves of one loudspeaker channel (arrays on the log grid)."""

    index: int
    name: str
    arrival_s: np.ndarray
    measured_db: np.ndarray
    average_db: np.ndarray
    spread_db: np.ndarray
    target_db: np.ndarray
    raw_correction_db: np.ndarray
    correction_db: np.ndarray
    boost_withheld_db: np.ndarray
    band_hz: tuple[float, float]
    #: The loudspeaker's low limit below which the drive is never raised, and how
    #: it was found ("stated", "measured", "assumed"); see roomcorr.design.curve.area.
    speaker_low_hz: float | None = None
    speaker_low_how: str | None = None
    #: Leave-one-position-out prediction (None with fewer than three positions).
    prediction: Prediction | None = None
    #: Where the listening-area rules held the correction back (dB, >= 0).
    held_back_db: np.ndarray | None = None


@dataclass
class DesignResult:
    """Everything a design produced; see DEVELOPERS.md for the fields' meaning."""

    freq_hz: np.ndarray
    fs_in: int
    irs: np.ndarray
    channels: list[ChannelDesign]
    firs: dict[int, np.ndarray]
    pre_gain_db: float
    stats: list[FilterStats]
    settings: Settings
    system: SystemPlan | None = None
    mixed_phase: MixedPhaseDesign | None = None


def default_channel_names(n: int) -> list[str]:
    """``left``/``right`` for a pair, ``ch1``... otherwise (and beyond two)."""
    if n == 1:
        return ["mono"]
    base = ["left", "right"]
    return [base[i] if i < 2 and n == 2 else f"ch{i + 1}" for i in range(n)]


def channel_names_for(n: int, names: tuple[str, ...] | None) -> list[str]:
    """Names from the settings (``--names``), checked against the channel count."""
    if names is None:
        return default_channel_names(n)
    if len(names) != n:
        raise SettingsError(
            f"--names gives {len(names)} names for {n} measured channels; give one name per "
            "channel, in file order"
        )
    return list(names)


def resolve_target(freq_hz: np.ndarray, spec: str) -> np.ndarray:
    """Target shape in dB from a preset name or a frequency/dB text file.

    A plain name (letters, digits, ``-``, ``_``) names a bundled preset; any
    other text is a path, which must be a regular file (``.toml`` with a
    ``[target]`` table, or a curve text file). A path never reaches into the
    presets folder and a name never leaves it.
    """
    preset = find_preset(spec)
    if preset is not None:
        data = read_toml(preset)
        table = data.get("target")
        if not isinstance(table, dict):
            raise SettingsError(f"{preset}: preset {spec!r} has no [target] table")
        return target_from_table(freq_hz, table, str(preset))
    p = Path(spec)
    if is_preset_name(spec) and not p.exists():
        raise SettingsError(
            f"--target {spec}: neither a preset ({', '.join(preset_names())}) nor a file"
        )
    regular_file(p, "target file", SettingsError)
    if p.suffix.lower() == ".toml":
        table = read_toml(p).get("target")
        if not isinstance(table, dict):
            raise SettingsError(f"{p}: no [target] table")
        return target_from_table(freq_hz, table, str(p))
    pts_hz, pts_db = read_curve_file(p, "target")
    return target_from_points(freq_hz, pts_hz, pts_db)


def resolve_calibration(freq_hz: np.ndarray, path: str | None) -> np.ndarray:
    """Microphone calibration in dB on the grid (zeros when none is given)."""
    if not path:
        return np.zeros_like(freq_hz)
    cal_hz, cal_db = read_curve_file(path, "calibration")
    if np.max(np.abs(cal_db)) > 30:
        raise InputFileError(f"{path}: calibration values beyond ±30 dB; is this the right file?")
    return interp_log(freq_hz, cal_hz, cal_db)


def analyse_positions(
    irs: np.ndarray, fs: int, freq_hz: np.ndarray, calibration_db: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Windowed, smoothed level of every position and channel.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
    calibration_db : ndarray, shape (n_freqs,), optional
        Microphone response, subtracted from the measurement.

    Returns
    -------
    measured_db : ndarray, shape (n_positions, n_channels, n_freqs)
    arrival_s : ndarray, shape (n_positions, n_channels)
    """
    n_pos, n_ch, _ = irs.shape
    ppo = points_per_octave_of(freq_hz)
    width = variable_width_oct(freq_hz)
    measured = np.empty((n_pos, n_ch, freq_hz.size))
    arrival = np.empty((n_pos, n_ch))

    def one(pc: tuple[int, int]) -> tuple[float, np.ndarray]:
        onset = find_onset(irs[pc], fs)
        power = fdw_power(irs[pc], fs, onset, freq_hz)
        return onset, 10 * np.log10(np.maximum(smooth_log_grid(power, ppo, width), 1e-30))

    # every response side by side (their FFTs release the interpreter lock)
    jobs = [(p, c) for p in range(n_pos) for c in range(n_ch)]
    for (p, c), (onset, level_db) in zip(jobs, thread_map(one, jobs), strict=True):
        arrival[p, c] = onset / fs
        measured[p, c] = level_db
    if calibration_db is not None:
        measured -= calibration_db
    return measured, arrival


def fir_taps_for(fs: int, taps_48k: int | None, band_lo_hz: float) -> int:
    """FIR length at ``fs``: the 48 kHz length scaled to keep its duration, or automatic."""
    if taps_48k is None:
        return default_n_taps(fs, band_lo_hz)
    return max(256, int(round(taps_48k * fs / 48000)))


def _subwoofer_channel(
    c: int,
    name: str,
    freq: np.ndarray,
    measured_c: np.ndarray,
    arrival_c: np.ndarray,
    weights: np.ndarray | None,
    target_shape: np.ndarray,
    d: DesignSettings,
    fs: int,
) -> ChannelDesign:
    """A subwoofer channel: band from its crossover range, target level over its band."""
    ppo = points_per_octave_of(freq)
    avg, spread = power_average(measured_c, weights)
    wide = 10 * np.log10(smooth_log_grid(10 ** (avg / 10), ppo, BAND_SMOOTHING_OCT))
    lo, hi = subwoofer_band_hz(freq, wide, d.crossover_range_hz)
    band = (d.band_lo_hz or lo, d.band_hi_hz or min(hi, fs / 2 * 0.95))
    if band[0] >= band[1]:
        raise SettingsError(
            f"channel {name}: correction band {band[0]:.0f}-{band[1]:.0f} Hz is empty; "
            "set --band-lo/--band-hi"
        )
    target = align_target(freq, avg, target_shape, band)
    corr = correction_curve(freq, avg, spread, target, band, d.max_boost_db, d.max_cut_db)
    return ChannelDesign(
        index=c,
        name=name,
        arrival_s=arrival_c.copy(),
        measured_db=measured_c.copy(),
        average_db=avg,
        spread_db=spread,
        target_db=target,
        raw_correction_db=corr.raw_db,
        correction_db=corr.correction_db,
        boost_withheld_db=corr.boost_withheld_db,
        band_hz=(float(band[0]), float(band[1])),
    )


@dataclass
class Analysis:
    """What a design needs from the measurement, before any target is applied.

    Computing it is the slow part of a design (windows, smoothing, the steady
    state); :func:`design_curves` then takes milliseconds, so an interactive
    target editor computes it once per measurement.
    """

    freq_hz: np.ndarray
    fs: int
    measured_db: np.ndarray  # (n_positions, n_channels, n_freqs)
    arrival_s: np.ndarray  # (n_positions, n_channels)
    weights: np.ndarray | None
    names: list[str]


def analyse(
    irs: np.ndarray, fs: int, settings: Settings, channel_names: list[str] | None = None
) -> Analysis:
    """Windowed, smoothed, calibrated level of every position and channel (see run_design)."""
    d = settings.design
    n_pos, n_ch, _ = irs.shape
    names = channel_names or channel_names_for(n_ch, d.channel_names)
    weights = None
    if d.position_weights is not None:
        if len(d.position_weights) != n_pos:
            raise SettingsError(
                f"design.position_weights has {len(d.position_weights)} values for "
                f"{n_pos} positions; give one weight per position"
            )
        weights = np.asarray(d.position_weights)
    freq = log_grid()
    cal = resolve_calibration(freq, d.calibration)
    measured, arrival = analyse_positions(irs, fs, freq, cal)
    # Broad balance from the steady state, detail from the window (analysis/balance.py);
    # the modal range's detail from the steady state too, except with a subwoofer,
    # whose integration with the mains is planned on the windowed bass (design/system/align.py).
    measured = steady_balance_set(irs, fs, freq, measured, arrival, modal_detail=not d.subwoofer)
    return Analysis(freq, fs, measured, arrival, weights, names)


def design_curves(
    analysis: Analysis, settings: Settings, target_shape: np.ndarray
) -> list[ChannelDesign]:
    """The correction curve of every channel from an :class:`Analysis` and a target shape."""
    d = settings.design
    freq, measured, arrival = analysis.freq_hz, analysis.measured_db, analysis.arrival_s
    weights, names, fs = analysis.weights, analysis.names, analysis.fs
    channels: list[ChannelDesign] = []
    for c in range(measured.shape[1]):
        if names[c] == d.subwoofer:
            # A subwoofer's band and level come from its own range (design/system/align.py).
            channels.append(
                _subwoofer_channel(
                    c, names[c], freq, measured[:, c], arrival[:, c], weights, target_shape, d, fs
                )
            )
            continue
        plan = design_channel(
            freq,
            measured[:, c],
            target_shape,
            weights=weights,
            band_lo_hz=d.band_lo_hz,
            band_hi_hz=d.band_hi_hz,
            band_limits_hz=(AUTO_LIMITS_HZ[0], min(AUTO_LIMITS_HZ[1], fs / 2 * 0.95)),
            speaker_low_hz=d.speaker_low_hz,
            max_boost_db=d.max_boost_db,
            max_cut_db=d.max_cut_db,
            name=names[c],
            shrink=not d.subwoofer,
        )
        channels.append(
            ChannelDesign(
                index=c,
                name=names[c],
                arrival_s=arrival[:, c].copy(),
                measured_db=measured[:, c].copy(),
                average_db=plan.average_db,
                spread_db=plan.spread_db,
                target_db=plan.target_db,
                raw_correction_db=plan.raw_db,
                correction_db=plan.correction_db,
                boost_withheld_db=plan.boost_withheld_db,
                band_hz=plan.band_hz,
                speaker_low_hz=plan.speaker_low_hz,
                speaker_low_how=plan.speaker_low_how,
                prediction=plan.prediction,
                held_back_db=plan.held_back_db,
            )
        )
    return channels


def run_design(
    irs: np.ndarray,
    fs: int,
    settings: Settings,
    channel_names: list[str] | None = None,
) -> DesignResult:
    """Design correction filters for every channel of a measurement set.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
        One impulse response per microphone position and loudspeaker.
    fs : int
        Sample rate of ``irs``.
    settings : Settings
    channel_names : list of str, optional

    Returns
    -------
    DesignResult
    """
    if len(subwoofer_names(settings.design.subwoofer)) > 1:
        return _run_several_subwoofers(irs, fs, settings, channel_names)
    return _design(irs, fs, settings, channel_names)


@dataclass
class _Delivered:
    """The filters delivered from a design's filter rows, when they are not those rows:
    ``rows(h, rate)`` maps the rows at one rate (n_channels, n_taps) to the delivered ones
    (n_outputs, n_out_taps); ``owner[i]`` is the channel delivered row ``i`` comes from."""

    rows: Callable[[np.ndarray, int], np.ndarray]
    owner: list[int]


def _design(
    irs: np.ndarray,
    fs: int,
    settings: Settings,
    channel_names: list[str] | None = None,
    delivered: _Delivered | None = None,
) -> DesignResult:
    """:func:`run_design` for one source per channel. With ``delivered``, the filters are
    fitted under the boost cap, checked and returned as delivered (several outputs per
    channel); everything else (channels, plan, mixed phase) stays per channel."""
    d = settings.design
    analysis = analyse(irs, fs, settings, channel_names)
    target_shape = resolve_target(analysis.freq_hz, d.target)
    channels = design_curves(analysis, settings, target_shape)
    freq, arrival, weights = analysis.freq_hz, analysis.arrival_s, analysis.weights
    lowest = min(ch.band_hz[0] for ch in channels)
    n_taps = {rate: fir_taps_for(rate, d.taps, lowest) for rate in d.sample_rates}
    if d.phase == "mixed" and d.taps is None:  # automatic taps follow the latency
        n_taps = {
            r: taps_for_latency(n, latency_samples(d.latency_ms, r)) for r, n in n_taps.items()
        }
    # with a subwoofer, whose band reaches lower than the mains', each channel keeps the
    # length its own band asks for (the mains as long as without a subwoofer), zero-padded
    # to the common length; the crossover and alignment keep each row's own length too
    own = bool(d.subwoofer) and d.taps is None and d.phase != "mixed"
    own_taps = {
        rate: [fir_taps_for(rate, None, ch.band_hz[0]) if own else n for ch in channels]
        for rate, n in n_taps.items()
    }
    built: dict[str, object] = {"mixed": None, "system": None, "planned": False}

    def build(curves: list[np.ndarray]) -> dict[int, np.ndarray]:
        # every channel at every rate, side by side (the FFTs release the interpreter lock)
        jobs = [(rate, c) for rate in n_taps for c in range(len(curves))]
        rows = thread_map(
            lambda job: _padded(
                synthesize_fir(freq, curves[job[1]], job[0], own_taps[job[0]][job[1]]),
                n_taps[job[0]],
            ),
            jobs,
            cost=lambda job: own_taps[job[0]][job[1]],
        )
        firs = {
            rate: np.stack([h for (r, _), h in zip(jobs, rows, strict=True) if r == rate])
            for rate in n_taps
        }
        if d.phase == "mixed":  # same magnitudes, the loudspeaker's excess phase undone
            firs, built["mixed"] = apply_mixed_phase(
                irs, fs, arrival, freq, firs, d.latency_ms, weights
            )
        if not built["planned"]:  # planned once, on the filters as first built
            built["system"] = plan_system(irs, fs, freq, channels, target_shape, firs, d, weights)
            built["planned"] = True
        if built["system"] is not None:
            firs = apply_plan(firs, built["system"], own_taps if own else None)
        if delivered is not None:  # every rate side by side (FFT convolutions)
            rates = list(firs)
            rows = thread_map(lambda rate: delivered.rows(firs[rate], rate), rates, cost=float)
            firs = dict(zip(rates, rows, strict=True))
        return firs

    # the realised filters are fitted under the boost cap; apply_safety stays the final proof
    firs, fitted, _ = fit_under_cap(
        build,
        [ch.correction_db for ch in channels],
        freq,
        d.max_boost_db,
        owner=None if delivered is None else delivered.owner,
    )
    for ch, curve in zip(channels, fitted, strict=True):
        ch.correction_db = curve
    mixed = built["mixed"]
    system = built["system"]
    firs, pre_gain, stats = apply_safety(firs, d.ceiling_db, d.max_boost_db)
    return DesignResult(
        freq_hz=freq,
        fs_in=fs,
        irs=irs,
        channels=channels,
        firs=firs,
        pre_gain_db=pre_gain,
        stats=stats,
        settings=settings,
        system=system,
        mixed_phase=mixed,
    )


def _padded(h: np.ndarray, n: int) -> np.ndarray:
    """``h`` followed by zeros up to ``n`` taps (never shorter than ``h``)."""
    return h if h.size >= n else np.concatenate([h, np.zeros(n - h.size)])


def _shifted(h: np.ndarray, n: int, n_out: int) -> np.ndarray:
    out = np.zeros(n_out)
    out[n : n + h.size] = h[: max(0, n_out - n)]
    return out


def _own_cuts(h: np.ndarray, cuts, fs: float) -> np.ndarray:
    """``h`` (any leading shape) through a subwoofer's own cuts designed at ``fs``, same
    length (each cut's gain is at most 0 dB, so it adds no boost)."""
    for f0, gain_db, q in cuts:
        h = sosfilt(cut_sos(f0, gain_db, q, fs), h, axis=-1)
    return h


def _own_filter(h: np.ndarray, arr: SubArrayPlan, k: int, fs: float, latency_s: float):
    """``h`` (any leading shape) through subwoofer ``k``'s own filter at ``fs``: its cuts,
    or its shaped feed (:func:`roomcorr.design.system.feeds.feed_fir`, late by
    ``latency_s``, ``h`` lengthened by that much)."""
    if arr.feed is None:
        return _own_cuts(h, arr.cuts[k], fs)
    fir = feed_fir(arr.feed_nodes_hz, arr.feed[k], fs, latency_s)
    n = h.shape[-1] + int(round(latency_s * fs))
    h2 = np.atleast_2d(h)
    out = oaconvolve(h2, fir[None], axes=-1)[..., :n]
    return out.reshape(*h.shape[:-1], n)


def _run_several_subwoofers(
    irs: np.ndarray, fs: int, settings: Settings, channel_names: list[str] | None
) -> DesignResult:
    """Several subwoofers: chosen together, then designed as one source (design/system/).

    1. Each subwoofer's delay, level (cut only), polarity and own filter come from
       :func:`roomcorr.design.system.subwoofers.plan_subwoofers` on the measured
       responses (20 Hz to twice the middle of the crossover range), judged with each
       main alone and all mains driven, through a crossover at the range's middle
       (:func:`roomcorr.design.system.subwoofers.listening_cases`). The own filter is a
       shaped feed (:mod:`roomcorr.design.system.feeds`) that may act up to
       ``design.latency_ms`` early, judged through crossovers over the whole range.
    2. The crossover is the candidate that leaves the measured positions most alike with
       the subwoofers so fed (:func:`roomcorr.design.system.subwoofers.spread_crossover_hz`).
    3. The subwoofers, so fed, are summed into one virtual channel at every position,
       and the single-subwoofer design runs on the mains and that channel at that
       crossover: common correction, alignment (the mains wait for the feeds' latency),
       safety.
    4. The virtual channel's filter is handed to every subwoofer with its own delay
       (whole samples at each rate), level, polarity and own filter (designed at each
       rate), always inside the filters. The own filter never raises (its realised gain
       is at most 0 dB), and the boost cap's fit and the safety check judge the outputs
       as delivered (:class:`_Delivered`), not the virtual channel's filter.
    """
    d = settings.design
    n_pos, n_ch, n_samp = irs.shape
    names = channel_names or channel_names_for(n_ch, d.channel_names)
    subs = subwoofer_names(d.subwoofer)
    for name in subs:
        if name not in names:
            raise SettingsError(
                f"--subwoofer {name}: not one of the channel names {', '.join(names)}; "
                "name the channels with --names"
            )
    sub_idx = [names.index(n) for n in subs]
    mains = [c for c in range(n_ch) if c not in sub_idx]
    if not mains:
        raise SettingsError("--subwoofer: subwoofers need at least one main loudspeaker")
    weights = None if d.position_weights is None else np.asarray(d.position_weights)
    if weights is not None and weights.size != n_pos:
        raise SettingsError(
            f"design.position_weights has {weights.size} values for {n_pos} positions; "
            "give one weight per position"
        )
    lo, hi = d.crossover_range_hz
    grid = spread_grid_hz(2.0 * float(np.sqrt(lo * hi)))
    both = dtft(irs[:, sub_idx + mains], grid, fs)  # one set of kernels for all
    resp, mains_resp = both[:, : len(sub_idx)], both[:, len(sub_idx) :]
    vname = "+".join(subs)
    inner_names = [names[c] for c in mains] + [vname]
    inner = replace(settings, design=replace(d, subwoofer=vname, channel_names=tuple(inner_names)))

    def inner_design(arr, design_settings):
        """The single-subwoofer design on the mains and one virtual subwoofer: every
        subwoofer with its own delay, level, polarity and own filter, summed. A shaped
        feed's filter is late by ``latency``; here it is taken that much earlier (what it
        plays before then is left out), so that the subwoofers' arrival and the crossover's
        timing are judged on their main sound, and the mains are delivered that much later
        instead (:func:`_several_outputs`)."""
        shifts = [int(round(t * fs)) for t in arr.delay_s]
        n_lat = int(round(latency * fs))
        n_v = n_samp + max(shifts)
        inner_irs = np.zeros((n_pos, len(mains) + 1, n_v))
        inner_irs[:, : len(mains), :n_samp] = irs[:, mains]
        # every subwoofer through its own filter, side by side (FFT convolutions)
        owns = thread_map(
            lambda k: _own_filter(irs[:, sub_idx[k]], arr, k, fs, latency)[..., n_lat:],
            list(range(len(sub_idx))),
        )
        for k, own in enumerate(owns):
            g = 10.0 ** (arr.gain_db[k] / 20.0) * arr.polarity[k]
            for p in range(n_pos):
                inner_irs[p, -1] += g * _shifted(own[p], shifts[k], n_v)
        # fitted under the boost cap and checked as delivered: every physical output
        delivered = _Delivered(
            rows=lambda h, rate: _physical_rows(h, rate, arr, mains, sub_idx, n_ch, latency),
            owner=_inner_channels(mains, sub_idx, n_ch),
        )
        return _design(inner_irs, fs, design_settings, inner_names, delivered)

    # judged as the seats hear it with each main alone and all mains driven (mono bass),
    # crossed over at the range's middle
    mid = float(np.sqrt(lo * hi))
    sub_heard, bases, scales = listening_cases(resp, mains_resp, grid, mid, fs)
    # the shaped feeds are judged through crossovers over the whole range (the design
    # chooses its crossover afterwards)
    feed_cases = crossover_cases(resp, mains_resp, grid, (lo, mid, hi), mid, fs)
    # the leave-one-position-out prediction (the whole search again without each position)
    # only reports and needs nothing of the choice below: it runs on the second core
    # meanwhile, in a child process where that is possible (roomcorr/sidejob.py: on a
    # thread, its many small steps would hold the interpreter lock the design needs)
    loo = (
        SideJob(
            leave_one_out_spread_db,
            sub_heard, grid, weights, bases, fs, True, scales, feed_cases,
            d.latency_ms / 1000.0,
        )
        if n_pos >= 3
        else None
    )
    try:
        arr = plan_subwoofers(
            sub_heard, grid, subs, sub_idx, weights, predict=False, base=bases, fs=fs,
            base_scale=scales, feed_cases=feed_cases, feed_latency_s=d.latency_ms / 1000.0,
        )
        latency = arr.feed_latency_s
        fc = spread_crossover_hz(
            resp, mains_resp, grid, crossover_candidates((lo, hi)), fs, arr, weights
        )
        if fc is not None:  # the crossover that leaves the seats most alike, then integrated
            inner = replace(inner, design=replace(inner.design, crossover_range_hz=(fc, fc)))
            arr.crossover_hz = fc
        r = inner_design(arr, inner)
        result = _several_outputs(irs, fs, settings, names, sub_idx, mains, arr, r, latency)
        if loo is not None:
            arr.loo_equal_db, arr.loo_after_db = loo.result()
        return result
    finally:
        if loo is not None:
            loo.close()


def _inner_channels(mains: list[int], sub_idx: list[int], n_ch: int) -> list[int]:
    """The channel of the design on the mains and the virtual subwoofer (its last) that
    each of the ``n_ch`` physical outputs comes from."""
    inner = {c: i for i, c in enumerate(mains)} | {c: len(mains) for c in sub_idx}
    return [inner[c] for c in range(n_ch)]


def _physical_rows(
    h: np.ndarray,
    rate: int,
    arr: SubArrayPlan,
    mains: list[int],
    sub_idx: list[int],
    n_ch: int,
    latency_s: float,
) -> np.ndarray:
    """Every physical channel's filter at ``rate`` from the rows ``h`` of the design on the
    mains and the virtual subwoofer (its last row): the mains as they are, waiting for the
    subwoofers' own filters; each subwoofer the virtual channel's filter with its own
    delay, level, polarity and own filter."""
    v = len(mains)
    sh = [int(round(t * rate)) for t in arr.delay_s]
    n_lat = int(round(latency_s * rate))
    n_out = h.shape[1] + max(sh) + n_lat
    rows = np.zeros((n_ch, n_out))
    for i, c in enumerate(mains):
        rows[c, n_lat : n_lat + h.shape[1]] = h[i]
    for k, c in enumerate(sub_idx):
        g = 10.0 ** (arr.gain_db[k] / 20.0) * arr.polarity[k]
        rows[c] = g * _shifted(_own_filter(h[v], arr, k, rate, latency_s), sh[k], n_out)
    return rows


def _several_outputs(
    irs: np.ndarray,
    fs: int,
    settings: Settings,
    names: list[str],
    sub_idx: list[int],
    mains: list[int],
    arr: SubArrayPlan,
    r: DesignResult,
    latency_s: float = 0.0,
) -> DesignResult:
    """The several-subwoofer design's result from the inner design ``r`` on the mains and
    the virtual subwoofer, whose filters are already every physical output, fitted under
    the boost cap and checked (:func:`_physical_rows`; step 4 of
    :func:`_run_several_subwoofers`): its channels, system plan and mixed-phase figures
    per physical output."""
    n_ch = irs.shape[1]
    plan = r.system
    assert plan is not None
    pick = _inner_channels(mains, sub_idx, n_ch)  # the inner channel of each output
    mixed = None
    if r.mixed_phase is not None:
        # the array's excess phase is undone once, in the filter all subwoofers share
        # (the single-subwoofer mixed-phase rules and checks); each subwoofer's own
        # delay, level, polarity and own filter follow it as above
        mp = r.mixed_phase
        min_firs = {
            rate: _physical_rows(h, rate, arr, mains, sub_idx, n_ch, latency_s)
            for rate, h in mp.min_phase_firs.items()
        }
        mixed = replace(
            mp,
            estimates=[mp.estimates[pick[c]] for c in range(n_ch)],
            min_phase_firs=min_firs,
            stats=[
                replace(st, channel=c)
                for c in range(n_ch)
                for st in mp.stats
                if st.channel == pick[c]
            ],
            views=[mp.views[pick[c]] for c in range(n_ch)] if mp.views else [],
        )
    channels = [replace(r.channels[pick[c]], index=c, name=names[c]) for c in range(n_ch)]
    roles = [plan.roles[pick[c]] for c in range(n_ch)]
    own_delay = np.zeros(n_ch)
    own_gain = np.zeros(n_ch)
    own_pol = np.ones(n_ch, dtype=int)
    for c in mains:  # the wait for the subwoofers' own filters (inside the filters)
        own_delay[c] = latency_s
    for k, c in enumerate(sub_idx):
        own_delay[c], own_gain[c], own_pol[c] = arr.delay_s[k], arr.gain_db[k], arr.polarity[k]
    # outputs: totals where the array's part is inside the filters (always) and the
    # system's delay and trim are too (align on); otherwise the trims to set by hand
    delay = plan.delay_s[pick] + (own_delay if plan.baked else 0.0)
    trim = plan.trim_db[pick] + (own_gain if plan.baked else 0.0)
    system = replace(
        plan,
        names=list(names),
        roles=roles,
        arrival_s=plan.arrival_s[pick],
        delay_s=delay,
        delay_samples={
            int(rate): [int(round(t * rate)) for t in delay] for rate in plan.delay_samples
        },
        distance_m=delay * plan.c_m_s,
        trim_db=trim,
        level_db=plan.level_db[pick],
        level_band_hz=[plan.level_band_hz[i] for i in pick],
        polarity=[int(plan.polarity[i] * own_pol[c]) for c, i in enumerate(pick)],
        subwoofers=arr,
    )
    return DesignResult(
        freq_hz=r.freq_hz,
        fs_in=fs,
        irs=irs,
        channels=channels,
        firs=r.firs,
        pre_gain_db=r.pre_gain_db,
        stats=r.stats,
        settings=settings,
        system=system,
        mixed_phase=mixed,
    )
