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

Each subwoofer's own filter is then, with a latency budget (the design's
``latency_ms``), a **shaped feed** (:mod:`roomcorr.design.system.feeds`): a smooth
complex response fitted on top of the search's delays, levels and polarities,
judged as it will be realised and through crossovers over the whole crossover
range (:func:`crossover_cases`); without one, up to :data:`MAX_CUTS` parametric cuts
(:func:`cut_sos`) chosen alternately with delay, level and polarity.

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
from functools import lru_cache

import numpy as np

from roomcorr.design.system import feeds
from roomcorr.design.system.crossover import linkwitz_riley_response
from roomcorr.design.system.feeds import DB_PER_NEPER_POWER

#: Lowest frequency of the spread figure, Hz (issue 20: 20 Hz to twice the crossover).
SPREAD_LO_HZ = 20.0
#: Grid density of the figure, points per octave.
POINTS_PER_OCTAVE = 24
#: Smoothing of the levels, octaves (1/6 octave, a box on the log grid).
SMOOTHING_OCT = 1.0 / 6.0
#: The search judges the smoothed levels at every this-many grid points (12 per octave:
#: two per smoothing width, where a 1/6-octave box average has little left between
#: them); the figures reported use every point.
COST_STEP = 2
#: Delays offered to each subwoofer, s (0 to 20 ms in 1 ms steps, 1/10 of a period at
#: 100 Hz; 20 ms is 6.9 m at 343 m/s, more than the path differences of a domestic room).
#: The shaped feed's fit then moves each delay freely and sets each level per node, so the
#: grid only has to find the right region: on the development rooms 0.5 ms steps and nine
#: levels (0 to -20 dB and off) left 0.510 of equal feed at their held-out seats, these
#: 0.497, in 0.54 s instead of 0.90 s per design.
DELAYS_S = np.arange(0.0, 0.02 + 1e-9, 0.001)
#: Levels offered to each subwoofer, dB (cuts only).
GAINS_DB = np.array([0.0, -3.0, -6.0, -12.0, -60.0])
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
#: A subwoofer's own filter: at most this many parametric cuts (peaking filters of
#: negative gain, Bristow-Johnson's cookbook form: :func:`cut_sos`).
MAX_CUTS = 2
#: Centre frequencies offered to the cuts: 1/6 octave apart from this frequency ...
CUT_LO_HZ = 25.0
#: ... to the top of the spread band, this many per octave.
CUT_STEPS_PER_OCT = 6
#: Quality factors offered (bandwidths of about 1.4, 0.7 and 0.36 octave). Narrower cuts
#: would fit the measured seats' own details, which unmeasured seats do not share.
CUT_Q = (1.0, 2.0, 4.0)
#: Depths offered, dB: cuts only.
CUT_DEPTHS_DB = (-2.0, -4.0, -6.0)
#: What each dB of cut costs, in dB of spread (regularisation: a cut must buy more
#: evenness than this to be kept, so the filters stay few and shallow).
CUT_COST_DB_PER_DB = 0.0
#: Shaped feeds (:mod:`roomcorr.design.system.feeds`) instead of cuts: each subwoofer's
#: delay, level and polarity from the search, then a smooth complex response fitted on
#: top of them.
SHAPED = True
#: With several subwoofers, the crossover frequency is the candidate whose summed system
#: leaves the least seat-to-seat spread (:func:`spread_crossover_hz`).
SPREAD_CROSSOVER = True
#: The shaped feeds' fit charges lost level per judged point (each point's mean over the
#: seats against the same of the subwoofers' power sum) instead of over the whole band.
LOCAL_LOSS = True
#: Spacing of a shaped feed's nodes, octaves, and the fit's iterations at most.
FEED_STEP_OCT = feeds.STEP_OCT
FEED_MAXITER = feeds.MAXITER


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
        Individual filter of each subwoofer in words ("none": only the common correction).
    cuts : list of list of (float, float, float)
        Each subwoofer's own cuts as (centre frequency Hz, gain dB < 0, Q); see
        :func:`cut_sos` (empty with shaped feeds).
    feed_nodes_hz, feed : ndarray or None
        Each subwoofer's shaped feed: its nodes, shape (n_nodes,), and complex node gains,
        shape (n_subs, n_nodes) (:mod:`roomcorr.design.system.feeds`); ``None`` without.
    feed_latency_s : float
        How late the feeds' FIR filters are (0 without).
    crossover_hz : float or None
        The crossover frequency chosen for the least spread (:func:`spread_crossover_hz`;
        set by the design), ``None`` when the integration chose it.
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
    cuts: list[list[tuple[float, float, float]]] = field(default_factory=list)
    feed_nodes_hz: np.ndarray | None = None
    feed: np.ndarray | None = None
    feed_latency_s: float = 0.0
    crossover_hz: float | None = None


def spread_grid_hz(hi_hz: float, lo_hz: float = SPREAD_LO_HZ) -> np.ndarray:
    """Log grid of the spread figure, ``lo_hz`` to ``hi_hz`` at :data:`POINTS_PER_OCTAVE`."""
    n = int(np.ceil(np.log2(hi_hz / lo_hz) * POINTS_PER_OCTAVE)) + 1
    return lo_hz * 2.0 ** (np.arange(n) / POINTS_PER_OCTAVE)


@lru_cache(maxsize=16)
def _smoothing_matrix(n: int) -> np.ndarray:
    """(n, n) matrix of the 1/6-octave box average on the log grid (edges shrink)."""
    half = int(round(SMOOTHING_OCT * POINTS_PER_OCTAVE / 2))
    m = np.zeros((n, n))
    for i in range(n):
        lo, hi = max(i - half, 0), min(i + half + 1, n)
        m[i, lo:hi] = 1.0 / (hi - lo)
    m.setflags(write=False)
    return m


def _smooth_power(power: np.ndarray) -> np.ndarray:
    """1/6-octave box average along the last axis of a power on the log grid (edges
    shrink), at every :data:`COST_STEP`-th point: what the search judges."""
    m = _smoothing_matrix(power.shape[-1])[::COST_STEP].T
    # one matrix product over all leading axes (a stack of small ones is slower)
    return (power.reshape(-1, power.shape[-1]) @ m).reshape(*power.shape[:-1], m.shape[1])


def seat_levels_db(resp: np.ndarray) -> np.ndarray:
    """1/6-octave level in dB of complex responses on the spread grid (any leading shape)."""
    power = np.abs(resp) ** 2
    return 10.0 * np.log10(np.maximum(power @ _smoothing_matrix(power.shape[-1]).T, 1e-30))


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


def _cost(total: np.ndarray, power_sum, weights, ref_smoothed=None) -> np.ndarray:
    """Spread plus the charge for lost level; total (..., P, F), power_sum (..., P, F)
    (or its 1/6-octave smoothing given as ``ref_smoothed``, the smoothing being linear)."""
    ref_s = _smooth_power(power_sum) if ref_smoothed is None else ref_smoothed
    return _cost_smoothed(_smooth_power(np.abs(total) ** 2), _mean_level_db(ref_s), weights)


def _mean_level_db(power_s: np.ndarray) -> np.ndarray:
    """Mean over positions and frequencies of a smoothed power in dB."""
    return (10.0 * np.log10(np.maximum(power_s, 1e-30))).mean(axis=(-2, -1))


def _cost_smoothed(power_s: np.ndarray, ref_mean_db, weights) -> np.ndarray:
    """:func:`_cost` from the smoothed power of the sum (..., P, F) and the reference's
    mean level (broadcast to ``...``).

    The same figures as :func:`seat_spread_db` on ``10 log10(power_s)`` in fewer
    passes over the candidates: natural logarithms scaled to dB after the
    reductions (a standard deviation scales with its data), and the variance as
    the mean square less the squared mean.
    """
    w = feeds.normalised_weights(weights, power_s.shape[-2])
    ln = np.maximum(power_s, 1e-30)
    np.log(ln, out=ln)
    mean = np.einsum("...pf,p->...f", ln, w)
    mean_sq = np.einsum("...pf,...pf,p->...f", ln, ln, w)
    spread = DB_PER_NEPER_POWER * np.sqrt(np.maximum(mean_sq - mean * mean, 0.0)).mean(axis=-1)
    level = mean.mean(axis=-1) if weights is None else ln.mean(axis=(-2, -1))
    loss = ref_mean_db - DB_PER_NEPER_POWER * level
    return spread + LOSS_WEIGHT * np.maximum(loss - MAX_LOSS_DB, 0.0)


#: Up to where a shaped feed's realised gain is checked, Hz (beyond, it is a plain gain).
PEAK_HI_HZ = 900.0



def cut_sos(freq_hz: float, gain_db: float, q: float, fs: float) -> np.ndarray:
    """One parametric cut as a second-order section, shape (1, 6).

    The peaking filter of Bristow-Johnson's cookbook [2]_ with ``A = 10^(gain/40)``
    and ``alpha = sin(w0) / (2 Q)``: unity gain far from ``freq_hz`` and exactly
    ``gain_db`` at it. For ``gain_db <= 0`` its gain never exceeds 0 dB (it only
    cuts); positive gains are refused.

    References
    ----------
    .. [2] R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter
           coefficients" (the peakingEQ section).
    """
    if not gain_db <= 0.0:
        raise ValueError(f"a subwoofer's own filter only cuts, got {gain_db} dB")
    a_lin = 10.0 ** (gain_db / 40.0)
    w0 = 2.0 * np.pi * freq_hz / fs
    alpha = np.sin(w0) / (2.0 * q)
    b = np.array([1.0 + alpha * a_lin, -2.0 * np.cos(w0), 1.0 - alpha * a_lin])
    a = np.array([1.0 + alpha / a_lin, -2.0 * np.cos(w0), 1.0 - alpha / a_lin])
    return np.concatenate([b / a[0], a / a[0]])[None, :]


def _cut_response(freq_hz: np.ndarray, f0_hz, gain_db, q, fs: float) -> np.ndarray:
    """Complex responses of peaking cuts (broadcast over f0_hz, gain_db, q) at ``freq_hz``
    (trailing axis); the same filters as :func:`cut_sos`."""
    f0 = np.asarray(f0_hz, dtype=float)[..., None]
    a_lin = 10.0 ** (np.asarray(gain_db, dtype=float)[..., None] / 40.0)
    w0 = 2.0 * np.pi * f0 / fs
    alpha = np.sin(w0) / (2.0 * np.asarray(q, dtype=float)[..., None])
    z1 = np.exp(-2j * np.pi * np.asarray(freq_hz) / fs)
    z2 = z1 * z1
    c = -2.0 * np.cos(w0)
    num = (1.0 + alpha * a_lin) + c * z1 + (1.0 - alpha * a_lin) * z2
    den = (1.0 + alpha / a_lin) + c * z1 + (1.0 - alpha / a_lin) * z2
    return num / den


def cuts_response(freq_hz: np.ndarray, cuts, fs: float) -> np.ndarray:
    """Complex response of one subwoofer's cuts ((f0 Hz, gain dB, Q) each) at ``freq_hz``."""
    out = np.ones(np.asarray(freq_hz).size, dtype=complex)
    for f0, g, q in cuts:
        out = out * _cut_response(freq_hz, f0, g, q, fs)
    return out


def describe_cuts(cuts) -> str:
    """A subwoofer's own filter in words ("none" without cuts)."""
    if not cuts:
        return "none"
    parts = [f"{g:+.1f} dB at {f0:.0f} Hz (Q {q:g})" for f0, g, q in cuts]
    return ("cut " if len(parts) == 1 else "cuts ") + ", ".join(parts)


def _cut_candidates(hi_hz: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every (centre, depth, Q) offered to one cut, flattened."""
    n = int(np.floor(np.log2(hi_hz / CUT_LO_HZ) * CUT_STEPS_PER_OCT)) + 1
    f0 = CUT_LO_HZ * 2.0 ** (np.arange(max(n, 1)) / CUT_STEPS_PER_OCT)
    ff, gg, qq = np.meshgrid(f0, CUT_DEPTHS_DB, CUT_Q, indexing="ij")
    return ff.ravel(), gg.ravel(), qq.ravel()


def _cut_cost(cuts: list) -> float:
    return CUT_COST_DB_PER_DB * float(sum(-g for c in cuts for _, g, _ in c))


def _cases(base, base_scale, n_pos: int, n_freq: int) -> tuple:
    """Listening cases: what the seats hear besides the subwoofers, shape (B, P, F), and
    how loud the subwoofers are in each, shape (B,); one silent case without a base."""
    if base is None:
        return np.zeros((1, n_pos, n_freq), dtype=complex), np.ones(1)
    bases = np.asarray(base)
    if bases.ndim == 2:
        bases = bases[None]
    scales = np.ones(bases.shape[0]) if base_scale is None else np.asarray(base_scale, float)
    return bases, scales


def _state_cost(resp, freq_hz, weights, delay, gain, pol, filt, cases) -> float:
    bases, scales = cases[0], cases[1]
    coef = _coefficients(freq_hz, delay, gain, pol)
    subs = np.einsum("psf,sf->pf", resp * filt[None], coef)
    power = np.einsum("psf,s->pf", np.abs(resp) ** 2, 10.0 ** (np.asarray(gain) / 10.0))
    total = bases + scales[:, None, None] * subs[None]
    power = np.abs(bases) ** 2 + (scales**2)[:, None, None] * power[None]
    return float(_cost(total, power, weights).mean())


def _descend(
    resp, freq_hz, weights, delay, gain, pol, cases, filt=None, extra=0.0
) -> tuple[float, np.ndarray, np.ndarray, list, int]:
    """Coordinate descent over delay, level and polarity from one start (each subwoofer
    through its own filter ``filt``, shape (n_subs, n_freqs)); the cost is the mean over
    the listening ``cases`` (:func:`_cases`). Returns cost (plus the fixed ``extra``),
    delays, gains, polarities, evaluations."""
    bases, scales = cases[0], cases[1]
    sc = scales[:, None, None]
    n_sub = resp.shape[1]
    delay, gain, pol = delay.copy(), gain.copy(), list(pol)
    filt = np.ones(resp.shape[1:], dtype=complex) if filt is None else filt
    cand_d, cand_p, cand_g = np.meshgrid(DELAYS_S, [1, -1], GAINS_DB, indexing="ij")
    cand_d, cand_p, cand_g = cand_d.ravel(), cand_p.ravel(), cand_g.ravel()
    # every candidate (delay d, polarity s, amplitude a) for subwoofer k hears
    # |o + s a e^{-jwd} h|^2 = |o|^2 + a^2 |h|^2 + 2 s a Re(o conj(h) e^{jwd}); the
    # smoothing is linear, so only the last term is smoothed per delay
    wd = 2.0 * np.pi * np.outer(DELAYS_S, freq_hz)
    cos_d, sin_d = np.cos(wd)[:, None, None, :], np.sin(wd)[:, None, None, :]  # (D,1,1,F)
    amp = 10.0 ** (GAINS_DB / 20.0)
    sign = np.array([1.0, -1.0])
    h_pow = np.abs(resp) ** 2  # (P, S, F): the level reference, before the own filters
    heard = resp * filt[None]
    base_pow = np.abs(bases) ** 2
    evals = 0
    best = _state_cost(resp, freq_hz, weights, delay, gain, pol, filt, cases) + extra
    # in turns, each subwoofer's best candidate with the others held, for at most
    # MAX_ROUNDS rounds; done once every subwoofer is settled for the present state (asking
    # one again would find what it found last time: nothing changed since)
    unchanged = 0
    for turn in range(MAX_ROUNDS * n_sub):
        if unchanged >= n_sub:
            break
        k = turn % n_sub
        coef = _coefficients(freq_hz, delay, gain, pol)
        o_sub = np.einsum("psf,sf->pf", heard, coef) - coef[k] * heard[:, k]
        others = bases + sc * o_sub[None]  # (B, P, F)
        h_k = sc * heard[None, :, k]  # (B, P, F)
        x = others * np.conj(h_k)
        cross = _smooth_power(x.real[None] * cos_d - x.imag[None] * sin_d)  # (D,B,P,F)
        s_o = _smooth_power(np.abs(others) ** 2)
        s_h = _smooth_power(np.abs(h_k) ** 2)
        power_s = (
            s_o
            + (amp**2)[None, None, :, None, None, None] * s_h
            + 2.0
            * (sign[None, :, None] * amp[None, None, :])[..., None, None, None]
            * cross[:, None, None]
        )  # (D, 2, G, B, P, F), the order of cand_d, cand_p, cand_g
        o_pow = np.einsum("psf,s->pf", h_pow, 10.0 ** (gain / 10.0)) - (
            10.0 ** (gain[k] / 10.0) * h_pow[:, k]
        )
        ref_s = (
            _smooth_power(base_pow + sc**2 * o_pow[None])[None]
            + (amp**2)[:, None, None, None] * _smooth_power(sc**2 * h_pow[None, :, k])[None]
        )  # (G, B, P, F)
        ref_db = np.broadcast_to(_mean_level_db(ref_s)[None, None], power_s.shape[:4])
        costs = _cost_smoothed(power_s, ref_db, weights).mean(axis=-1).ravel() + extra
        evals += costs.size
        i = int(np.argmin(costs))
        unchanged += 1
        if costs[i] < best - 1e-6:
            best = float(costs[i])
            delay[k], gain[k], pol[k] = cand_d[i], cand_g[i], int(cand_p[i])
            unchanged = 1  # this one is settled; the others are asked again
    return best, delay, gain, pol, evals


def _descend_cuts(
    resp, freq_hz, weights, delay, gain, pol, cuts, cases, fs, best
) -> tuple[float, np.ndarray, list, int]:
    """One round over every subwoofer's cut slots with delays and polarities held: each
    slot takes the best of no cut and every offered (centre, depth, Q), together with
    that subwoofer's level or the offered levels next to it (a cut and a level trade
    against each other)."""
    bases, scales = cases[0], cases[1]
    sc = scales[:, None, None]
    n_sub = resp.shape[1]
    gain = np.asarray(gain, dtype=float).copy()
    cuts = [list(c) for c in cuts]
    f0, g0, q0 = _cut_candidates(float(freq_hz[-1]))
    cand = np.concatenate(
        [np.ones((1, freq_hz.size)), _cut_response(freq_hz, f0, g0, q0, fs)]
    )  # (1 + C, F): no cut first
    depth = np.concatenate([[0.0], g0])
    amp = 10.0 ** (GAINS_DB / 20.0)
    h_pow = np.abs(resp) ** 2
    base_pow = np.abs(bases) ** 2
    evals = 0
    for k in range(n_sub):
        for j in range(MAX_CUTS):
            rest = [c for i, c in enumerate(cuts[k]) if i != j]
            coef = _coefficients(freq_hz, delay, gain, pol)
            filt = np.stack([cuts_response(freq_hz, c, fs) for c in cuts])
            heard = resp * filt[None] * coef[None]
            others = bases + sc * (heard.sum(axis=1) - heard[:, k])[None]  # (B, P, F)
            unit = pol[k] * np.exp(-2j * np.pi * freq_hz * delay[k])
            own = resp[:, k] * unit * cuts_response(freq_hz, rest, fs)  # (P, F)
            own = cand[:, None, None, :] * (sc * own[None])[None]  # (C, B, P, F)
            # |o + a h|^2 = |o|^2 + a^2 |h|^2 + 2 a Re(o conj(h)), smoothed term by term
            s_o = _smooth_power(np.abs(others) ** 2)
            s_h = _smooth_power(np.abs(own) ** 2)
            cross = _smooth_power((others[None] * np.conj(own)).real)
            # the levels next to the present one (a cut trades against a small level change)
            now = int(np.argmin(np.abs(GAINS_DB - gain[k])))
            lv = np.arange(max(now - 1, 0), min(now + 2, GAINS_DB.size))
            a = amp[lv]
            power_s = (
                s_o
                + (a**2)[None, :, None, None, None] * s_h[:, None]
                + 2.0 * a[None, :, None, None, None] * cross[:, None]
            )  # (C, L, B, P, F)
            o_pow = np.einsum("psf,s->pf", h_pow, 10.0 ** (gain / 10.0)) - (
                10.0 ** (gain[k] / 10.0) * h_pow[:, k]
            )
            ref_db = _mean_level_db(
                _smooth_power(base_pow + sc**2 * o_pow[None])[None]
                + (a**2)[:, None, None, None] * _smooth_power(sc**2 * h_pow[None, :, k])[None]
            )  # (L, B)
            penalty = _cut_cost([c for i, c in enumerate(cuts) if i != k]) + CUT_COST_DB_PER_DB * (
                -sum(g for _, g, _ in rest) - depth
            )  # (C,)
            costs = (
                _cost_smoothed(
                    power_s, np.broadcast_to(ref_db[None], power_s.shape[:3]), weights
                ).mean(axis=-1)
                + penalty[:, None]
            )
            evals += costs.size
            i, m = np.unravel_index(int(np.argmin(costs)), costs.shape)
            if costs[i, m] < best - 1e-6:
                best = float(costs[i, m])
                new = [] if i == 0 else [(float(f0[i - 1]), float(g0[i - 1]), float(q0[i - 1]))]
                cuts[k] = rest + new
                gain[k] = GAINS_DB[lv[m]]
    return best, gain, cuts, evals


def _search(
    resp,
    freq_hz,
    weights,
    cases,
    fs: float = 48000.0,
    own_filters: bool = True,
    feed_latency_s: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, list[int], list, int, tuple | None]:
    """Best delays, gains (loudest 0 dB), polarities and own filters from every start: cuts,
    or with :data:`SHAPED` and a latency a shaped feed ``(nodes_hz, z, latency_s)`` (the
    last item; ``None`` without)."""
    n_sub = resp.shape[1]
    starts = [np.zeros(n_sub)]
    for k in range(n_sub):
        g = np.full(n_sub, OFF_DB)
        g[k] = 0.0
        starts.append(g)
    best = None
    evals = 0
    for g0 in starts:
        out = _descend(resp, freq_hz, weights, np.zeros(n_sub), g0, [1] * n_sub, cases)
        evals += out[4]
        if best is None or out[0] < best[0]:
            best = out
    assert best is not None
    cost, delay, gain, pol, _ = best
    cuts: list = [[] for _ in range(n_sub)]
    if own_filters and SHAPED and feed_latency_s > 0.0:
        return _shaped(resp, freq_hz, weights, cases, delay, gain, pol, evals, feed_latency_s)
    if own_filters:
        # alternate: the cuts with the rest held, then the rest through the cuts
        for _ in range(MAX_ROUNDS):
            new_cost, gain, cuts, n1 = _descend_cuts(
                resp, freq_hz, weights, delay, gain, pol, cuts, cases, fs, cost
            )
            filt = np.stack([cuts_response(freq_hz, c, fs) for c in cuts])
            new_cost, delay, gain, pol, n2 = _descend(
                resp, freq_hz, weights, delay, gain, pol, cases, filt, _cut_cost(cuts)
            )
            evals += n1 + n2
            if new_cost >= cost - 1e-6:
                break
            cost = new_cost
    on = gain > OFF_DB + 1e-9
    if not on.any():  # all at one level: the same as all at 0 dB
        gain, on = np.zeros(n_sub), np.ones(n_sub, dtype=bool)
    gain = np.where(on, np.minimum(gain - gain[on].max(), 0.0), OFF_DB)
    cuts = [c if on[k] else [] for k, c in enumerate(cuts)]
    delay = delay - (delay[on].min() if on.any() else delay.min())
    return np.maximum(delay, 0.0), gain, [int(p) for p in pol], cuts, evals, None


def _shaped(
    resp, freq_hz, weights, cases, delay, gain, pol, evals, latency_s
) -> tuple[np.ndarray, np.ndarray, list[int], list, int, tuple | None]:
    """A shaped feed per subwoofer (:func:`roomcorr.design.system.feeds.fit_feed`) from
    the search's delays, levels and polarities, judged on the listening cases at several
    crossovers when given (:func:`crossover_cases`; the third item of ``cases``); each
    feed's largest gain (of its nodes and of its realised response) becomes the
    subwoofer's level (the loudest at 0 dB), the sign of its lowest node its polarity."""
    bases, scales = (cases[2] if len(cases) > 2 and cases[2] is not None else cases[:2])
    sc2 = np.abs(np.asarray(scales)) ** 2
    sc2 = sc2[:, None, None] if sc2.ndim == 1 else sc2[:, None, :]
    power = np.einsum("psf,s->pf", np.abs(resp) ** 2, 10.0 ** (np.asarray(gain) / 10.0))
    ref_s = _smooth_power(np.abs(bases) ** 2 + sc2 * power[None])  # (B, P, J)
    if LOCAL_LOSS:  # each judged point's mean level over the seats, weighted as the figure
        w = feeds.normalised_weights(weights, resp.shape[0])
        ref_db = w @ (10.0 * np.log10(np.maximum(ref_s, 1e-30)))
    else:
        ref_db = _mean_level_db(ref_s)
    smooth = _smoothing_matrix(freq_hz.size)[::COST_STEP]
    nodes, z, delay, _, _ = feeds.fit_feed(
        resp, bases, scales, weights, freq_hz, smooth, ref_db, delay, gain, pol,
        float(DELAYS_S[-1]), MAX_LOSS_DB, LOSS_WEIGHT, latency_s,
        step_oct=FEED_STEP_OCT, maxiter=FEED_MAXITER,
    )
    n_sub = resp.shape[1]
    # each feed's level: the largest gain of its nodes and of its realised response (which
    # may overshoot the nodes' by the little the latency leaves out): no own filter raises
    level = np.maximum(
        feeds.realised_peak(nodes, z, latency_s, PEAK_HI_HZ),
        np.abs(z).max(axis=1),
    )
    on = level > 10.0 ** (OFF_DB / 20.0)
    if not on.any():
        level, on = np.ones(n_sub), np.ones(n_sub, dtype=bool)
    sign = np.where(z[:, 0].real < 0, -1, 1)
    z = np.where(on[:, None], z / np.maximum(level, 1e-30)[:, None] * sign[:, None], 1.0)
    gain = np.where(on, np.minimum(20.0 * np.log10(level / level[on].max()), 0.0), OFF_DB)
    gain = np.maximum(gain, OFF_DB)
    delay = np.maximum(delay - delay[on].min(), 0.0)
    cuts: list = [[] for _ in range(n_sub)]
    return delay, gain, [int(p) for p in sign], cuts, evals, (nodes, z, latency_s)


def array_response(
    resp: np.ndarray,
    freq_hz: np.ndarray,
    delay_s,
    gain_db,
    polarity,
    cuts=None,
    fs: float = 48000.0,
    feed: tuple | None = None,
) -> np.ndarray:
    """Summed response of the subwoofers at every position, shape (n_positions, n_freqs).

    ``cuts`` (optional): each subwoofer's own cuts (:func:`cuts_response` at ``fs``);
    ``feed`` (optional): each subwoofer's shaped feed ``(nodes_hz, z, latency_s)``, as
    realised with that latency (:func:`roomcorr.design.system.feeds.feed_response`).
    """
    coef = _coefficients(freq_hz, delay_s, gain_db, polarity)
    if cuts is not None:
        coef = coef * np.stack([cuts_response(freq_hz, c, fs) for c in cuts])
    if feed is not None:
        coef = coef * feeds.feed_response(freq_hz, *feed)
    return np.einsum("psf,sf->pf", resp, coef)


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
    fs: float = 48000.0,
    own_filters: bool = True,
    base_scale: np.ndarray | None = None,
    feed_cases: tuple | None = None,
    feed_latency_s: float = 0.0,
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
    base : ndarray, shape (n_positions, n_freqs) or (n_cases, n_positions, n_freqs), optional
        What the seats hear besides the subwoofers (:func:`listening_cases`); the
        deviations are those of the last case.
    fs, own_filters, base_scale, feed_cases, feed_latency_s
        As for :func:`plan_subwoofers`.
    """
    n_pos, n_sub, n_f = resp.shape
    bases, scales = _cases(base, base_scale, n_pos, n_f)
    b, s_last = bases[-1], scales[-1]
    eq, after = [], []
    for p in range(n_pos):
        keep = [q for q in range(n_pos) if q != p]
        w = None if weights is None else np.asarray(weights)[keep]
        fit = None if feed_cases is None else (feed_cases[0][:, keep], feed_cases[1])
        d, g, pol, cuts, _, feed = _search(
            resp[keep], freq_hz, w, (bases[:, keep], scales, fit), fs, own_filters,
            feed_latency_s,
        )
        lev_eq = seat_levels_db(
            s_last * array_response(resp, freq_hz, np.zeros(n_sub), np.zeros(n_sub), [1] * n_sub)
            + b
        )
        lev = seat_levels_db(
            s_last * array_response(resp, freq_hz, d, g, pol, cuts, fs, feed) + b
        )
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
    factor, bases, _ = _cases_at(sub_resp, mains_resp, freq_hz, crossover_hz, fs)
    return sub_resp * factor, bases[-1]


def _cases_at(
    sub_resp, mains_resp, freq_hz, crossover_hz, fs
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The listening cases through a crossover at ``crossover_hz`` (one design of it).

    Returns
    -------
    factor : ndarray, shape (n_freqs,)
        What the subwoofers pass through: the low-pass times the gain that matches them,
        fed equally, to the mains' sum over half to twice ``crossover_hz`` (RMS over
        positions and frequencies).
    bases, scales
        As :func:`listening_cases` returns them.
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
    n_mains = mains_resp.shape[1]
    bases = np.concatenate([np.moveaxis(mains_resp * hp, 1, 0), (mains * hp)[None]])
    scales = np.concatenate([np.full(n_mains, 1.0 / n_mains), [1.0]])
    if n_mains == 1:  # one main: alone and 'all' are the same case
        bases, scales = bases[-1:], scales[-1:]
    return k * lp, bases, scales


def crossover_cases(
    sub_resp: np.ndarray,
    mains_resp: np.ndarray,
    freq_hz: np.ndarray,
    crossovers_hz,
    reference_hz: float,
    fs: float,
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`listening_cases` at several crossover frequencies, for judging the subwoofers'
    shaped feeds before the design has chosen its crossover.

    Returns
    -------
    bases : ndarray, shape (n_crossovers * n_cases, n_positions, n_freqs)
    filters : ndarray, shape (n_crossovers * n_cases, n_freqs), complex
        What turns the subwoofers as :func:`listening_cases` hears them at
        ``reference_hz`` into each case at each crossover (the route's level, the
        low-passes' ratio and the level matches' ratio).
    """
    ref = _cases_at(sub_resp, mains_resp, freq_hz, reference_hz, fs)[0]
    bases, filters = [], []
    for fc in crossovers_hz:
        factor, b, sc = _cases_at(sub_resp, mains_resp, freq_hz, float(fc), fs)
        bases.append(b)
        filters.append(sc[:, None] * (factor / ref)[None])
    return np.concatenate(bases), np.concatenate(filters)


def listening_cases(
    sub_resp: np.ndarray,
    mains_resp: np.ndarray,
    freq_hz: np.ndarray,
    crossover_hz: float,
    fs: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The subwoofers as the seats hear them with each main alone and with all mains.

    :func:`with_mains` for the crossover and the level match; with one main
    driven, the subwoofers get ``1 / n_mains`` of its signal (the routes of
    the bass management), with all mains driven the same bass (mono bass) the
    sum of them, at the level of one main.

    Returns
    -------
    resp : ndarray, shape (n_positions, n_subs, n_freqs)
        The subwoofers through the low-pass and the level match.
    bases : ndarray, shape (n_mains + 1, n_positions, n_freqs)
        Each main alone through the high-pass, then all mains (last).
    scales : ndarray, shape (n_mains + 1,)
        The subwoofers' level in each case.
    """
    factor, bases, scales = _cases_at(sub_resp, mains_resp, freq_hz, crossover_hz, fs)
    return sub_resp * factor, bases, scales


def plan_subwoofers(
    resp: np.ndarray,
    freq_hz: np.ndarray,
    names: list[str],
    channels: list[int],
    weights: np.ndarray | None = None,
    predict: bool = True,
    base: np.ndarray | None = None,
    fs: float = 48000.0,
    own_filters: bool = True,
    base_scale: np.ndarray | None = None,
    feed_cases: tuple | None = None,
    feed_latency_s: float = 0.0,
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
    base : ndarray, shape (n_positions, n_freqs) or (n_cases, n_positions, n_freqs), optional
        What the seats hear besides the subwoofers, added to their sum (the mains
        through their high-pass). Several listening cases (:func:`listening_cases`:
        each main alone, then all mains) are judged together, the cost being their
        mean; the figures reported are those of the last case.
    base_scale : ndarray, shape (n_cases,), optional
        The subwoofers' level in each case (1 / number of mains with one main
        driven, 1 with all; ones when not given).
    fs : float
        Sample rate the own cuts are judged at (the delivered ones are designed
        at every output rate; below a few hundred hertz they agree closely).
    own_filters : bool
        Also choose each subwoofer's own filter: a shaped feed with ``feed_latency_s``,
        otherwise cuts: each subwoofer's own cuts (at most :data:`MAX_CUTS`, each
        :data:`CUT_DEPTHS_DB` deep and :data:`CUT_Q` wide, charged
        :data:`CUT_COST_DB_PER_DB` per dB), alternating with delay, level and
        polarity until nothing improves.

    feed_cases : (ndarray, ndarray), optional
        The listening cases at several crossovers (:func:`crossover_cases`) the shaped
        feeds are judged on; without, those of ``base``.
    feed_latency_s : float
        How early each subwoofer's own filter may act (s): with a latency (and
        ``own_filters``) the own filter is a shaped feed
        (:mod:`roomcorr.design.system.feeds`, realised late by this much), without
        (0) at most :data:`MAX_CUTS` cuts.

    Returns
    -------
    SubArrayPlan

    References
    ----------
    .. [1] T. Welti and A. Devantier, JAES 54(5), 2006.
    """
    n_pos, n_sub, n_f = resp.shape
    cases = _cases(base, base_scale, n_pos, n_f)
    delay, gain, pol, cuts, evals, feed = _search(
        resp, freq_hz, weights, (*cases, feed_cases), fs, own_filters, feed_latency_s
    )
    b, s_last = cases[0][-1], cases[1][-1]
    zeros = np.zeros(n_sub)
    equal = array_response(resp, freq_hz, zeros, zeros, [1] * n_sub)
    spread_eq = float(seat_spread_db(seat_levels_db(s_last * equal + b), weights))
    chosen = array_response(resp, freq_hz, delay, gain, pol, cuts, fs, feed)
    spread = float(seat_spread_db(seat_levels_db(s_last * chosen + b), weights))
    single = seat_spread_db(seat_levels_db(s_last * np.moveaxis(resp, 1, 0) + b), weights)
    loo_eq = loo_after = None
    if predict and n_pos >= 3:
        loo_eq, loo_after = leave_one_out_spread_db(
            resp, freq_hz, weights, base, fs, own_filters, base_scale, feed_cases,
            feed_latency_s,
        )
    return SubArrayPlan(
        names=list(names),
        channels=list(channels),
        delay_s=delay,
        gain_db=gain,
        polarity=pol,
        filter=[describe_cuts(c) for c in cuts]
        if feed is None
        else [feeds.describe_feed(feed[0], z) for z in feed[1]],
        spread_equal_db=spread_eq,
        spread_after_db=spread,
        spread_single_db=np.asarray(single, dtype=float),
        loo_equal_db=loo_eq,
        loo_after_db=loo_after,
        turned_down=[bool(g <= -WELL_DOWN_DB) for g in gain],
        band_hz=(float(freq_hz[0]), float(freq_hz[-1])),
        n_evaluations=evals,
        freq_hz=freq_hz,
        cuts=[list(c) for c in cuts],
        feed_nodes_hz=None if feed is None else feed[0],
        feed=None if feed is None else feed[1],
        feed_latency_s=0.0 if feed is None else float(feed[2]),
    )


def spread_crossover_hz(
    sub_resp: np.ndarray,
    mains_resp: np.ndarray,
    freq_hz: np.ndarray,
    candidates_hz,
    fs: float,
    plan: SubArrayPlan,
    weights: np.ndarray | None = None,
) -> float | None:
    """The crossover frequency that leaves the least seat-to-seat spread with the subwoofers
    fed as ``plan`` chose (``None`` when :data:`SPREAD_CROSSOVER` is off).

    Where the crossover lies decides who plays the band of the spread figure: a low
    crossover hands most of it to the mains, whose seats differ as much as they did, and the
    subwoofers' evenness then counts for little. Each candidate is judged as the plan was
    (:func:`listening_cases`: each main alone and all mains, levels matched), by the mean
    over the cases of :func:`seat_spread_db`; the integration then chooses the array's delay
    and polarity relative to the mains at that frequency.

    Parameters
    ----------
    sub_resp : ndarray, shape (n_positions, n_subs, n_freqs), complex
        The subwoofers as measured (no crossover).
    mains_resp : ndarray, shape (n_positions, n_mains, n_freqs), complex
    freq_hz : ndarray, shape (n_freqs,)
    candidates_hz : sequence of float
    fs : float
    plan : SubArrayPlan
    weights : ndarray, shape (n_positions,), optional
    """
    if not SPREAD_CROSSOVER:
        return None
    feed = None if plan.feed is None else (plan.feed_nodes_hz, plan.feed, plan.feed_latency_s)
    # the array as measured, once: each candidate's crossover and level match scale it alike
    # (a factor per frequency, :func:`_cases_at`)
    raw = array_response(
        sub_resp, freq_hz, plan.delay_s, plan.gain_db, plan.polarity, plan.cuts or None, fs, feed
    )
    best = (np.inf, None)
    for fc in candidates_hz:
        factor, bases, scales = _cases_at(sub_resp, mains_resp, freq_hz, float(fc), fs)
        arr = raw * factor
        cost = float(
            np.mean(
                [
                    seat_spread_db(seat_levels_db(sc * arr + b), weights)
                    for b, sc in zip(bases, scales, strict=True)
                ]
            )
        )
        if cost < best[0]:
            best = (cost, float(fc))
    return best[1]
