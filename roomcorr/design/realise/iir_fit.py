"""Fit a small cascade of biquads to the boost-limited correction curve.

Method
------
1. **Analogue fit, once per channel.** On the log grid inside the correction
   band (plus half an octave each side at a fifth of the weight, so the
   cascade stays near 0 dB where the correction fades out), sections are
   placed greedily: each step tries a peaking section at the largest weighted
   residual (Q from the residual lobe's half-gain width), and, once each, a low
   and a high shelf; each candidate is fitted alone (3 parameters, bounded
   least squares) and the one that lowers the cost most is kept. Then all
   parameters are refined jointly with bounded least squares
   (``scipy.optimize.least_squares``, trust-region reflective). Weights are
   ``1 / (1 + spread_db)``: frequencies where positions disagree matter less.
   The residual vector also carries penalties for cascade boost above the cap
   (and above 0.5 dB more than half an octave outside the band, so nothing is
   boosted below the loudspeaker's roll-off or towards Nyquist) and for
   sections too fragile for float32 coefficients (see
   :func:`roomcorr.design.realise.biquad.float32_sensitivity_db`). Shelves may only
   cut: a boosting shelf would keep boosting down to DC or up to Nyquist.
2. **Per sample rate.** Cookbook coefficients match the analogue prototype
   exactly at ``f0`` but the bilinear transform cramps the response towards
   Nyquist (a peaking section narrows and returns to 0 dB at ``fs / 2``).
   For each rate, sections whose ``f0`` lies above ``fs / 16`` (where the
   digital and analogue responses start to differ by more than a few
   hundredths of a dB) are refitted, digital response against the analogue
   cascade, with the lower sections held fixed; ``f0`` is kept below
   ``0.45 fs``. So the parameter table differs slightly between rates at
   high frequencies; it is exact for a device computing cookbook
   coefficients at that rate.
3. **Safety per rate.** Boost above the cap is removed by scaling all positive
   section gains by a common factor (bisection; factor 0 leaves only cuts and
   shelves with Q <= 1/sqrt(2), which never exceed 0 dB). Coefficients are
   rounded to float32 (:func:`~roomcorr.design.realise.biquad.quantise_float32`) and
   proven stable and within 0.1 dB of the design
   (:func:`~roomcorr.design.realise.biquad.check_float32`); a section that fails is
   broadened (Q x 0.8) and, at the lowest Q, reduced in gain until it passes.
   A common pre-gain (all channels and rates) keeps every cascade's peak at or
   below the ceiling.

References
----------
R. Bristow-Johnson, "Audio EQ Cookbook", W3C Audio Working Group Note, 2021.
M. A. Branch, T. F. Coleman, Y. Li, "A subspace, interior, and conjugate
gradient method for large-scale bound-constrained minimization problems",
SIAM J. Sci. Comput. 21(1), 1999 (the trust-region reflective method used by
``scipy.optimize.least_squares``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from scipy.optimize import least_squares

from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise.biquad import KINDS, SHELF_MAX_Q, Section
from roomcorr.design.realise.fir import fir_response_db as _fir_db
from roomcorr.errors import SafetyError, SettingsError

if TYPE_CHECKING:  # pragma: no cover
    from roomcorr.pipeline import DesignResult

BOOST_TOL_DB = 0.05
PENALTY = 30.0
SENS_LIMIT_DB = 0.3
OUT_OF_BAND_WEIGHT = 0.2
#: Boost tolerated (penalty-free) more than half an octave outside the correction band.
OUT_OF_BAND_BOOST_DB = 0.5
#: Peak-search resolution allowance included in the pre-gain.
PEAK_MARGIN_DB = 1e-3
FIT_POINTS_PER_OCTAVE = 32
#: Rounds of merging, dropping and placing again in :func:`fit_sections`.
TIDY_ROUNDS = 3


@dataclass
class FitLimits:
    """Bounds of the fit.

    Attributes
    ----------
    n_sections : int
        Largest number of sections.
    freq_range_hz : (float, float)
        Allowed ``f0`` range.
    gain_range_db : (float, float)
        Allowed section gain; the upper end is clipped to ``max_boost_db``.
    q_range : (float, float)
        Allowed Q (shelves also at most 1/sqrt(2)).
    max_boost_db : float
        Cap on the cascade's boost.
    fs_max : float
        Highest sample rate the design will be realised at (for the float32 penalty).
    """

    n_sections: int = 10
    freq_range_hz: tuple[float, float] = (20.0, 16000.0)
    gain_range_db: tuple[float, float] = (-15.0, 4.0)
    q_range: tuple[float, float] = (0.3, 12.0)
    max_boost_db: float = 4.0
    fs_max: float = 96000.0

    def validated(self) -> FitLimits:
        """Return a copy with the gain range clipped to the boost cap; check ranges."""
        f_lo, f_hi = self.freq_range_hz
        g_lo, g_hi = self.gain_range_db
        q_lo, q_hi = self.q_range
        if not 0 < f_lo < f_hi:
            raise SettingsError(
                f"design.iir_freq_range_hz = {self.freq_range_hz}: need 0 < low < high")
        if self.max_boost_db < 0:
            raise SettingsError(f"design.max_boost_db = {self.max_boost_db}: must be >= 0")
        if not g_lo < min(g_hi, self.max_boost_db):
            raise SettingsError(
                f"design.iir_gain_range_db = {self.gain_range_db}: need low < high "
                f"(high is clipped to design.max_boost_db = {self.max_boost_db})")
        if not 0 < q_lo < q_hi:
            raise SettingsError(f"design.iir_q_range = {self.q_range}: need 0 < low < high")
        if not 1 <= self.n_sections <= 64:
            raise SettingsError(
                f"design.iir_sections = {self.n_sections}: use 1 to 64 sections")
        return FitLimits(
            self.n_sections, (f_lo, f_hi), (g_lo, min(g_hi, self.max_boost_db)),
            (q_lo, q_hi), self.max_boost_db, self.fs_max,
        )


# ---------------------------------------------------------------- parameter vectors


def _bounds(kinds: np.ndarray, lim: FitLimits, f_hi_hz: float | None = None):
    f_lo, f_hi = lim.freq_range_hz
    if f_hi_hz is not None:
        f_hi = min(f_hi, f_hi_hz)
    q_lo, q_hi = lim.q_range
    lo, hi = [], []
    for k in kinds:
        qh = q_hi if k == 0 else min(q_hi, SHELF_MAX_Q)
        ql = min(q_lo, 0.999 * qh)
        gh = lim.gain_range_db[1] if k == 0 else min(lim.gain_range_db[1], 0.0)
        gl = min(lim.gain_range_db[0], gh - 1e-6)
        lo += [np.log2(f_lo), gl, np.log2(ql)]
        hi += [np.log2(f_hi), gh, np.log2(qh)]
    return np.array(lo), np.array(hi)


def _unpack(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    x = x.reshape(-1, 3)
    return 2.0 ** x[:, 0], x[:, 1], 2.0 ** x[:, 2]


def _pack(sections: Sequence[Section]) -> tuple[np.ndarray, np.ndarray]:
    kinds = np.array([KINDS.index(s.kind) for s in sections], dtype=int)
    x = np.array([[np.log2(s.f0_hz), s.gain_db, np.log2(s.q)] for s in sections]).ravel()
    return kinds, x


def _sections(kinds: np.ndarray, x: np.ndarray) -> list[Section]:
    f0, g, q = _unpack(x)
    return [
        Section(KINDS[int(k)], float(f), float(gg), float(qq))
        for k, f, gg, qq in zip(kinds, f0, g, q, strict=True)
    ]


def _clip(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    span = hi - lo
    return np.clip(x, lo + 1e-9 * span, hi - 1e-9 * span)


# ---------------------------------------------------------------- analogue fit


@dataclass
class _Problem:
    freq_hz: np.ndarray      # fit grid
    target_db: np.ndarray
    sqrt_w: np.ndarray
    check_hz: np.ndarray     # boost-penalty grid
    lim: FitLimits
    allowed_db: np.ndarray   # boost allowed on check_hz: the cap in band, OUT_OF_BAND_BOOST_DB out


def _analog_db(kinds, x, freq_hz):
    if len(kinds) == 0:
        return np.zeros(len(freq_hz))
    f0, g, q = _unpack(x)
    return bq.analog_responses_from_arrays(kinds, f0, g, q, freq_hz).sum(axis=0)


class _Objective:
    """Weighted residual and its analytic Jacobian (cached per parameter vector)."""

    def __init__(self, kinds, prob: _Problem, fixed_db, fixed_check_db):
        self.kinds = kinds
        self.prob = prob
        self.fixed = fixed_db
        self.fixed_c = fixed_check_db
        self.both = np.concatenate([prob.freq_hz, prob.check_hz])
        self._x = None

    def _eval(self, x):
        if self._x is not None and np.array_equal(x, self._x):
            return
        p = self.prob
        f0, g, q = _unpack(x)
        h, jac = bq.analog_db_and_jacobian(self.kinds, f0, g, q, self.both)
        n = len(p.freq_hz)
        tot = h.sum(axis=0)
        fit = p.sqrt_w * (tot[:n] + self.fixed - p.target_db)
        over = tot[n:] + self.fixed_c - p.allowed_db
        active = over > 0
        sens = bq.float32_sensitivity_db(self.kinds, f0, g, q, p.lim.fs_max)
        sens_over = sens - SENS_LIMIT_DB
        self.r = np.concatenate(
            [fit, PENALTY * np.maximum(0.0, over), PENALTY * np.maximum(0.0, sens_over)])
        m = len(self.kinds)
        jm = jac.reshape(m * 3, -1).T  # (n_freqs_total, 3m)
        j_fit = p.sqrt_w[:, None] * jm[:n]
        j_boost = PENALTY * active[:, None] * jm[n:]
        j_sens = np.zeros((m, 3 * m))
        ln2 = np.log(2.0)
        for i in range(m):
            if sens_over[i] > 0:
                j_sens[i, 3 * i] = -2 * ln2 * sens[i]
                j_sens[i, 3 * i + 1] = np.sign(g[i]) * sens[i] / max(abs(g[i]), 1e-12)
                j_sens[i, 3 * i + 2] = ln2 * sens[i] if q[i] > SHELF_MAX_Q else 0.0
        self.j = np.concatenate([j_fit, j_boost, PENALTY * j_sens])
        self._x = np.array(x, copy=True)

    def residual(self, x):
        self._eval(x)
        return self.r

    def jacobian(self, x):
        self._eval(x)
        return self.j


def _solve(kinds, x0, prob, fixed_db, fixed_check_db, max_nfev):
    lo, hi = _bounds(kinds, prob.lim)
    x0 = _clip(x0, lo, hi)
    obj = _Objective(kinds, prob, fixed_db, fixed_check_db)
    res = least_squares(
        obj.residual, x0, jac=obj.jacobian, bounds=(lo, hi), method="trf", tr_solver="lsmr",
        x_scale=np.tile([0.5, 3.0, 1.0], len(kinds)), max_nfev=max_nfev, xtol=1e-6, ftol=1e-6,
    )
    return res.x, float(res.cost)


def _q_from_lobe(freq_hz, resid, i, lim: FitLimits) -> float:
    """Q of the residual lobe around index ``i`` from its half-gain width."""
    v = resid[i]
    half = np.abs(resid) < abs(v) / 2
    same = np.sign(resid) == np.sign(v)
    j_lo = i
    while j_lo > 0 and same[j_lo - 1] and not half[j_lo - 1]:
        j_lo -= 1
    j_hi = i
    while j_hi < len(resid) - 1 and same[j_hi + 1] and not half[j_hi + 1]:
        j_hi += 1
    bw_oct = max(np.log2(freq_hz[j_hi] / freq_hz[j_lo]), 1.0 / 24)
    # Q from bandwidth in octaves, analogue form of the cookbook relation.
    q = 1.0 / (2.0 * np.sinh(np.log(2) / 2 * bw_oct))
    return float(np.clip(q, lim.q_range[0], lim.q_range[1]))


def _make_problem(freq_hz, target_db, weight, band_hz, lim: FitLimits) -> _Problem:
    freq_hz = np.asarray(freq_hz, dtype=float)
    lo, hi = band_hz
    guard = 2.0**0.5
    keep = (freq_hz >= lo / guard) & (freq_hz <= min(hi * guard, 24000.0))
    step = max(1, int(round(bq_ppo(freq_hz) / FIT_POINTS_PER_OCTAVE)))
    idx = np.flatnonzero(keep)[::step]
    if len(idx) < 8:
        raise SettingsError(
            f"correction band {lo:.0f}-{hi:.0f} Hz is too narrow for an IIR fit; widen "
            "design.band_lo_hz / design.band_hi_hz"
        )
    f = freq_hz[idx]
    w = np.asarray(weight, dtype=float)[idx]
    w = np.where((f >= lo) & (f <= hi), w, OUT_OF_BAND_WEIGHT * w)
    w = w / np.mean(w)
    check = np.geomspace(10.0, 24000.0, int(np.log2(2400.0) * 16) + 1)
    outside = (check < lo / guard) | (check > hi * guard)
    allowed = np.where(outside, min(OUT_OF_BAND_BOOST_DB, lim.max_boost_db), lim.max_boost_db)
    return _Problem(f, np.asarray(target_db, dtype=float)[idx], np.sqrt(w), check, lim, allowed)


def bq_ppo(freq_hz: np.ndarray) -> float:
    """Points per octave of a log grid."""
    return 1.0 / float(np.log2(freq_hz[1] / freq_hz[0]))


def fit_sections(
    freq_hz: np.ndarray,
    target_db: np.ndarray,
    weight: np.ndarray,
    band_hz: tuple[float, float],
    limits: FitLimits,
    max_nfev: int = 400,
) -> list[Section]:
    """Greedy placement plus joint bounded least squares, analogue prototypes.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
        Log grid (``roomcorr.grid.log_grid()``).
    target_db : ndarray, shape (n_freqs,)
        Correction curve to approximate (boost-limited, faded outside the band).
    weight : ndarray, shape (n_freqs,)
        Non-negative weights, for example ``1 / (1 + spread_db)``.
    band_hz : (float, float)
        Correction band.
    limits : FitLimits
    max_nfev : int
        Evaluation budget of the joint refinement.

    Returns
    -------
    sections : list of Section
        At most ``limits.n_sections``, boost-limited in the analogue domain.
    """
    lim = limits.validated()
    prob = _make_problem(freq_hz, target_db, weight, band_hz, lim)
    kinds = np.zeros(0, dtype=int)
    x = np.zeros(0)
    cost = 0.5 * float(np.sum((prob.sqrt_w * prob.target_db) ** 2))
    kinds, x, cost = _greedy(kinds, x, cost, prob, band_hz, lim)
    if len(kinds) == 0:
        return []
    x, cost = _solve(kinds, x, prob, 0.0, 0.0, max_nfev)
    # Tidy: sections on the same frequency are merged and near-zero ones dropped
    # (bq.tidy_sections), the set is refitted, the freed sections are placed again
    # elsewhere and the set refitted once more, a few rounds at most; of the tidy
    # sets met on the way the one with the lowest cost is kept.
    best: tuple[float, np.ndarray, np.ndarray] | None = None
    for _ in range(TIDY_ROUNDS + 1):
        secs = _sections(kinds, x)
        tidy = bq.tidy_sections(secs, lim.gain_range_db, fs_max=lim.fs_max,
                                sens_limit_db=SENS_LIMIT_DB)
        if len(tidy) == len(secs):
            if best is None or cost < best[0]:
                best = (cost, kinds, x)
            break
        if not tidy:
            break
        kinds, x = _pack(tidy)
        x, cost = _solve(kinds, x, prob, 0.0, 0.0, max_nfev)
        if bq.is_tidy(_sections(kinds, x), lim.fs_max, SENS_LIMIT_DB) and (
            best is None or cost < best[0]
        ):
            best = (cost, kinds, x)
        more_kinds, more_x, _ = _greedy(kinds, x, cost, prob, band_hz, lim)
        if len(more_kinds) == len(kinds):
            break
        kinds = more_kinds
        x, cost = _solve(kinds, more_x, prob, 0.0, 0.0, max_nfev)
    if best is not None:
        secs = _sections(best[1], best[2])
    else:  # never tidy after refitting: the last set, tidied without a refit
        secs = bq.tidy_sections(_sections(kinds, x), lim.gain_range_db, fs_max=lim.fs_max,
                                sens_limit_db=SENS_LIMIT_DB)
    return limit_boost(secs, lambda s: bq.analog_response_db(s, prob.check_hz), lim.max_boost_db)


def _greedy(kinds, x, cost, prob: _Problem, band_hz, lim: FitLimits):
    """Add sections one at a time until ``lim.n_sections`` or no candidate lowers the cost.

    Each step tries a peaking section at the largest weighted residual (never
    within :data:`roomcorr.design.realise.biquad.MERGE_OCT` of a peaking section already
    placed: that one is refitted jointly instead) and, once each, a low and a
    high shelf; each candidate is fitted alone with the others held fixed.
    """
    zero_c = np.zeros(len(prob.check_hz))
    f_lo_b = max(band_hz[0], lim.freq_range_hz[0])
    f_hi_b = min(band_hz[1], lim.freq_range_hz[1])
    g_lo, g_hi = lim.gain_range_db
    allowed = (prob.freq_hz >= lim.freq_range_hz[0]) & (prob.freq_hz <= lim.freq_range_hz[1])
    while len(kinds) < lim.n_sections:
        cur = _analog_db(kinds, x, prob.freq_hz)
        cur_c = _analog_db(kinds, x, prob.check_hz) if len(kinds) else zero_c
        resid = prob.target_db - cur
        free = allowed.copy()
        if len(kinds):
            f0 = _unpack(x)[0][kinds == 0]
            for f in f0:
                free &= np.abs(np.log2(prob.freq_hz / f)) >= bq.MERGE_OCT
        score = np.where(free, prob.sqrt_w**2 * np.abs(resid), -1.0)
        i = int(np.argmax(score))
        cands = []
        if score[i] > 0:
            cands.append((0, [np.log2(prob.freq_hz[i]), float(np.clip(resid[i], g_lo, g_hi)),
                              np.log2(_q_from_lobe(prob.freq_hz, resid, i, lim))]))
        for k, f_c in ((1, f_lo_b), (2, f_hi_b)):
            if k in kinds:
                continue
            near = np.abs(np.log2(prob.freq_hz / f_c)) < 0.5
            g0 = float(np.clip(np.mean(resid[near]) if near.any() else 0.0, g_lo, g_hi))
            cands.append((k, [np.log2(f_c), g0, np.log2(0.5)]))
        best = None
        for k, xs in cands:
            xk, ck = _solve(np.array([k]), np.array(xs), prob, cur, cur_c, 30)
            if best is None or ck < best[2]:
                best = (k, xk, ck)
        if best is None or best[2] >= cost * (1 - 1e-4):
            break
        kinds = np.append(kinds, best[0])
        x = np.concatenate([x, best[1]])
        cost = best[2]
    return kinds, x, cost


def limit_boost(sections: list[Section], response_db, max_boost_db: float) -> list[Section]:
    """Scale all positive section gains by one factor so the cascade peak <= cap.

    ``response_db(sections) -> ndarray`` evaluates the cascade on a check grid.
    Factor 0 leaves cuts and shelves of Q <= 1/sqrt(2), whose response never
    exceeds 0 dB, so a cap >= 0 can always be met.
    """
    if np.max(response_db(sections), initial=0.0) <= max_boost_db:
        return sections

    def scaled(t: float) -> list[Section]:
        return [
            Section(s.kind, s.f0_hz, s.gain_db * t if s.gain_db > 0 else s.gain_db, s.q)
            for s in sections
        ]

    lo, hi = 0.0, 1.0
    for _ in range(30):
        mid = 0.5 * (lo + hi)
        if np.max(response_db(scaled(mid)), initial=0.0) <= max_boost_db:
            lo = mid
        else:
            hi = mid
    return scaled(lo)


# ---------------------------------------------------------------- per-rate realisation


def realise(
    sections: list[Section],
    fs: float,
    limits: FitLimits,
    fit_freq_hz: np.ndarray,
    fit_weight: np.ndarray | None = None,
) -> tuple[list[Section], np.ndarray, float]:
    """Digital sections and float32 coefficients for one sample rate.

    Parameters
    ----------
    sections : list of Section
        Analogue-prototype design.
    fs : float
    limits : FitLimits
    fit_freq_hz : ndarray, shape (n,)
        Frequencies where the digital cascade should follow the analogue one.
    fit_weight : ndarray, shape (n,), optional

    Returns
    -------
    sections_fs : list of Section
        Parameters for this rate (high sections refitted against bilinear cramping).
    coeffs : ndarray, shape (n_sections, 5)
        Float32-exact normalised coefficients ``b0, b1, b2, a1, a2``.
    float32_dev_db : float
        Largest response change from rounding to float32 (< 0.1 dB, proven).
    """

    lim = limits.validated()
    if not sections:
        return [], np.zeros((0, 5)), 0.0
    f_cap = 0.45 * fs
    check = bq.check_frequencies(fs)
    fit_freq_hz = np.asarray(fit_freq_hz, dtype=float)
    sel = fit_freq_hz < 0.49 * fs
    f_fit = fit_freq_hz[sel]
    w = np.ones(len(f_fit)) if fit_weight is None else np.asarray(fit_weight, float)[sel]
    sqrt_w = np.sqrt(w / np.mean(w))
    goal = bq.analog_response_db(sections, f_fit)
    kinds, x = _pack(sections)
    lo, hi = _bounds(kinds, lim, f_cap)
    x = _clip(x, lo, hi)
    free = np.repeat(2.0 ** x.reshape(-1, 3)[:, 0] > fs / 16, 3)
    if free.any():
        both = np.concatenate([f_fit, check])
        n = len(f_fit)

        def resid(xf):
            xx = x.copy()
            xx[free] = xf
            f0, g, q = _unpack(xx)
            c = bq.coefficients_from_arrays(kinds, f0, g, q, fs)
            h = bq.cascade_response_db(c, both, fs)
            return np.concatenate([
                sqrt_w * (h[:n] - goal),
                PENALTY * np.maximum(0.0, h[n:] - lim.max_boost_db),
            ])

        res = least_squares(resid, x[free], bounds=(lo[free], hi[free]), method="trf",
                            max_nfev=200, xtol=1e-6, ftol=1e-6)
        x[free] = res.x
    secs = _sections(kinds, x)

    def dig_peak(s):
        return np.array([bq.cascade_peak_db(bq.coefficients(s, fs), fs)])

    secs = limit_boost(secs, dig_peak, lim.max_boost_db - 0.01)
    q_lo = lim.q_range[0]
    for _ in range(200):
        exact = bq.coefficients(secs, fs)
        rounded = bq.quantise_float32(exact, check, fs)
        try:
            dev = bq.check_float32(exact, check, fs, rounded=rounded, what=f"IIR at {fs} Hz")
            return secs, rounded, dev
        except SafetyError:
            k_arr, f0, g, q = bq._arrays(secs)
            sens = bq.float32_sensitivity_db(k_arr, f0, g, q, fs)
            k = int(np.argmax(sens))
            s = secs[k]
            if s.q > q_lo * 1.0001:
                secs[k] = Section(s.kind, s.f0_hz, s.gain_db, max(q_lo, s.q * 0.8))
            else:
                secs[k] = Section(s.kind, s.f0_hz, s.gain_db * 0.8, s.q)
    raise SafetyError(  # pragma: no cover - gains shrink to 0, which always passes
        f"IIR at {fs} Hz: could not find float32-safe coefficients; raise design.iir_freq_range_hz"
    )


# ---------------------------------------------------------------- integration


@dataclass
class IirStats:
    """Figures of one channel's cascade at one sample rate (dB)."""

    channel: int
    fs: int
    n_sections: int
    peak_gain_db: float          # magnitude peak including pre-gain (<= ceiling)
    worst_case_gain_db: float    # 20 log10 sum |h| of the impulse response, pre-gain included
    max_boost_db: float          # largest section gain or cascade peak, without pre-gain (>= 0)
    cascade_peak_db: float       # magnitude peak without pre-gain
    rms_error_db: float          # vs target correction curve, in band
    max_error_db: float
    rms_error_fir_db: float | None   # vs the FIR design at this rate, in band
    max_error_fir_db: float | None
    float32_deviation_db: float
    max_pole_radius: float


@dataclass
class IirChannel:
    """Fitted cascade of one channel."""

    index: int
    name: str
    band_hz: tuple[float, float]
    sections_analog: list[Section]
    sections: dict[int, list[Section]] = field(default_factory=dict)  # fs -> sections
    coeffs: dict[int, np.ndarray] = field(default_factory=dict)       # fs -> (n_sections, 5)


@dataclass
class IirDesign:
    """Biquad cascades for all channels and rates plus one common pre-gain."""

    freq_hz: np.ndarray
    channels: list[IirChannel]
    sample_rates: tuple[int, ...]
    pre_gain_db: float
    ceiling_db: float
    max_boost_db: float
    stats: list[IirStats]


def _errors(a_db: np.ndarray, b_db: np.ndarray) -> tuple[float, float]:
    d = a_db - b_db
    return float(np.sqrt(np.mean(d**2))), float(np.max(np.abs(d)))


def fir_response_db(fir: np.ndarray, freq_hz: np.ndarray, fs: float) -> np.ndarray:
    """Magnitude in dB of FIR taps ``(n_taps,)`` at ``freq_hz``, floored at -240 dB."""

    return np.maximum(_fir_db(fir, fs, freq_hz), -240.0)


def design_iir(result: DesignResult) -> IirDesign:
    """Fit biquad cascades to every channel of a FIR design result.

    Parameters
    ----------
    result : roomcorr.pipeline.DesignResult
        Uses ``freq_hz``, ``channels[*].correction_db / spread_db / band_hz``,
        ``firs``, ``pre_gain_db`` and ``settings.design`` (``iir_sections``,
        ``iir_freq_range_hz``, ``iir_gain_range_db``, ``iir_q_range``,
        ``max_boost_db``, ``ceiling_db``, ``allow_gain``, ``sample_rates``).

    Returns
    -------
    IirDesign

    Raises
    ------
    SettingsError, SafetyError
    """
    d = result.settings.design
    rates = tuple(int(r) for r in d.sample_rates)
    return design_iir_curves(
        result.freq_hz,
        [(c.index, c.name, c.correction_db, c.spread_db, c.band_hz) for c in result.channels],
        rates,
        FitLimits(int(d.iir_sections), tuple(d.iir_freq_range_hz), tuple(d.iir_gain_range_db),
                  tuple(d.iir_q_range), float(d.max_boost_db), float(max(rates))),
        ceiling_db=float(d.ceiling_db),
        allow_gain=bool(d.allow_gain),
        firs=result.firs,
        fir_pre_gain_db=float(result.pre_gain_db),
    )


def design_iir_curves(
    freq_hz: np.ndarray,
    channels: Sequence[tuple[int, str, np.ndarray, np.ndarray, tuple[float, float]]],
    sample_rates: Sequence[int],
    limits: FitLimits,
    ceiling_db: float = 0.0,
    allow_gain: bool = False,
    firs: dict[int, np.ndarray] | None = None,
    fir_pre_gain_db: float = 0.0,
) -> IirDesign:
    """Array-level version of :func:`design_iir`.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    channels : sequence of (index, name, correction_db (n_freqs,), spread_db (n_freqs,), band_hz)
    sample_rates : sequence of int
    limits : FitLimits
    ceiling_db : float
        Peak-gain ceiling of every cascade including pre-gain.
    allow_gain : bool
        Required for ``ceiling_db > 0``.
    firs : dict fs -> ndarray (n_channels, n_taps), optional
        FIR design to compare against (pre-gain ``fir_pre_gain_db`` included).
    """
    if ceiling_db > 0 and not allow_gain:
        raise SafetyError(
            f"design.ceiling_db = {ceiling_db} dB is above 0 dB; set design.allow_gain = true "
            "only if the playback chain has headroom")
    lim = limits.validated()
    freq_hz = np.asarray(freq_hz, dtype=float)
    out_ch: list[IirChannel] = []
    peaks: dict[tuple[int, int], float] = {}
    pending: list[tuple] = []
    for index, name, corr, spread, band in channels:
        weight = 1.0 / (1.0 + np.maximum(np.asarray(spread, dtype=float), 0.0))
        secs = fit_sections(freq_hz, corr, weight, band, lim)
        ch = IirChannel(int(index), str(name), (float(band[0]), float(band[1])), secs)
        inband = (freq_hz >= band[0]) & (freq_hz <= band[1])
        for fs in sample_rates:
            guard = (freq_hz >= band[0] / 2**0.5) & (freq_hz <= band[1] * 2**0.5)
            s_fs, c_fs, dev = realise(secs, fs, lim, freq_hz[guard], weight[guard])
            ch.sections[int(fs)] = s_fs
            ch.coeffs[int(fs)] = c_fs
            peak = bq.cascade_peak_db(c_fs, fs)
            peaks[(ch.index, int(fs))] = peak
            m = inband & (freq_hz < 0.49 * fs)
            iir_db = bq.cascade_response_db(c_fs, freq_hz[m], fs)
            rms, mx = _errors(iir_db, np.asarray(corr)[m])
            rms_f = mx_f = None
            if firs is not None and int(fs) in firs:
                fir_db = fir_response_db(np.asarray(firs[int(fs)])[ch.index], freq_hz[m], fs)
                rms_f, mx_f = _errors(iir_db, fir_db - fir_pre_gain_db)
            radius = float(np.max(bq.pole_radii(c_fs), initial=0.0))
            max_sec = max([s.gain_db for s in s_fs], default=0.0)
            l1 = bq.worst_case_gain_db(c_fs)
            pending.append((ch.index, int(fs), len(s_fs), peak, l1, max(peak, max_sec, 0.0),
                            rms, mx, rms_f, mx_f, dev, radius))
        out_ch.append(ch)
    top = max(peaks.values(), default=0.0)
    top += PEAK_MARGIN_DB
    pre_gain_db = min(0.0, ceiling_db - top) if top > ceiling_db else 0.0
    stats = [
        IirStats(c, fs, n, pk + pre_gain_db, l1 + pre_gain_db, mb, pk, r, m, rf, mf, dv, rad)
        for (c, fs, n, pk, l1, mb, r, m, rf, mf, dv, rad) in pending
    ]
    design = IirDesign(freq_hz, out_ch, tuple(int(r) for r in sample_rates), pre_gain_db,
                       ceiling_db, lim.max_boost_db, stats)
    check_iir_safety(design)
    return design


def check_iir_safety(design: IirDesign) -> None:
    """Raise :class:`SafetyError` unless every cascade respects all limits.

    Checks per channel and rate: poles within the margin and float32 rounding
    (< 0.1 dB, :func:`roomcorr.design.realise.biquad.check_float32`), no section gain and
    no cascade boost above the cap (+ 0.05 dB), peak including pre-gain at or
    below the ceiling.
    """
    for ch in design.channels:
        for fs, c in ch.coeffs.items():
            what = f"IIR channel {ch.name} at {fs} Hz"
            chk = bq.check_frequencies(fs)
            bq.check_float32(c, chk, fs, what=what, rounded=c)
            gains = [s.gain_db for s in ch.sections[fs]]
            peak = bq.cascade_peak_db(c, fs)
            cap = design.max_boost_db + BOOST_TOL_DB
            if max(gains, default=0.0) > cap or peak > cap:
                raise SafetyError(
                    f"{what}: boost {max(peak, *gains, 0.0):.2f} dB exceeds "
                    f"design.max_boost_db = {design.max_boost_db} dB")
            if peak + design.pre_gain_db > design.ceiling_db + 1e-6:
                raise SafetyError(
                    f"{what}: peak gain {peak + design.pre_gain_db:.2f} dB exceeds "
                    f"design.ceiling_db = {design.ceiling_db} dB")
