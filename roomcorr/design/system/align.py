"""Several loudspeakers as one system: arrival delays, level trims, subwoofer integration.

Every loudspeaker channel is first corrected on its own (``pipeline.run_design``).
This module then makes the channels play together:

* **Delays.** The direct sound of each channel arrives at the mean of its
  onsets over the positions (weighted like the position average); between
  main loudspeakers the onsets are refined by cross-correlating their direct
  sounds (:func:`relative_arrival_s`). Each main
  loudspeaker is delayed by the difference to the latest one, so all direct
  sounds arrive together over the listening area. The impulse responses
  must share one time origin (loopback-timed measurements, or files made
  elsewhere with their relative timing kept).
* **Level trims.** The level of each corrected channel (measured average
  plus correction, minus the target shape) is averaged in dB over a band:
  ``level_band_hz`` for the mains (default the midrange, 500 Hz to 2 kHz),
  the subwoofer's own band below the crossover range for a subwoofer. The
  louder channels are cut to the quietest; a trim never boosts.
* **Subwoofer.** With a channel named as the subwoofer, the crossover
  frequency, the subwoofer's delay and its polarity come from
  :func:`roomcorr.design.system.crossover.search_integration`, judged on the complex
  sums with the correction filters in the loop. The mains get the
  Linkwitz-Riley high-pass, the subwoofer the low-pass. Each main input
  feeds the subwoofer with gain ``1 / n_mains`` (a full-scale signal on all
  inputs cannot overload it); the trims match the subwoofer as heard through
  that route, so one input alone plays its main and the subwoofer at equal
  levels (and all inputs together play the pair and the subwoofer at equal
  levels, since the mains then add up in the bass too).
* **Shared cut.** The peaks that the chosen sums share around the
  crossover are cut in every output alike
  (:func:`roomcorr.design.system.crossover.shared_cut_db`), which changes the
  sums' magnitude and leaves the phase relation the search chose as it is.

With ``align`` on (the default with more than one channel) delays and trims
are baked into the filters as whole-sample shifts (at most half a sample,
0.011 ms at 44.1 kHz, from the exact delay) and gains; otherwise they are
only reported, for playback devices that take per-output trims. Polarity
and crossover are always part of the filters. The common safety pre-gain
is applied afterwards, to all outputs together.

References
----------
.. [1] ISO 9613-1:1993, annex A (speed of sound, for the distances a delay
       stands for).
.. [2] S. H. Linkwitz, "Active crossover networks for noncoincident
       drivers", JAES 24(1), 1976.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.signal import fftconvolve

from roomcorr.analysis.compare import speed_of_sound_m_s
from roomcorr.analysis.dtft import dtft
from roomcorr.design.curve.target import AUTO_LIMITS_HZ, ROLLOFF_DB
from roomcorr.design.realise.fir import default_n_taps, synthesize_fir
from roomcorr.design.system.crossover import (
    Integration,
    apply_crossover,
    linkwitz_riley_sos,
    search_grid_hz,
    search_integration,
    smoothed_db,
)
from roomcorr.design.system.subwoofers import SubArrayPlan
from roomcorr.errors import SettingsError
from roomcorr.sidejob import thread_map

#: Roles of a channel in the system.
MAIN, SUB = "main", "sub"


@dataclass
class SystemPlan:
    """How the channels play together (one entry per channel, in channel order).

    Attributes
    ----------
    names, roles : list of str
    arrival_s : ndarray, shape (n_channels,)
        Weighted mean onset of each channel.
    delay_s : ndarray, shape (n_channels,)
        Delay given to each channel (never negative).
    delay_samples : dict of int to list of int
        ``delay_s`` rounded to whole samples at every output rate.
    distance_m : ndarray, shape (n_channels,)
        Distance each delay stands for at the design's temperature.
    trim_db : ndarray, shape (n_channels,)
        Level trim of each channel (never positive).
    level_db : ndarray, shape (n_channels,)
        Corrected level of each channel in its level band, before trims.
    level_band_hz : list of (float, float)
    polarity : list of int
        +1 or -1 per channel.
    baked : bool
        Delays and trims are inside the filters (``align`` on).
    c_m_s, temperature_c : float
    sub_route_gain_db : float
        Gain of each main input into the subwoofer output (0 without one).
    integration : Integration or None
    summed_measured_db : ndarray or None, shape (n_mains, n_positions, n_freqs)
        Mains plus subwoofer as measured (no filters), on the search grid.
    subwoofers : SubArrayPlan or None
        With several subwoofers: each one's delay, level and polarity inside
        the array (``roomcorr.design.system.subwoofers``); ``delay_s``, ``trim_db`` and
        ``polarity`` above then give each subwoofer output's totals.
    """

    names: list[str]
    roles: list[str]
    arrival_s: np.ndarray
    delay_s: np.ndarray
    delay_samples: dict[int, list[int]]
    distance_m: np.ndarray
    trim_db: np.ndarray
    level_db: np.ndarray
    level_band_hz: list[tuple[float, float]]
    polarity: list[int]
    baked: bool
    c_m_s: float
    temperature_c: float
    sub_route_gain_db: float = 0.0
    integration: Integration | None = None
    summed_measured_db: np.ndarray | None = field(default=None, repr=False)
    subwoofers: SubArrayPlan | None = None

    @property
    def sub_index(self) -> int | None:
        """Index of the (first) subwoofer channel, or ``None``."""
        return self.roles.index(SUB) if SUB in self.roles else None

    @property
    def sub_indices(self) -> list[int]:
        """Indices of every subwoofer channel (empty without one)."""
        return [c for c, r in enumerate(self.roles) if r == SUB]


def mean_arrival_s(arrival_s: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """Weighted mean onset per channel.

    Parameters
    ----------
    arrival_s : ndarray, shape (n_positions, n_channels)
    weights : ndarray, shape (n_positions,), optional

    Returns
    -------
    ndarray, shape (n_channels,)
    """
    a = np.asarray(arrival_s, dtype=float)
    w = np.ones(a.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    return (w @ a) / w.sum()


#: Window around each direct sound for the cross-correlation: before and after the onset, s.
XCORR_BEFORE_S = 0.0005
XCORR_AFTER_S = 0.0025
#: Oversampling of the cross-correlation before its peak is refined.
XCORR_OVERSAMPLE = 16


def relative_arrival_s(
    ir: np.ndarray, ref: np.ndarray, fs: int, onset: float, ref_onset: float
) -> float:
    """Arrival of ``ir`` after ``ref``, s, from the cross-correlation of their direct sounds.

    Each direct sound is cut from its own onset (``XCORR_BEFORE_S`` before to
    ``XCORR_AFTER_S`` after, Hann-tapered); the correlation is oversampled
    ``XCORR_OVERSAMPLE`` times by zero-padding its spectrum and its peak refined by a
    parabola through the three highest points. For loudspeakers of similar type this
    is accurate to a small fraction of a sample, where a threshold onset is not.

    Parameters
    ----------
    ir, ref : ndarray, shape (n_samples,)
    fs : int
    onset, ref_onset : float
        Onsets in samples (:func:`roomcorr.analysis.onset.find_onset`).

    Returns
    -------
    float

    References
    ----------
    .. [1] C. Knapp and G. Carter, "The generalized correlation method for
           estimation of time delay", IEEE Trans. ASSP 24(4), 1976.
    """
    a, b = int(round(XCORR_BEFORE_S * fs)), int(round(XCORR_AFTER_S * fs))
    win = np.hanning(a + b)

    def seg(x: np.ndarray, o: float) -> tuple[np.ndarray, int]:
        i = max(int(round(o)) - a, 0)
        out = np.zeros(a + b)
        part = x[i : i + a + b]
        out[: part.size] = part
        return out * win, i

    x, i_x = seg(ir, onset)
    y, i_y = seg(ref, ref_onset)
    n = 2 * (a + b)
    spec = np.fft.rfft(x, n) * np.conj(np.fft.rfft(y, n))
    m = n * XCORR_OVERSAMPLE
    cc = np.abs(np.fft.irfft(spec, m))  # a main wired in reverse still correlates
    k = int(np.argmax(cc))
    y0, y1, y2 = cc[k - 1], cc[k], cc[(k + 1) % m]
    den = y0 - 2 * y1 + y2
    frac = 0.5 * (y0 - y2) / den if den != 0 else 0.0
    lag = (k + frac) / XCORR_OVERSAMPLE
    if lag > n / 2:
        lag -= n
    return (i_x - i_y + lag) / fs


def arrival_delays_s(arrival_s: np.ndarray) -> np.ndarray:
    """Delays that make every channel arrive with the latest one (all >= 0)."""
    a = np.asarray(arrival_s, dtype=float)
    return a.max() - a


def band_level_db(freq_hz: np.ndarray, level_db: np.ndarray, band_hz: tuple[float, float]) -> float:
    """Mean of a level curve (dB) over a band of a log grid (equal weight per octave)."""
    m = (freq_hz >= band_hz[0]) & (freq_hz <= band_hz[1])
    if not m.any():
        raise SettingsError(
            f"level band {band_hz[0]:g}-{band_hz[1]:g} Hz holds no frequencies; widen it"
        )
    return float(np.mean(level_db[m]))


def level_trims_db(levels_db: np.ndarray, offsets_db: np.ndarray | None = None) -> np.ndarray:
    """Trims that bring every channel to the quietest one (all <= 0 dB).

    ``offsets_db`` is added to each channel's level first (e.g. a route gain
    the channel's signal will also pass).
    """
    eff = np.asarray(levels_db, dtype=float)
    if offsets_db is not None:
        eff = eff + np.asarray(offsets_db, dtype=float)
    return eff.min() - eff


def shift_samples(h: np.ndarray, n: int, n_out: int) -> np.ndarray:
    """``h`` delayed by ``n`` whole samples, zero-padded or cut to ``n_out``."""
    out = np.zeros(n_out)
    k = max(0, min(h.size, n_out - n))
    out[n : n + k] = h[:k]
    return out


def _responses(
    irs: np.ndarray, fs: int, firs: dict[int, np.ndarray], freq_hz: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Measured and correction responses at ``freq_hz``.

    Returns ``measured`` (n_positions, n_channels, n_freqs) and ``correction``
    (n_channels, n_freqs), complex. The correction is the filter at the
    output rate nearest the measurement's.
    """
    measured = dtft(irs, freq_hz, fs)  # = scipy's freqz per response, all at once
    rate = min(firs, key=lambda r: abs(r - fs))
    correction = dtft(firs[rate], freq_hz, rate)
    return measured, correction


def subwoofer_band_hz(
    freq_hz: np.ndarray, wide_db: np.ndarray, crossover_range_hz: tuple[float, float]
) -> tuple[float, float]:
    """Correction band of a subwoofer from its own roll-off.

    Like :func:`roomcorr.design.curve.target.auto_band`, but the reference level is
    the median of the subwoofer's own band (half the lowest crossover
    frequency up to it) rather than the midrange, where a subwoofer plays
    nothing. The band ends where the response first falls ``ROLLOFF_DB``
    below that level, searching outward, and never above twice the highest
    crossover frequency (the low-pass removes everything beyond).

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    wide_db : ndarray, shape (n_freqs,)
        Position average smoothed over about an octave.
    crossover_range_hz : (float, float)

    Returns
    -------
    (band_lo_hz, band_hi_hz)
    """
    f = np.asarray(freq_hz, dtype=float)
    ref_lo, ref_hi = crossover_range_hz[0] / 2.0, crossover_range_hz[0]
    ref = float(np.median(wide_db[(f >= ref_lo) & (f <= ref_hi)]))
    below = np.flatnonzero((f < ref_lo) & (wide_db < ref - ROLLOFF_DB))
    above = np.flatnonzero((f > ref_hi) & (wide_db < ref - ROLLOFF_DB))
    lo = f[below[-1]] if below.size else f[0]
    hi = f[above[0]] if above.size else f[-1]
    return float(max(lo, AUTO_LIMITS_HZ[0])), float(min(hi, 2.0 * crossover_range_hz[1]))


def sub_level_band_hz(
    sub_band_hz: tuple[float, float], crossover_range_hz: tuple[float, float]
) -> tuple[float, float]:
    """The subwoofer's own band: from its lowest corrected frequency to the crossover range."""
    lo = max(sub_band_hz[0], 20.0)
    hi = crossover_range_hz[0]
    if hi < lo * 1.5:
        hi = lo * 1.5
    return lo, hi


def plan_system(
    irs: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    channels: list[Any],
    target_shape_db: np.ndarray,
    firs: dict[int, np.ndarray],
    design: Any,
    weights: np.ndarray | None = None,
) -> SystemPlan | None:
    """Delays, trims and (with a subwoofer) the crossover of a several-channel design.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
        The design's log grid.
    channels : list of ChannelDesign
    target_shape_db : ndarray, shape (n_freqs,)
        Target before it was level-aligned to each channel.
    firs : dict of int to ndarray, shape (n_channels, n_taps)
        Correction filters per rate, before the safety pre-gain.
    design : DesignSettings
    weights : ndarray, shape (n_positions,), optional

    Returns
    -------
    SystemPlan or None
        ``None`` for a single channel without a subwoofer (nothing to plan).
    """
    names = [ch.name for ch in channels]
    n_ch = len(names)
    if design.subwoofer is not None and design.subwoofer not in names:
        raise SettingsError(
            f"--subwoofer {design.subwoofer}: not one of the channel names {', '.join(names)}; "
            "name the channels with --names"
        )
    sub = names.index(design.subwoofer) if design.subwoofer is not None else None
    if n_ch < 2:
        if sub is not None:
            raise SettingsError("--subwoofer: a subwoofer needs at least one main loudspeaker")
        return None
    roles = [SUB if c == sub else MAIN for c in range(n_ch)]
    mains = [c for c in range(n_ch) if c != sub]
    baked = design.align is not False
    temp = float(design.temperature_c)
    c_m_s = speed_of_sound_m_s(temp)
    arrivals = np.stack([ch.arrival_s for ch in channels], axis=1)
    ref = mains[0]
    for p in range(arrivals.shape[0]):  # mains: cross-correlation against the first main
        for c in mains[1:]:
            arrivals[p, c] = arrivals[p, ref] + relative_arrival_s(
                irs[p, c], irs[p, ref], fs, arrivals[p, c] * fs, arrivals[p, ref] * fs
            )
    arrival = mean_arrival_s(arrivals, weights)

    bands: list[tuple[float, float]] = []
    levels = np.empty(n_ch)
    for c, ch in enumerate(channels):
        if c == sub:
            band = design.sub_level_band_hz or sub_level_band_hz(
                ch.band_hz, design.crossover_range_hz
            )
        else:
            band = design.level_band_hz
        band = (float(band[0]), float(band[1]))
        bands.append(band)
        corrected = ch.average_db + ch.correction_db - target_shape_db
        levels[c] = band_level_db(freq_hz, corrected, band)
    route_gain_db = -20.0 * np.log10(len(mains)) if sub is not None else 0.0
    offsets = np.zeros(n_ch)
    if sub is not None:
        offsets[sub] = route_gain_db
    # the subwoofer is judged as heard through its route from one input
    trims = level_trims_db(levels, offsets)

    delays = np.zeros(n_ch)
    delays[mains] = arrival_delays_s(arrival[mains])
    polarity = [1] * n_ch
    integration = None
    summed_measured = None
    if sub is not None:
        grid = search_grid_hz(design.crossover_range_hz)
        measured, corr = _responses(irs, fs, firs, grid)
        gain = 10.0 ** (trims / 20.0)
        gain_pair = gain.copy()
        gain_pair[sub] *= 10.0 ** (route_gain_db / 20.0)
        with_filters = measured * corr[None] * gain_pair[None, :, None]
        main_raw = np.moveaxis(with_filters[:, mains], 1, 0)
        align = np.exp(-2j * np.pi * np.outer(delays[mains], grid))[:, None, :]
        centre = float(arrival[mains].max() - arrival[sub])
        integration = search_integration(
            main_raw * align,
            with_filters[:, sub],
            main_raw,
            with_filters[:, sub],
            grid,
            fs,
            design.crossover_range_hz,
            design.crossover_slope_db_oct,
            weights,
            delay_centre_s=centre,
            max_cut_db=float(design.max_cut_db),
        )
        delays[sub] = integration.sub_delay_s
        polarity[sub] = integration.sub_polarity
        delays -= min(0.0, float(delays.min()))
        summed_measured = smoothed_db(
            np.moveaxis(measured[:, mains], 1, 0) + measured[None, :, sub], grid
        )
    delay_samples = {int(r): [int(round(d * r)) for d in delays] for r in sorted(firs)}
    return SystemPlan(
        names=names,
        roles=roles,
        arrival_s=arrival,
        delay_s=delays,
        delay_samples=delay_samples,
        distance_m=delays * c_m_s,
        trim_db=trims,
        level_db=levels,
        level_band_hz=bands,
        polarity=polarity,
        baked=baked,
        c_m_s=c_m_s,
        temperature_c=temp,
        sub_route_gain_db=float(route_gain_db),
        integration=integration,
        summed_measured_db=summed_measured,
    )


def shared_cut_fir(integ: Integration, fs: int, n_taps: int) -> np.ndarray | None:
    """Minimum-phase FIR of the integration's shared cut at ``fs``, or ``None`` without one.

    Returns
    -------
    ndarray, shape (n_taps,), or None
    """
    cut = integ.shared_cut_db
    if cut is None or not np.any(cut < 0):
        return None
    # as long as its own lowest frequency asks (the resolution rule of the corrections),
    # never longer than the filters it goes into
    n = min(n_taps, default_n_taps(fs, float(integ.freq_hz[0])))
    return synthesize_fir(integ.freq_hz, cut, fs, n)


def apply_plan(
    firs: dict[int, np.ndarray], plan: SystemPlan, lengths: dict[int, list[int]] | None = None
) -> dict[int, np.ndarray]:
    """Put crossover, shared cut, polarity and (when baked) delays and trims into the filters.

    Every filter of one rate gets the same length: the correction's length
    plus the largest delay in samples at that rate. The shared cut (only a
    cut, the same for every output) is convolved in and the result kept at
    the correction's length, as the crossover is.

    Parameters
    ----------
    firs : dict of int to ndarray, shape (n_channels, n_taps)
    plan : SystemPlan
    lengths : dict of int to list of int, optional
        Each row's own length per rate when rows are zero-padded to a longer
        common one (a main beside a subwoofer reaching lower): the crossover
        and the shared cut are then kept at the row's own length, zeros after.

    Returns
    -------
    dict of int to ndarray, shape (n_channels, n_taps + max delay samples)
    """
    integ = plan.integration

    def at_rate(rate: int) -> np.ndarray:
        h = firs[rate]
        shifts = plan.delay_samples[rate] if plan.baked else [0] * h.shape[0]
        n_out = h.shape[1] + max(shifts)
        cut = None
        if integ is not None:
            lp, hp = linkwitz_riley_sos(integ.crossover_hz, rate, integ.slope_db_oct)
            cut = shared_cut_fir(integ, rate, h.shape[1])
        rows = []
        for c in range(h.shape[0]):
            x = h[c] if lengths is None else h[c, : lengths[rate][c]]
            if cut is not None:
                x = fftconvolve(x, cut)[: x.size]
            if integ is not None:
                x = apply_crossover(x, lp if plan.roles[c] == SUB else hp)
            x = x * plan.polarity[c]
            if plan.baked:
                x = x * 10.0 ** (plan.trim_db[c] / 20.0)
            rows.append(shift_samples(x, shifts[c], n_out))
        return np.stack(rows)

    # the rates side by side (their FFTs and filters release the interpreter lock)
    rates = list(firs)
    return dict(zip(rates, thread_map(at_rate, rates, cost=float), strict=True))
