"""Several subwoofers chosen together for even bass over the listening area.

One subwoofer cannot make two seats agree: each seat hears its own mix of
the room's modes, and a filter on one source changes every seat alike. With
two to four subwoofers at different places, their levels, delays and
polarities decide which modes are excited and how strongly, and so how much
the seats differ. This module chooses them, per subwoofer, to minimise the
**seat-to-seat spread**: the weighted standard deviation over the measured
positions of the 1/6-octave level, averaged over a log-frequency grid from
:data:`SPREAD_LO_HZ` to twice the highest crossover frequency the design may
choose (the method of Welti & Devantier [1]_; the figure is ours, see
:func:`seat_spread_db`). Only then does the design treat the subwoofers as
one source ("the array"): one common correction for its average and one
crossover to the mains (``roomcorr.pipeline``, ``roomcorr.design.system.align``).

The search (:func:`plan_subwoofers`) is a coordinate descent: one subwoofer
at a time takes the best of every delay in :data:`DELAYS_S`, polarity and
level in :data:`GAINS_DB` (cuts only, the loudest subwoofer at 0 dB), with
the others held; rounds repeat until nothing improves. It starts from every
subwoofer fed equally and from each subwoofer alone (the others at
:data:`OFF_DB`), and keeps the best end point, so its result on the measured
seats is never worse than equal feed nor than the best single subwoofer.
A configuration whose summed level falls more than :data:`MAX_LOSS_DB`
below the power sum of its subwoofers (cancellation bought evenness with
output) pays :data:`LOSS_WEIGHT` dB of spread per dB beyond it.

A subwoofer the search turns down by :data:`WELL_DOWN_DB` or more makes the
seats differ more where it stands; the design says so (it is never boosted).

The leave-one-position-out prediction (:func:`leave_one_out_spread_db`)
repeats the search without each position in turn and measures how far the
left-out seat's level lies from the mean of the others, for the chosen
settings and for equal feed: what to expect at seats nobody measured.

All functions are pure (arrays in, arrays out).

References
----------
.. [1] T. Welti and A. Devantier, "Low-frequency optimization using multiple
       subwoofers", J. Audio Eng. Soc. 54(5), 2006.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from roomcorr.design.system.crossover import linkwitz_riley_response

#: Lowest frequency of the spread figure, Hz (issue 20: 20 Hz to twice the crossover).
SPREAD_LO_HZ = 20.0
#: Grid density of the figure, points per octave.
POINTS_PER_OCTAVE = 24
#: Smoothing of the levels, octaves (1/6 octave, a box on the log grid).
SMOOTHING_OCT = 1.0 / 6.0
#: Delays offered to each subwoofer, s (0 to 20 ms in 0.5 ms steps, 1/20 of a period at
#: 100 Hz; 20 ms is 6.9 m at 343 m/s, more than the path differences of a domestic room).
DELAYS_S = np.arange(0.0, 0.02 + 1e-9, 0.0005)
#: Levels offered to each subwoofer, dB (cuts only).
GAINS_DB = np.array([0.0, -1.5, -3.0, -4.5, -6.0, -9.0, -12.0, -20.0, -60.0])
#: Level of a subwoofer switched off, dB (0.1 % of its amplitude: off in effect, and a
#: finite figure for the manifest).
OFF_DB = -60.0
#: A subwoofer cut this much or more is reported as making things worse where it stands.
WELL_DOWN_DB = 12.0
#: Loss of summed level tolerated before it is charged, dB ...
MAX_LOSS_DB = 3.0
#: ... and what each dB beyond it costs, in dB of spread.
LOSS_WEIGHT = 0.25
#: Rounds of the coordinate descent at most.
MAX_ROUNDS = 4


@dataclass
class SubArrayPlan:
    """What the search chose for each subwoofer and the figures behind it.

    Attributes
    ----------
    names : list of str
    channels : list of int
        Channel index of each subwoofer in the measurement.
    delay_s, gain_db : ndarray, shape (n_subs,)
        Relative delay (the earliest 0) and level (the loudest 0 dB, never above).
    polarity : list of int
    filter : list of str
        Individual filter of each subwoofer ("none": only the common correction).
    spread_equal_db, spread_after_db : float
        Seat-to-seat spread at the measured positions, fed equally with no
        delay, and as chosen.
    spread_single_db : ndarray, shape (n_subs,)
        Spread of each subwoofer alone.
    loo_equal_db, loo_after_db : float or None
        Leave-one-position-out prediction (``None`` with fewer than three positions).
    turned_down : list of bool
        Cut by :data:`WELL_DOWN_DB` or more.
    band_hz : (float, float)
    n_evaluations : int
    """

    names: list[str]
    channels: list[int]
    delay_s: np.ndarray
    gain_db: np.ndarray
    polarity: list[int]
    filter: list[str]
    spread_equal_db: float
    spread_after_db: float
    spread_single_db: np.ndarray
    loo_equal_db: float | None
    loo_after_db: float | None
    turned_down: list[bool]
    band_hz: tuple[float, float]
    n_evaluations: int = 0
    freq_hz: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)


def spread_grid_hz(hi_hz: float, lo_hz: float = SPREAD_LO_HZ) -> np.ndarray:
    """Log grid of the spread figure, ``lo_hz`` to ``hi_hz`` at :data:`POINTS_PER_OCTAVE`."""
    n = int(np.ceil(np.log2(hi_hz / lo_hz) * POINTS_PER_OCTAVE)) + 1
    return lo_hz * 2.0 ** (np.arange(n) / POINTS_PER_OCTAVE)


def _smooth_power(power: np.ndarray) -> np.ndarray:
    """1/6-octave box average along the last axis of a power on the log grid (edges shrink)."""
    half = int(round(SMOOTHING_OCT * POINTS_PER_OCTAVE / 2))
    n = power.shape[-1]
    c = np.cumsum(np.concatenate([np.zeros(power.shape[:-1] + (1,)), power], axis=-1), axis=-1)
    lo = np.clip(np.arange(n) - half, 0, n)
    hi = np.clip(np.arange(n) + half + 1, 0, n)
    return (c[..., hi] - c[..., lo]) / (hi - lo)


def seat_levels_db(resp: np.ndarray) -> np.ndarray:
    """1/6-octave level in dB of complex responses on the spread grid (any leading shape)."""
    return 10.0 * np.log10(np.maximum(_smooth_power(np.abs(resp) ** 2), 1e-30))


def seat_spread_db(level_db: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """Seat-to-seat spread: weighted std over positions, averaged over frequency.

    Parameters
    ----------
    level_db : ndarray, shape (..., n_positions, n_freqs)
    weights : ndarray, shape (n_positions,), optional

    Returns
    -------
    ndarray, shape (...)
    """
    n_pos = level_db.shape[-2]
    w = np.ones(n_pos) if weights is None else np.asarray(weights, dtype=float)
    w = w / w.sum()
    mean = np.einsum("...pf,p->...f", level_db, w)
    var = np.einsum("...pf,p->...f", (level_db - mean[..., None, :]) ** 2, w)
    return np.sqrt(var).mean(axis=-1)


def _coefficients(freq_hz, delay_s, gain_db, polarity) -> np.ndarray:
    """Complex feed of each subwoofer, shape (n_subs, n_freqs)."""
    g = 10.0 ** (np.asarray(gain_db) / 20.0) * np.asarray(polarity)
    return g[:, None] * np.exp(-2j * np.pi * np.outer(delay_s, freq_hz))


def _cost(total: np.ndarray, power_sum: np.ndarray, weights) -> np.ndarray:
    """Spread plus the charge for lost level; total (..., P, F), power_sum (..., P, F)."""
    level = seat_levels_db(total)
    spread = seat_spread_db(level, weights)
    ref = seat_levels_db(np.sqrt(power_sum))
    loss = (ref - level).mean(axis=(-2, -1))
    return spread + LOSS_WEIGHT * np.maximum(loss - MAX_LOSS_DB, 0.0)


def _descend(
    resp, freq_hz, weights, delay, gain, pol, base=None
) -> tuple[float, np.ndarray, np.ndarray, list, int]:
    """Coordinate descent from one start; returns cost, delays, gains, polarities, evaluations."""
    n_sub = resp.shape[1]
    delay, gain, pol = delay.copy(), gain.copy(), list(pol)
    cand_d, cand_p, cand_g = np.meshgrid(DELAYS_S, [1, -1], GAINS_DB, indexing="ij")
    cand_d, cand_p, cand_g = cand_d.ravel(), cand_p.ravel(), cand_g.ravel()
    cand = _coefficients(freq_hz, cand_d, cand_g, cand_p)  # (C, F)
    cand_pow = 10.0 ** (cand_g / 10.0)
    h_pow = np.abs(resp) ** 2  # (P, S, F)
    base_pow = 0.0 if base is None else np.abs(base) ** 2
    evals = 0
    best = np.inf
    for _ in range(MAX_ROUNDS):
        improved = False
        for k in range(n_sub):
            coef = _coefficients(freq_hz, delay, gain, pol)
            others = np.einsum("psf,sf->pf", resp, coef) - coef[k] * resp[:, k]
            others_pow = np.einsum("psf,s->pf", h_pow, 10.0 ** (gain / 10.0)) - (
                10.0 ** (gain[k] / 10.0) * h_pow[:, k]
            )
            if base is not None:
                others = others + base
                others_pow = others_pow + base_pow
            total = others[None] + cand[:, None, :] * resp[None, :, k]
            power_sum = others_pow[None] + cand_pow[:, None, None] * h_pow[None, :, k]
            costs = _cost(total, power_sum, weights)
            evals += costs.size
            i = int(np.argmin(costs))
            if costs[i] < best - 1e-6:
                best = float(costs[i])
                delay[k], gain[k], pol[k] = cand_d[i], cand_g[i], int(cand_p[i])
                improved = True
        if not improved:
            break
    return best, delay, gain, pol, evals


def _search(resp, freq_hz, weights, base=None) -> tuple[np.ndarray, np.ndarray, list[int], int]:
    """Best delays, gains (loudest 0 dB) and polarities from every start."""
    n_sub = resp.shape[1]
    starts = [np.zeros(n_sub)]
    for k in range(n_sub):
        g = np.full(n_sub, OFF_DB)
        g[k] = 0.0
        starts.append(g)
    best = None
    evals = 0
    for g0 in starts:
        out = _descend(resp, freq_hz, weights, np.zeros(n_sub), g0, [1] * n_sub, base)
        evals += out[4]
        if best is None or out[0] < best[0]:
            best = out
    assert best is not None
    _, delay, gain, pol, _ = best
    on = gain > OFF_DB + 1e-9
    if not on.any():  # all at one level: the same as all at 0 dB
        gain, on = np.zeros(n_sub), np.ones(n_sub, dtype=bool)
    gain = np.where(on, np.minimum(gain - gain[on].max(), 0.0), OFF_DB)
    delay = delay - (delay[on].min() if on.any() else delay.min())
    return np.maximum(delay, 0.0), gain, [int(p) for p in pol], evals


def array_response(resp: np.ndarray, freq_hz: np.ndarray, delay_s, gain_db, polarity) -> np.ndarray:
    """Summed response of the subwoofers at every position, shape (n_positions, n_freqs)."""
    return np.einsum("psf,sf->pf", resp, _coefficients(freq_hz, delay_s, gain_db, polarity))


def _held_out_deviation_db(level_db: np.ndarray, p: int, weights) -> float:
    """RMS over frequency of the left-out seat's level minus the others' weighted mean,
    scaled by sqrt((n-1)/n) so that it estimates the spread of the seats (for equal
    weights, E[(x_p - mean_others)^2] = sigma^2 n / (n - 1))."""
    n = level_db.shape[0]
    keep = [q for q in range(n) if q != p]
    w = np.ones(n - 1) if weights is None else np.asarray(weights, dtype=float)[keep]
    mean = np.average(level_db[keep], axis=0, weights=w)
    return float(np.sqrt(np.mean((level_db[p] - mean) ** 2)) * np.sqrt((n - 1) / n))


def leave_one_out_spread_db(
    resp: np.ndarray,
    freq_hz: np.ndarray,
    weights: np.ndarray | None = None,
    base: np.ndarray | None = None,
) -> tuple[float, float]:
    """Predicted seat-to-seat spread at unmeasured seats: (equal feed, as the search chooses).

    For each position in turn the search runs on the others; the left-out
    seat's 1/6-octave level is compared with the others' mean (RMS over the
    grid); the figure is the RMS over positions of those deviations
    (Stone, J. R. Stat. Soc. B 36(2), 1974: leave-one-out).

    Parameters
    ----------
    resp : ndarray, shape (n_positions, n_subs, n_freqs), complex
    freq_hz : ndarray, shape (n_freqs,)
    weights : ndarray, shape (n_positions,), optional
    base : ndarray, shape (n_positions, n_freqs), complex, optional
        What the seats hear besides the subwoofers (:func:`with_mains`).
    """
    n_pos, n_sub, _ = resp.shape
    b = 0.0 if base is None else base
    eq, after = [], []
    for p in range(n_pos):
        keep = [q for q in range(n_pos) if q != p]
        w = None if weights is None else np.asarray(weights)[keep]
        d, g, pol, _ = _search(resp[keep], freq_hz, w, None if base is None else base[keep])
        lev_eq = seat_levels_db(
            array_response(resp, freq_hz, np.zeros(n_sub), np.zeros(n_sub), [1] * n_sub) + b
        )
        lev = seat_levels_db(array_response(resp, freq_hz, d, g, pol) + b)
        eq.append(_held_out_deviation_db(lev_eq, p, weights))
        after.append(_held_out_deviation_db(lev, p, weights))
    return float(np.sqrt(np.mean(np.square(eq)))), float(np.sqrt(np.mean(np.square(after))))


def with_mains(
    sub_resp: np.ndarray,
    mains_resp: np.ndarray,
    freq_hz: np.ndarray,
    crossover_hz: float,
    fs: float,
) -> tuple[np.ndarray, np.ndarray]:
    """The subwoofers as the seats hear them beside both mains driven (mono bass).

    The mains get the high-pass and the subwoofers the low-pass of a 4th-order
    Linkwitz-Riley crossover at ``crossover_hz`` (the design chooses the
    crossover later; the middle of its range stands in for it); the
    subwoofers, fed equally, are matched in level to the mains' sum over half
    to twice that frequency, where both play (the design's trims do the same
    afterwards). Both mains driven is what music mostly is, and the sum the
    seats hear; the single-channel figures follow it closely in the benchmark.

    Parameters
    ----------
    sub_resp : ndarray, shape (n_positions, n_subs, n_freqs), complex
    mains_resp : ndarray, shape (n_positions, n_mains, n_freqs), complex
    freq_hz : ndarray, shape (n_freqs,)
    crossover_hz, fs : float

    Returns
    -------
    resp : ndarray, shape (n_positions, n_subs, n_freqs)
        The subwoofers through the low-pass and the level match.
    base : ndarray, shape (n_positions, n_freqs)
        Both mains through the high-pass.

    References
    ----------
    .. [1] S. H. Linkwitz, "Active crossover networks for noncoincident drivers",
           JAES 24(1), 1976.
    """
    lp, hp = linkwitz_riley_response(freq_hz, crossover_hz, fs, 24)
    mains = mains_resp.sum(axis=1)
    band = (freq_hz >= crossover_hz / 2) & (freq_hz <= 2 * crossover_hz)
    if not band.any():
        band = np.ones(freq_hz.size, dtype=bool)
    subs = sub_resp.sum(axis=1)
    k = np.sqrt(
        np.mean(np.abs(mains[:, band]) ** 2) / max(np.mean(np.abs(subs[:, band]) ** 2), 1e-30)
    )
    return sub_resp * (k * lp), mains * hp


def plan_subwoofers(
    resp: np.ndarray,
    freq_hz: np.ndarray,
    names: list[str],
    channels: list[int],
    weights: np.ndarray | None = None,
    predict: bool = True,
    base: np.ndarray | None = None,
) -> SubArrayPlan:
    """Delay, level (cut only) and polarity of every subwoofer for the least seat-to-seat spread.

    Parameters
    ----------
    resp : ndarray, shape (n_positions, n_subs, n_freqs), complex
        Each subwoofer's measured response at every position on ``freq_hz``
        (:func:`spread_grid_hz`), one time origin for all.
    freq_hz : ndarray, shape (n_freqs,)
    names : list of str
    channels : list of int
    weights : ndarray, shape (n_positions,), optional
    predict : bool
        Also compute the leave-one-position-out prediction (three positions or more).
    base : ndarray, shape (n_positions, n_freqs), complex, optional
        What the seats hear besides the subwoofers, added to their sum in every
        figure (the mains through their high-pass: :func:`with_mains`).

    Returns
    -------
    SubArrayPlan

    References
    ----------
    .. [1] T. Welti and A. Devantier, JAES 54(5), 2006.
    """
    n_pos, n_sub, _ = resp.shape
    delay, gain, pol, evals = _search(resp, freq_hz, weights, base)
    b = 0.0 if base is None else base
    zeros = np.zeros(n_sub)
    spread_eq = float(
        seat_spread_db(
            seat_levels_db(array_response(resp, freq_hz, zeros, zeros, [1] * n_sub) + b), weights
        )
    )
    spread = float(
        seat_spread_db(seat_levels_db(array_response(resp, freq_hz, delay, gain, pol) + b), weights)
    )
    single = seat_spread_db(seat_levels_db(np.moveaxis(resp, 1, 0) + b), weights)
    loo_eq = loo_after = None
    if predict and n_pos >= 3:
        loo_eq, loo_after = leave_one_out_spread_db(resp, freq_hz, weights, base)
    return SubArrayPlan(
        names=list(names),
        channels=list(channels),
        delay_s=delay,
        gain_db=gain,
        polarity=pol,
        filter=["none"] * n_sub,
        spread_equal_db=spread_eq,
        spread_after_db=spread,
        spread_single_db=np.asarray(single, dtype=float),
        loo_equal_db=loo_eq,
        loo_after_db=loo_after,
        turned_down=[bool(g <= -WELL_DOWN_DB) for g in gain],
        band_hz=(float(freq_hz[0]), float(freq_hz[-1])),
        n_evaluations=evals,
        freq_hz=freq_hz,
    )
