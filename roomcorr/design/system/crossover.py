"""Linkwitz-Riley crossovers and the search that joins a subwoofer to the mains.

Crossover
---------
A Linkwitz-Riley crossover of order ``2n`` is a Butterworth filter of order
``n`` applied twice, for the low-pass and for the high-pass. The slopes
offered are 12, 24 (default) and 48 dB per octave (orders 2, 4 and 8). Each
half is -6 dB at the crossover frequency, its gain never exceeds 1 (it only
cuts), and the two halves sum to an all-pass: for orders 4 and 8 as they
are, for order 2 with one of them inverted (the polarity search below finds
that by itself).

Subwoofer integration
---------------------
With the main loudspeakers and a subwoofer measured separately at the same
positions (impulse responses sharing one time origin), the search chooses
the crossover frequency (from a range the user can limit), the subwoofer's
delay and its polarity. Every candidate is judged on the complex sum
``main * correction_main * high-pass + sub * correction_sub * low-pass *
polarity * delay`` at every position and for every main loudspeaker, so the
phase of the minimum-phase correction filters is part of the loop. The cost
of one candidate, averaged over positions (with their weights) and mains:

* the RMS deviation (dB) of the 1/6-octave smoothed sum from its own mean,
  from half to twice the crossover frequency (smoothness);
* plus half the mean loss (dB) of the sum against the in-phase sum of the
  two magnitudes (loudness: cancellation costs level);
* plus the depth (dB) by which the deepest dip of the smoothed sum falls
  more than 4 dB below its mean (no deep holes at any seat).

The grid: crossover frequencies 1/12 octave apart across the range, every
delay from ``-DELAY_SPAN_S`` to ``+DELAY_SPAN_S`` in steps of
``DELAY_STEP_S`` around the delay that aligns the onsets, both
polarities. Its size is reported.

Shared cut of the sum
---------------------
Once crossover, delay and polarity are chosen, what is left of the sum's
irregularity is the magnitude the two paths add up to, not their phase
(in the simulated rooms the chosen sum is within about 0.2 dB RMS as
smooth as the in-phase sum of the two magnitudes). Each loudspeaker's own
correction cannot see that sum. :func:`shared_cut_db` therefore designs
one more curve on the summed responses themselves (every position, every
main): a cut of the peaks above each sum's own mean over the crossover
region that :data:`SHARED_CUT_SHARE` of the sums show. The curve is applied
to every output alike, so it multiplies each sum exactly and leaves the
phase relation the search chose untouched. It only cuts: no boost, no
filling of dips, no extra drive below any loudspeaker's limit. The share is
stricter than a single loudspeaker's agreement rule (``AGREE_SHARE`` of
``design/curve/area.py``) because a peak of a sum of two sources moves faster
with the listener than a modal peak of one: their path difference changes
too.

References
----------
.. [1] S. H. Linkwitz, "Active crossover networks for noncoincident
       drivers", JAES 24(1), 1976.
.. [2] S. Butterworth, "On the theory of filter amplifiers", Wireless
       Engineer 7, 1930.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.signal import butter, sosfilt

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.design.curve.area import agreement_limits
from roomcorr.grid import points_per_octave_of

#: Linkwitz-Riley slopes offered, dB per octave (orders 2, 4, 8).
SLOPES_DB_OCT = (12, 24, 48)
#: Crossover frequency candidates per octave.
CROSSOVER_STEPS_PER_OCT = 12
#: Sub delay searched on either side of the onset-aligned delay, s.
DELAY_SPAN_S = 0.010
#: Step of the delay search, s (10 degrees at 280 Hz).
DELAY_STEP_S = 0.0001
#: Width of the smoothing the cost is computed on, octaves.
SMOOTHING_OCT = 1.0 / 6.0
#: Weight of the level loss against the smoothness in the cost.
LOSS_WEIGHT = 0.5
#: Dips of the smoothed sum deeper than this below its mean are penalised, dB.
DIP_FREE_DB = 4.0
#: The cost's region runs from ``fc / REGION_FACTOR`` to ``fc * REGION_FACTOR``.
REGION_FACTOR = 2.0
#: A peak of the sum is cut as far as this share of the summed responses
#: (positions x mains) rises above its own mean.
SHARED_CUT_SHARE = 0.9


def butterworth_order(slope_db_oct: int) -> int:
    """Order of the Butterworth section a Linkwitz-Riley slope is built from (12 -> 1)."""
    if slope_db_oct not in SLOPES_DB_OCT:
        raise ValueError(f"slope must be one of {SLOPES_DB_OCT} dB/octave, got {slope_db_oct}")
    return slope_db_oct // 12


def linkwitz_riley_sos(
    fc_hz: float, fs: float, slope_db_oct: int = 24
) -> tuple[np.ndarray, np.ndarray]:
    """Digital Linkwitz-Riley low-pass and high-pass as second-order sections.

    Each is a Butterworth filter (bilinear transform, ``scipy.signal.butter``)
    cascaded with itself.

    Parameters
    ----------
    fc_hz : float
        Crossover frequency, below ``fs / 2``.
    fs : float
        Sample rate in Hz.
    slope_db_oct : int
        12, 24 or 48.

    Returns
    -------
    lp_sos, hp_sos : ndarray, shape (n_sections, 6)

    References
    ----------
    .. [1] S. H. Linkwitz, JAES 24(1), 1976.
    """
    n = butterworth_order(slope_db_oct)
    lp = butter(n, fc_hz, "lowpass", fs=fs, output="sos")
    hp = butter(n, fc_hz, "highpass", fs=fs, output="sos")
    return np.vstack([lp, lp]), np.vstack([hp, hp])


def linkwitz_riley_response(
    freq_hz: np.ndarray, fc_hz: float, fs: float, slope_db_oct: int = 24
) -> tuple[np.ndarray, np.ndarray]:
    """Complex responses of the low-pass and high-pass at ``freq_hz``.

    The responses of the filters :func:`linkwitz_riley_sos` designs, computed from their
    analog prototype: the bilinear transform maps the analog frequency
    ``2 fs tan(pi f / fs)`` to ``f`` exactly, and ``scipy.signal.butter`` prewarps the cutoff
    the same way, so each Butterworth section's digital response at ``f`` is the analog
    one, ``1 / B(j x)`` (low-pass) and ``(j x)^n / B(j x)`` (high-pass), at
    ``x = tan(pi f / fs) / tan(pi fc / fs)``, with ``B`` the normalised Butterworth
    polynomial (poles ``exp(j pi (2k + n + 1) / (2n))``); the Linkwitz-Riley filter is its
    square. Equal to ``scipy.signal.sosfreqz`` of those sections to rounding (tested), for a
    few array operations instead of one polynomial per call.

    Returns
    -------
    lp, hp : ndarray, shape (n_freqs,), complex

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing, 3rd ed.,
           sec. 7.2 (the bilinear transformation and its frequency warping).
    """
    n = butterworth_order(slope_db_oct)
    if not 0.0 < fc_hz < fs / 2.0:
        raise ValueError(f"crossover {fc_hz} Hz must lie between 0 and fs/2 = {fs / 2} Hz")
    s = 1j * (np.tan(np.pi * np.asarray(freq_hz, dtype=float) / fs) / np.tan(np.pi * fc_hz / fs))
    poles = np.exp(1j * np.pi * (2.0 * np.arange(n) + n + 1.0) / (2.0 * n))
    b = np.prod(s[:, None] - poles[None, :], axis=1)
    return (1.0 / b) ** 2, (s**n / b) ** 2


def apply_crossover(h: np.ndarray, sos: np.ndarray) -> np.ndarray:
    """Filter FIR ``h`` with a crossover half, keeping its length.

    The result is the first ``len(h)`` samples of ``h`` convolved with the
    half's impulse response. Its gain is that of ``h`` times a gain of at
    most 1, so a crossover never adds boost.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    sos : ndarray, shape (n_sections, 6)

    Returns
    -------
    ndarray, shape (n_taps,)
    """
    return sosfilt(sos, np.asarray(h, dtype=np.float64))


def crossover_candidates(range_hz: tuple[float, float]) -> np.ndarray:
    """Crossover frequencies searched: 1/12 octave apart, both ends included."""
    lo, hi = float(range_hz[0]), float(range_hz[1])
    if hi <= lo:
        return np.array([lo])
    n = max(1, int(np.ceil(np.log2(hi / lo) * CROSSOVER_STEPS_PER_OCT)))
    return lo * (hi / lo) ** (np.arange(n + 1) / n)


def search_grid_hz(range_hz: tuple[float, float], points_per_octave: int = 48) -> np.ndarray:
    """Log grid covering every candidate's region plus room for the smoothing, Hz."""
    lo = range_hz[0] / REGION_FACTOR * 2.0 ** (-SMOOTHING_OCT)
    hi = range_hz[1] * REGION_FACTOR * 2.0**SMOOTHING_OCT
    n = int(np.ceil(np.log2(hi / lo) * points_per_octave)) + 1
    return lo * 2.0 ** (np.arange(n) / points_per_octave)


def smoothed_db(resp: np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
    """1/6-octave power-smoothed level (dB) of complex responses on a log grid.

    Parameters
    ----------
    resp : ndarray, shape (..., n_freqs), complex
    freq_hz : ndarray, shape (n_freqs,)
    """
    power = np.abs(resp) ** 2
    sm = smooth_log_grid(power, points_per_octave_of(freq_hz), SMOOTHING_OCT)
    return 10.0 * np.log10(np.maximum(sm, 1e-30))


def region_mask(freq_hz: np.ndarray, fc_hz: float) -> np.ndarray:
    """Points of ``freq_hz`` from ``fc / 2`` to ``2 fc``."""
    return (freq_hz >= fc_hz / REGION_FACTOR) & (freq_hz <= fc_hz * REGION_FACTOR)


def region_figures(level_db: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """RMS deviation from the mean and deepest dip below the mean inside ``mask``, dB.

    Parameters
    ----------
    level_db : ndarray, shape (..., n_freqs)
    mask : ndarray of bool, shape (n_freqs,)

    Returns
    -------
    rms_dev_db, dip_db : ndarray, shape (...)
    """
    x = level_db[..., mask]
    mean = x.mean(axis=-1, keepdims=True)
    dev = np.sqrt(np.mean((x - mean) ** 2, axis=-1))
    dip = (mean[..., 0] - x.min(axis=-1)).clip(min=0.0)
    return dev, dip


def shared_cut_db(
    freq_hz: np.ndarray, level_db: np.ndarray, fc_hz: float, max_cut_db: float
) -> np.ndarray:
    """Cut (dB, never positive) of the peaks the summed responses share around ``fc``.

    Each sum's level is taken relative to its own mean from ``fc / 2`` to
    ``2 fc`` (the figure the search minimises); the cut at each frequency is
    the excess that :data:`SHARED_CUT_SHARE` of the sums reach
    (:func:`roomcorr.design.curve.area.agreement_limits`), at most ``max_cut_db``.
    Outside the region it falls to 0 dB with a raised cosine over
    :data:`SMOOTHING_OCT` (the resolution it was designed at).

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
        Log grid reaching at least ``SMOOTHING_OCT`` beyond the region
        (:func:`search_grid_hz`).
    level_db : ndarray, shape (n_sums, n_freqs)
        Smoothed levels of the summed responses (:func:`smoothed_db`).
    fc_hz : float
    max_cut_db : float

    Returns
    -------
    ndarray, shape (n_freqs,)
    """
    f = np.asarray(freq_hz, dtype=float)
    x = np.asarray(level_db, dtype=float).reshape(-1, f.size)
    mask = region_mask(f, fc_hz)
    rel = x - x[:, mask].mean(axis=1, keepdims=True)
    _, cut_ok = agreement_limits(rel, np.zeros(f.size), SHARED_CUT_SHARE)
    lo, hi = np.log2(fc_hz / REGION_FACTOR), np.log2(fc_hz * REGION_FACTOR)
    octs = np.log2(f)
    beyond = np.maximum(lo - octs, octs - hi).clip(min=0.0) / SMOOTHING_OCT
    fade = np.cos(0.5 * np.pi * np.minimum(beyond, 1.0)) ** 2
    return -np.minimum(cut_ok, max_cut_db) * fade


@dataclass
class Integration:
    """What the subwoofer search chose and the figures behind the choice.

    Curves are on ``freq_hz`` (the search grid); ``summed_*_db`` have shape
    (n_mains, n_positions, n_freqs). ``shared_cut_db`` (n_freqs,) is the cut
    applied to every output (:func:`shared_cut_db`), ``None`` without one;
    the figures and summed curves include it, the baseline's too (it stays in
    the filters when the delay is taken away).
    """

    crossover_hz: float
    slope_db_oct: int
    sub_delay_s: float
    sub_polarity: int
    cost: float
    rms_dev_db: float
    baseline_rms_dev_db: float
    centre_dip_db: float
    loss_db: float
    n_candidates: int
    n_frequencies: int
    n_delays: int
    freq_hz: np.ndarray
    summed_after_db: np.ndarray = field(repr=False)
    summed_baseline_db: np.ndarray = field(repr=False)
    shared_cut_db: np.ndarray | None = field(default=None, repr=False)


def _costs(
    main: np.ndarray,
    sub: np.ndarray | None,
    freq_hz: np.ndarray,
    fc_hz: float,
    weights: np.ndarray,
    ideal_db: np.ndarray | None = None,
    total_db: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Cost terms of summed responses.

    ``main`` (n_mains, n_pos, n_f) and ``sub`` (..., 1, n_pos, n_f) broadcast
    against each other. Returns ``cost, rms_dev, loss, dip`` with the leading
    shape of the broadcast (mains and positions averaged; dip per position
    kept for the caller as ``(..., n_pos)``). ``ideal_db``, the smoothed
    in-phase sum of the magnitudes, does not depend on delay or polarity and
    may be passed in; so may ``total_db``, the smoothed level of the sums.
    """
    mask = region_mask(freq_hz, fc_hz)
    total_db = smoothed_db(main + sub, freq_hz) if total_db is None else total_db
    if ideal_db is None:
        ideal_db = smoothed_db(np.abs(main) + np.abs(sub), freq_hz)
    dev, dip = region_figures(total_db, mask)
    loss = np.mean((ideal_db - total_db)[..., mask], axis=-1)
    per = dev + LOSS_WEIGHT * loss + np.maximum(dip - DIP_FREE_DB, 0.0)
    w = weights / weights.sum()
    cost = np.mean(per @ w, axis=-1)
    return cost, np.mean(dev @ w, axis=-1), np.mean(loss @ w, axis=-1), dip.max(axis=-2)


def search_integration(
    main: np.ndarray,
    sub: np.ndarray,
    main_raw: np.ndarray,
    sub_raw: np.ndarray,
    freq_hz: np.ndarray,
    fs: float,
    range_hz: tuple[float, float],
    slope_db_oct: int = 24,
    weights: np.ndarray | None = None,
    delay_centre_s: float = 0.0,
    centre_position: int = 0,
    max_cut_db: float = 0.0,
) -> Integration:
    """Choose crossover frequency, subwoofer delay and polarity.

    Parameters
    ----------
    main : ndarray, shape (n_mains, n_positions, n_freqs), complex
        Each main loudspeaker at each position with its correction filter,
        alignment delay and level trim applied (no crossover yet).
    sub : ndarray, shape (n_positions, n_freqs), complex
        The subwoofer with its correction filter and level trim (no delay).
    main_raw, sub_raw : ndarray, same shapes
        The same without any delay (as measured, corrections and trims
        applied): the baseline "no delay, normal polarity" is judged on them.
    freq_hz : ndarray, shape (n_freqs,)
        Log grid (:func:`search_grid_hz`).
    fs : float
        Sample rate the crossover is evaluated at.
    range_hz : (float, float)
        Crossover frequency range.
    slope_db_oct : int
    weights : ndarray, shape (n_positions,), optional
    delay_centre_s : float
        Sub delay that aligns the onsets; the search spans ``DELAY_SPAN_S``
        around it.
    centre_position : int
        Position whose deepest dip is reported (the main seat).
    max_cut_db : float
        Deepest shared cut of the sum (:func:`shared_cut_db`) designed after
        the choice; 0 for none.

    Returns
    -------
    Integration
    """
    n_mains, n_pos, n_f = main.shape
    w = np.ones(n_pos) if weights is None else np.asarray(weights, dtype=float)
    cands = crossover_candidates(range_hz)
    n_half = int(round(DELAY_SPAN_S / DELAY_STEP_S))
    delays = delay_centre_s + DELAY_STEP_S * np.arange(-n_half, n_half + 1)
    pols = np.array([1.0, -1.0])
    wt = 2.0 * np.pi * np.outer(delays, freq_hz)  # (n_d, n_f)
    cos_d, sin_d = np.cos(wt), np.sin(wt)
    # each candidate is judged on its region plus room for the smoothing window
    margin = int(np.ceil(SMOOTHING_OCT / 2 * points_per_octave_of(freq_hz))) + 2
    best: tuple[float, float, float, int] | None = None
    for fc in cands:
        inside = np.flatnonzero(region_mask(freq_hz, fc))
        sel = slice(max(inside[0] - margin, 0), min(inside[-1] + margin + 1, n_f))
        f = freq_hz[sel]
        lp, hp = linkwitz_riley_response(f, fc, fs, slope_db_oct)
        m = main[..., sel] * hp  # (n_m, n_p, n_f)
        s = sub[..., sel] * lp  # (n_p, n_f)
        ideal = smoothed_db(np.abs(m) + np.abs(s), f)
        # |m + p e^{-jwt} s|^2 = |m|^2 + |s|^2 + 2 p Re(m conj(s) e^{jwt}) for polarity p
        # and delay t; the smoothing is linear, so each term is smoothed once
        ppo = points_per_octave_of(f)
        x = m * np.conj(s)  # (n_m, n_p, n_f)
        cross = smooth_log_grid(
            x.real[None] * cos_d[:, None, None, sel] - x.imag[None] * sin_d[:, None, None, sel],
            ppo,
            SMOOTHING_OCT,
        )  # (n_d, n_m, n_p, n_f)
        plain = smooth_log_grid(np.abs(m) ** 2 + np.abs(s) ** 2, ppo, SMOOTHING_OCT)
        power = plain + 2.0 * pols[:, None, None, None, None] * cross[None]
        total = 10.0 * np.log10(np.maximum(power, 1e-30))  # (2, n_d, n_m, n_p, n_f)
        cost, _, _, _ = _costs(m, None, f, fc, w, ideal, total)  # (2, n_d)
        k = np.unravel_index(int(np.argmin(cost)), cost.shape)
        c = float(cost[k])
        if best is None or c < best[0] - 1e-9:
            best = (c, float(fc), float(delays[k[1]]), int(pols[k[0]]))
    assert best is not None
    cost, fc, tau, pol = best
    lp, hp = linkwitz_riley_response(freq_hz, fc, fs, slope_db_oct)
    m_after = main * hp
    s_after = pol * sub * lp * np.exp(-2j * np.pi * freq_hz * tau)
    cut = None
    if max_cut_db > 0:
        cut = shared_cut_db(freq_hz, smoothed_db(m_after + s_after, freq_hz), fc, max_cut_db)
        g = 10.0 ** (cut / 20.0)
        m_after, s_after = m_after * g, s_after * g
        hp, lp = hp * g, lp * g
    _, dev, loss, dip = _costs(m_after, s_after, freq_hz, fc, w)
    base_m, base_s = main_raw * hp, sub_raw * lp
    _, base_dev, _, _ = _costs(base_m, base_s, freq_hz, fc, w)
    return Integration(
        crossover_hz=fc,
        slope_db_oct=slope_db_oct,
        sub_delay_s=tau,
        sub_polarity=pol,
        cost=cost,
        rms_dev_db=float(dev),
        baseline_rms_dev_db=float(base_dev),
        centre_dip_db=float(dip[centre_position]),
        loss_db=float(loss),
        n_candidates=int(cands.size * delays.size * pols.size),
        n_frequencies=int(cands.size),
        n_delays=int(delays.size),
        freq_hz=freq_hz,
        summed_after_db=smoothed_db(m_after + s_after, freq_hz),
        summed_baseline_db=smoothed_db(base_m + base_s, freq_hz),
        shared_cut_db=cut,
    )
