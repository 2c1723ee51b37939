"""Design for the listening area, not for the microphone points.

One channel's correction is made in five steps, each a pure function here:

1. **Level** (:func:`choose_level`): the target's level is matched to the
   median of the measured response over the midrange (200 Hz to 2 kHz),
   so room gain in the bass or a treble roll-off cannot pull it, and then
   lowered until at most :data:`BOOST_SHARE` of the band would need boost:
   cutting is preferred to boosting, the pre-gain follows the level.
2. **Band edges** (:func:`crossing_band`): the band ends where the wide
   (1-octave) response falls :data:`EDGE_DB` below the aligned target,
   searching outward from the midrange. At that point the correction is
   already about 0 dB, so fading it out there leaves no step and no
   invented lift near the edges.
3. **Agreement** (:func:`agreement_limits`): a boost is kept only as far as
   :data:`AGREE_SHARE` of the positions want at least that much, and a cut
   likewise: a peak or dip seen at one microphone only is not a property of
   the listening area.
4. **Cross-validation** (:func:`cross_validate`): every position is left
   out in turn, the correction is designed from the others and applied to
   the left-out one. Per region (half an octave wide in the modal range,
   one region above it) the strength of the correction is the one of
   :data:`STRENGTHS` that predicts the smallest error at the left-out
   positions. In the modal range that strength scales the boosts only
   (:data:`FULL_MODAL_CUTS`): a modal peak stands out at every seat, so
   cutting it is kept whole. The same runs give the plain-words prediction
   (how much the bass will vary at seats that were not measured) and flag
   a position whose response sits far below the others (a cancellation).
5. **Bass limit** (:func:`apply_bass_limit`): below the loudspeaker's low
   limit the filter's gain never exceeds its own 200 Hz to 2 kHz median, so
   the drive there is never raised, whatever the room does.

The loudspeaker's own limit cannot be read reliably off an in-room
measurement: room gain and low modes lift the bass below the loudspeaker's
roll-off, so the -6 dB point of the in-room response lies an octave too low
in many rooms (:func:`speaker_low_limit`). The limit is therefore the
stated one (``speaker_low_hz``), else the higher of the measured in-room
roll-off and :data:`ASSUMED_SPEAKER_LOW_HZ`, a corner few small and
mid-sized loudspeakers lie above (common practice). Cuts below the limit
stay allowed (they only lower the drive).

References
----------
.. [1] S. J. Elliott and P. A. Nelson, "Multiple-point equalization in a
       room using adaptive digital filters", JAES 37(11), 1989 (designing
       for several points at once).
.. [2] B. D. Radlović, R. C. Williamson and R. A. Kennedy, "Equalization in
       an acoustic reverberant environment: robustness results", IEEE Trans.
       Speech Audio Proc. 8(3), 2000 (why a correction made at one point
       fails a few tenths of a wavelength away).
.. [3] M. Stone, "Cross-validatory choice and assessment of statistical
       predictions", J. R. Stat. Soc. B 36(2), 1974 (leave-one-out).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from roomcorr.analysis.average import power_average
from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.design.curve.correction import correction_curve
from roomcorr.design.curve.target import REFERENCE_BAND_HZ, ROLLOFF_DB, band_fade
from roomcorr.errors import SettingsError
from roomcorr.grid import points_per_octave_of

#: Band edge: where the 1-octave response falls this far below the aligned target (dB).
EDGE_DB = 1.0
#: The bass's own level gives way to the midrange's over this region, Hz: it holds
#: over most of the modal range, and the transition straddles the range's top
#: (further up it would leave a shelf in the midrange's broad balance).
LEVEL_BLEND_HZ = (200.0, 350.0)
#: The bass's own level is this quantile of its deviation from the target shape.
BASS_LEVEL_QUANTILE = 0.5
#: A boost or cut is kept as far as this share of the positions asks for it.
AGREE_SHARE = 0.75
#: Correction strengths tried by the cross-validation in the region above the modal range ...
STRENGTHS = (0.5, 1.0)
#: ... and in the half-octave regions of the modal range. Boosts there have already
#: passed the agreement of the positions and the dip and spread rules, and a
#: leave-one-out estimate from four to six positions is noisy: halving them again
#: lost more at held-out seats than it saved (evaluation rooms, DEVELOPERS.md).
MODAL_STRENGTHS = (0.75, 1.0)
#: Top of the modal range whose half-octave regions are cross-validated separately, Hz.
MODAL_TOP_HZ = 300.0
#: Width of one modal region, octaves.
REGION_OCT = 0.5
#: Loudspeaker low limit assumed when none is stated and none is measured higher, Hz.
ASSUMED_SPEAKER_LOW_HZ = 80.0
#: A left-out position this far (dB) below the others' average, over ...
CANCELLATION_DB = 10.0
#: ... this width (octaves, dB mean), is flagged as sitting in a cancellation.
CANCELLATION_OCT = 1.0 / 6.0
#: Above the modal range only the correction smoothed over this width (octaves) is kept ...
BROAD_OCT = 0.0
#: ... blended in over the octave above this frequency, Hz.
BROAD_FROM_HZ = 300.0
#: Cuts in the modal range keep full strength (the cross-validated strength scales
#: only boosts there): a modal peak is shared by every seat around the listening
#: position, only its height changes, so cutting it helps wherever the head is.
FULL_MODAL_CUTS = True
#: ... fully up to the first frequency, giving way to the chosen strength by the
#: second (the top of the modal range), Hz.
FULL_CUTS_HZ = (250.0, 300.0)
#: Whether cuts, too, need the agreement of the positions.
CUT_AGREEMENT = False
#: The low band edge is where the wide response falls this far (dB) below ...
LOW_EDGE_DB = 6.0
#: ... its median over this region (Hz).
LOW_REFERENCE_HZ = (100.0, 400.0)
#: Width of the trend (dB mean) the fine part of the correction is measured against, octaves.
TREND_OCT = 1.0
#: Light smoothing of the finished curve (octaves), so the FIR can follow it.
FINAL_SMOOTH_OCT = 1.0 / 24.0
#: Smoothing of the wide response used for level and edges, octaves.
WIDE_OCT = 1.0


@dataclass
class Prediction:
    """Leave-one-position-out prediction for one channel.

    Attributes
    ----------
    band_hz : (float, float)
        Where the bass variation is measured (from the low limit to 300 Hz).
    uncorrected_db : float
        Mean over positions of the RMS deviation of the response from its own
        mean in that band (how much the bass varies now).
    predicted_db : float
        The same for each left-out position corrected by a design made
        without it: what to expect at seats that were not measured.
    per_position_db : list of float
        ``predicted_db`` of each left-out position.
    flagged : list of dict
        Positions far below the others somewhere in the band:
        ``position`` (0-based), ``freq_hz``, ``depth_db``.
    strength : list of (float, float, float)
        ``(f_lo_hz, f_hi_hz, strength)`` chosen per region.
    """

    band_hz: tuple[float, float]
    uncorrected_db: float
    predicted_db: float
    per_position_db: list[float]
    flagged: list[dict] = field(default_factory=list)
    strength: list[tuple[float, float, float]] = field(default_factory=list)


@dataclass
class ChannelPlan:
    """Everything the design decided for one channel (arrays shape (n_freqs,))."""

    average_db: np.ndarray
    spread_db: np.ndarray
    target_db: np.ndarray
    raw_db: np.ndarray
    correction_db: np.ndarray
    boost_withheld_db: np.ndarray
    #: How far (dB, >= 0) the listening-area rules (agreement, cross-validated
    #: strength, broad correction above the modal range, bass limit) moved the
    #: curve from what the boost rules alone would give at the position average.
    held_back_db: np.ndarray
    band_hz: tuple[float, float]
    speaker_low_hz: float
    speaker_low_how: str
    prediction: Prediction | None


def _wide_db(freq_hz: np.ndarray, level_db: np.ndarray) -> np.ndarray:
    ppo = points_per_octave_of(freq_hz)
    return 10 * np.log10(np.maximum(smooth_log_grid(10 ** (level_db / 10), ppo, WIDE_OCT), 1e-30))


def choose_level(
    freq_hz: np.ndarray,
    average_db: np.ndarray,
    target_db: np.ndarray,
    modal_band_hz: tuple[float, float],
) -> tuple[np.ndarray, np.ndarray]:
    """Align the target: midrange median, and never above the bass's own level in the bass.

    The target's level is the median of the measured response over the
    midrange (200 Hz to 2 kHz), so room gain in the bass or a treble
    roll-off cannot pull it. In the modal range it is lowered to the bass's
    own median level when that lies lower (blended to the midrange level over
    :data:`LEVEL_BLEND_HZ`, which straddles :data:`MODAL_TOP_HZ`): the
    correction then removes what stands out in the bass instead of lifting
    the whole bass to the midrange, a broad boost
    that mostly fills boundary cancellations and costs excursion. Bass that
    lies higher than the midrange (room gain) is cut to its level.

    Parameters
    ----------
    freq_hz, average_db, target_db : ndarray, shape (n_freqs,)
    modal_band_hz : (float, float)
        Where the bass's own level is measured.

    Returns
    -------
    design_target_db : ndarray, shape (n_freqs,)
        The target the correction aims at.
    mid_target_db : ndarray, shape (n_freqs,)
        The target at the midrange's level everywhere (the high band edge is
        found against it).
    """
    f = np.asarray(freq_hz)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    level = float(np.median(average_db[mid] - target_db[mid]))
    bass = (f >= modal_band_hz[0]) & (f <= modal_band_hz[1])
    bass_level = level
    if np.any(bass):
        bass_level = min(
            level, float(np.quantile(average_db[bass] - target_db[bass], BASS_LEVEL_QUANTILE))
        )
    lo_hz, hi_hz = LEVEL_BLEND_HZ
    t = np.clip(np.log2(f / lo_hz) / np.log2(hi_hz / lo_hz), 0.0, 1.0)
    w = 0.5 - 0.5 * np.cos(np.pi * t)
    return target_db + level + (bass_level - level) * (1.0 - w), target_db + level


def crossing_band(
    freq_hz: np.ndarray,
    wide_db: np.ndarray,
    target_db: np.ndarray,
    limits_hz: tuple[float, float],
) -> tuple[float, float]:
    """Band edges: the outermost frequencies where the wide response still reaches the target.

    The low edge is the lowest, the high edge the highest frequency within
    ``limits_hz`` at which the 1-octave response is no more than
    :data:`EDGE_DB` below the (midrange-aligned) target; beyond them the
    response stays short of it (the loudspeaker's roll-off), so the
    correction is about neutral at the edges and fading it out there leaves
    no step. A broad dip inside the band does not end it.
    """
    f = np.asarray(freq_hz)
    inside = (f >= limits_hz[0]) & (f <= limits_hz[1])
    reach = np.flatnonzero(inside & (wide_db - target_db >= -EDGE_DB))
    if reach.size == 0:
        return float(limits_hz[0]), float(limits_hz[1])
    lo = max(float(f[reach[0]]), float(limits_hz[0]))
    hi = min(float(f[reach[-1]]), float(limits_hz[1]))
    return lo, hi


def low_edge(freq_hz: np.ndarray, wide_db: np.ndarray, limits_hz: tuple[float, float]) -> float:
    """Low band edge: the lowest frequency where the wide response still reaches its low-mid level.

    The reference is the median of the wide response over
    :data:`LOW_REFERENCE_HZ` (above most loudspeakers' corners, below the
    region where the broad balance is taken from the steady state); the edge
    is the lowest frequency within ``limits_hz`` at which the 1-octave
    response is no more than :data:`LOW_EDGE_DB` below it, so a broad
    boundary dip above the roll-off does not end the band. Cuts below the
    loudspeaker's limit stay allowed, boosts there are capped by
    :func:`apply_bass_limit`.
    """
    f = np.asarray(freq_hz)
    ref_m = (f >= LOW_REFERENCE_HZ[0]) & (f <= LOW_REFERENCE_HZ[1])
    ref = float(np.median(wide_db[ref_m]))
    reach = np.flatnonzero(
        (f >= limits_hz[0]) & (f <= LOW_REFERENCE_HZ[0]) & (wide_db >= ref - LOW_EDGE_DB)
    )
    lo = float(f[reach[0]]) if reach.size else LOW_REFERENCE_HZ[0]
    return max(lo, float(limits_hz[0]))


def measured_rolloff_hz(freq_hz: np.ndarray, wide_db: np.ndarray) -> float | None:
    """The in-room roll-off, if the response shows one: ``None`` otherwise.

    The highest frequency below the midrange at which the 1-octave response
    lies :data:`~roomcorr.design.curve.target.ROLLOFF_DB` below its midrange median
    and stays below that over the whole octave beneath it. A loudspeaker's
    high-pass keeps falling once it has fallen; a boundary cancellation
    recovers within an octave and is not taken for a roll-off.
    """
    f = np.asarray(freq_hz)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    low = wide_db < float(np.median(wide_db[mid])) - ROLLOFF_DB
    for i in np.flatnonzero((f < REFERENCE_BAND_HZ[0]) & low)[::-1]:
        octave_below = (f >= f[i] / 2) & (f <= f[i])
        if f[i] / 2 >= f[0] and np.all(low[octave_below]):
            return float(f[i])
    return None


def speaker_low_limit(
    freq_hz: np.ndarray, wide_db: np.ndarray, stated_hz: float | None
) -> tuple[float, str]:
    """Where the loudspeaker's own low-frequency limit is put, and how it was found.

    Returns
    -------
    (limit_hz, how)
        ``how`` is ``"stated"``, ``"measured"`` (the in-room roll-off of
        :func:`measured_rolloff_hz`, when it lies above the assumed limit) or
        ``"assumed"`` (:data:`ASSUMED_SPEAKER_LOW_HZ`).
    """
    if stated_hz is not None:
        return float(stated_hz), "stated"
    measured = measured_rolloff_hz(freq_hz, wide_db)
    if measured is not None and measured > ASSUMED_SPEAKER_LOW_HZ:
        return measured, "measured"
    return ASSUMED_SPEAKER_LOW_HZ, "assumed"


def agreement_limits(
    measured_db: np.ndarray, target_db: np.ndarray, share: float | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Largest boost and largest cut (both >= 0) that ``share`` of the positions want.

    Parameters
    ----------
    measured_db : ndarray, shape (n_positions, n_freqs)
        Each position's level, already offset to the average's midrange level.
    target_db : ndarray, shape (n_freqs,)

    Returns
    -------
    boost_ok_db, cut_ok_db : ndarray, shape (n_freqs,)
    """
    share = AGREE_SHARE if share is None else share
    want = target_db[None, :] - measured_db
    boost_ok = np.maximum(np.quantile(want, 1.0 - share, axis=0), 0.0)
    cut_ok = np.maximum(-np.quantile(want, share, axis=0), 0.0)
    return boost_ok, cut_ok


def _mid_offsets(freq_hz: np.ndarray, measured_db: np.ndarray, average_db: np.ndarray):
    f = np.asarray(freq_hz)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    off = np.median(measured_db[:, mid] - average_db[None, mid], axis=1)
    return measured_db - off[:, None]


def _curve(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    weights: np.ndarray | None,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
    max_boost_db: float,
    max_cut_db: float,
):
    """Correction from a set of positions: boost rules, agreement, fade to the neutral level.

    Outside the band the curve fades to its own midrange median (the neutral
    level), not to 0 dB, so that the corrected response meets the
    uncorrected one (up to the constant pre-gain) at both edges.
    """
    f = np.asarray(freq_hz)
    avg, spread = power_average(measured_db, weights)
    c, raw, boost_withheld = two_scale_correction(
        f, avg, spread, target_db, max_boost_db, max_cut_db
    )
    aligned = _mid_offsets(f, measured_db, avg)
    boost_ok, cut_ok = agreement_limits(aligned, target_db)
    cut_lim = cut_ok if CUT_AGREEMENT else np.full_like(c, np.inf)
    limited = np.clip(c, -cut_lim - 1e-12, boost_ok + 1e-12)
    limited = broad_above_modal(f, limited)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    neutral = float(np.median(limited[mid]))
    fade = band_fade(f, band_hz)
    out = neutral + (hold_edges(f, limited, band_hz) - neutral) * fade
    withheld = (boost_withheld + np.maximum(c - limited, 0.0)) * fade
    basic = neutral + (hold_edges(f, c, band_hz) - neutral) * fade
    return avg, spread, raw, out, withheld, basic


def two_scale_correction(
    freq_hz: np.ndarray,
    average_db: np.ndarray,
    spread_db: np.ndarray,
    target_db: np.ndarray,
    max_boost_db: float,
    max_cut_db: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Correction as a broad part (balance) plus a fine part (peaks and dips), no fade.

    The fine part is :func:`roomcorr.design.curve.correction.correction_curve`
    against the response's own trend (dB mean over :data:`TREND_OCT`): a
    modal peak is cut down to the level around it even where the broad level
    lies below the target (a peak stays a peak when the head moves; the
    broad level does not decide whether boom is removed). The broad part is
    the target minus that trend. Every boost of the sum is scaled by the
    fine part's boost allowance, so a deep dip or a region where the
    positions disagree gets no boost from either part, and the sum is held
    within the caps.

    Returns
    -------
    correction_db, raw_db, boost_withheld_db : ndarray, shape (n_freqs,)
    """
    f = np.asarray(freq_hz)
    ppo = points_per_octave_of(f)
    trend = smooth_log_grid(average_db, ppo, TREND_OCT)
    everywhere = (float(f[0]), float(f[-1]))
    fine = correction_curve(f, average_db, spread_db, trend, everywhere, max_boost_db, max_cut_db)
    broad = target_db - trend
    total = fine.correction_db + broad
    boost = np.minimum(np.maximum(total, 0.0), max_boost_db)
    boost_kept = boost * fine.boost_allowance
    cut = np.maximum(np.minimum(total, 0.0), -max_cut_db)
    raw = target_db - average_db
    withheld = np.maximum(np.maximum(raw, 0.0) - boost_kept, 0.0) * (raw > 0)
    return boost_kept + cut, raw, withheld


def hold_edges(
    freq_hz: np.ndarray, correction_db: np.ndarray, band_hz: tuple[float, float]
) -> np.ndarray:
    """The curve inside the band, held at its edge values outside it.

    Fading this (rather than the curve beyond the edge, which holds the
    boost a roll-off asks for) to the neutral level leaves the corrected
    response continuous across the edges.
    """
    f = np.asarray(freq_hz)
    inside = np.flatnonzero((f >= band_hz[0]) & (f <= band_hz[1]))
    out = np.array(correction_db, dtype=float)
    if inside.size:
        out[: inside[0]] = out[inside[0]]
        out[inside[-1] + 1 :] = out[inside[-1]]
    return out


def broad_above_modal(freq_hz: np.ndarray, correction_db: np.ndarray) -> np.ndarray:
    """Keep only the broad part of the correction above the modal range.

    The correction is smoothed over :data:`BROAD_OCT` and blended in over
    :data:`BROAD_FROM_HZ` (raised cosine over an octave): above the modal
    range the fine structure of the response changes within centimetres
    (Radlović et al.), only the loudspeaker's broad balance holds at every
    seat.
    """
    f = np.asarray(freq_hz)
    if BROAD_OCT <= 0:
        return correction_db
    ppo = points_per_octave_of(f)
    smooth = smooth_log_grid(correction_db, ppo, BROAD_OCT)
    t = np.clip(np.log2(f / BROAD_FROM_HZ), 0.0, 1.0)
    w = 0.5 - 0.5 * np.cos(np.pi * t)
    return (1 - w) * correction_db + w * smooth


def _regions(freq_hz: np.ndarray, band_hz: tuple[float, float]) -> list[tuple[float, float]]:
    """Half-octave regions from the band's low edge to 300 Hz, and one region above.

    A last modal region narrower than half :data:`REGION_OCT` joins the one
    before it (a sliver of a few grid points would be judged on noise).
    """
    lo, hi = band_hz
    edges = [lo]
    top = min(MODAL_TOP_HZ, hi)
    while edges[-1] * 2**REGION_OCT < top:
        edges.append(edges[-1] * 2**REGION_OCT)
    if len(edges) > 1 and np.log2(top / edges[-1]) < REGION_OCT / 2:
        edges.pop()
    edges.append(top)
    regions = list(zip(edges[:-1], edges[1:], strict=True))
    if hi > top:
        regions.append((top, hi))
    return [(a, b) for a, b in regions if b > a]


def _strength_curve(freq_hz: np.ndarray, regions, strengths) -> np.ndarray:
    """Per-region strengths as a smooth curve (linear in log frequency between centres)."""
    centres = np.array([np.sqrt(a * b) for a, b in regions])
    return np.interp(np.log2(freq_hz), np.log2(centres), np.asarray(strengths, dtype=float))


def _variation_db(freq_hz: np.ndarray, level_db: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """RMS deviation from the own mean inside ``mask`` of the 1/6-octave level.

    1/6 octave, as listeners and the quality benchmark judge the bass
    (:mod:`roomcorr.evaluation.metrics`), not the design's finer smoothing.
    """
    ppo = points_per_octave_of(freq_hz)
    x = 10 * np.log10(np.maximum(smooth_log_grid(10 ** (level_db / 10), ppo, 1 / 6), 1e-30))
    x = x[..., mask]
    return np.sqrt(np.mean((x - x.mean(axis=-1, keepdims=True)) ** 2, axis=-1))


def _scaled_curve(freq_hz: np.ndarray, correction_db: np.ndarray, strength) -> np.ndarray:
    """``correction_db`` times the strength curve; modal cuts whole with :data:`FULL_MODAL_CUTS`."""
    scaled = strength * correction_db
    if FULL_MODAL_CUTS:
        lo_hz, hi_hz = FULL_CUTS_HZ
        t = np.clip(np.log2(np.asarray(freq_hz) / lo_hz) / np.log2(hi_hz / lo_hz), 0.0, 1.0)
        w = 0.5 + 0.5 * np.cos(np.pi * t)
        cut_strength = w + (1.0 - w) * strength
        scaled = np.where(correction_db < 0, cut_strength * correction_db, scaled)
    return scaled


def cross_validate(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
    low_limit_hz: float,
    max_boost_db: float,
    max_cut_db: float,
) -> tuple[np.ndarray, Prediction | None]:
    """Leave-one-position-out: strength per region and the prediction for unmeasured seats.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db : ndarray, shape (n_positions, n_freqs)
    target_db : ndarray, shape (n_freqs,)
        Level-aligned target.
    band_hz : (float, float)
    low_limit_hz : float
        Loudspeaker low limit: the bass variation is judged above 1.25x it.
    max_boost_db, max_cut_db : float

    Returns
    -------
    strength : ndarray, shape (n_freqs,)
        Factor (0 to 1) for the correction at each frequency; all ones when
        there are fewer than three positions (nothing to cross-validate).
        Applied with :func:`_scaled_curve` (modal cuts whole).
    prediction : Prediction or None
    """
    f = np.asarray(freq_hz)
    n_pos = measured_db.shape[0]
    if n_pos < 3:
        return np.ones_like(f), None
    regions = _regions(f, band_hz)
    loo = np.empty_like(measured_db)
    others_avg = np.empty_like(measured_db)
    for p in range(n_pos):
        rest = np.delete(measured_db, p, axis=0)
        avg_r, *_rest = _curve(f, rest, None, target_db, band_hz, max_boost_db, max_cut_db)
        loo[p] = _rest[2]
        others_avg[p] = avg_r
    avg_all, _ = power_average(measured_db)
    aligned = _mid_offsets(f, measured_db, avg_all)
    strengths = []
    for a, b in regions:
        m = (f >= a) & (f < b)
        if not np.any(m):
            strengths.append(1.0)
            continue
        tried = MODAL_STRENGTHS if b <= MODAL_TOP_HZ else STRENGTHS
        errs = []
        for s in tried:
            err_db = aligned[:, m] + _scaled_curve(f[m], loo[:, m], s) - target_db[m]
            errs.append(float(np.mean(np.sqrt(np.mean(err_db**2, axis=1)))))
        # Ties go to the weaker correction (less change, less risk).
        strengths.append(tried[int(np.argmin(np.round(errs, 3)))])
    strength = _strength_curve(f, regions, strengths)
    lo_eval = max(band_hz[0], 1.25 * low_limit_hz)
    judge = (f >= lo_eval) & (f <= MODAL_TOP_HZ)
    if np.count_nonzero(judge) < 8:
        judge = (f >= band_hz[0]) & (f <= max(MODAL_TOP_HZ, 2 * band_hz[0]))
    before = _variation_db(f, measured_db, judge)
    after = _variation_db(f, measured_db + _scaled_curve(f, loo, strength), judge)
    flagged = flag_cancellations(f, measured_db, others_avg, (band_hz[0], MODAL_TOP_HZ))
    pred = Prediction(
        band_hz=(float(lo_eval), float(MODAL_TOP_HZ)),
        uncorrected_db=float(np.mean(before)),
        predicted_db=float(np.mean(after)),
        per_position_db=[float(x) for x in after],
        flagged=flagged,
        strength=[
            (float(a), float(b), float(s)) for (a, b), s in zip(regions, strengths, strict=True)
        ],
    )
    return strength, pred


def flag_cancellations(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    others_db: np.ndarray,
    band_hz: tuple[float, float],
) -> list[dict]:
    """Positions that sit in a cancellation the other positions do not share.

    A position is flagged where its level, averaged in dB over
    :data:`CANCELLATION_OCT`, lies more than :data:`CANCELLATION_DB` below
    the average of the other positions (the leave-one-out design's view of
    the room): a design made without it would leave that region there
    unfixed, and a boost made with it would not help anywhere else.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db, others_db : ndarray, shape (n_positions, n_freqs)
        Each position's level and the power average of all the others.
    band_hz : (float, float)

    Returns
    -------
    list of dict
        ``position`` (0-based), ``freq_hz``, ``depth_db`` of the deepest
        flagged region of each flagged position.
    """
    f = np.asarray(freq_hz)
    ppo = points_per_octave_of(f)
    dev = smooth_log_grid(measured_db - others_db, ppo, CANCELLATION_OCT)
    in_band = (f >= band_hz[0]) & (f <= band_hz[1])
    flagged = []
    if not np.any(in_band):
        return flagged
    for p in range(measured_db.shape[0]):
        k = int(np.argmin(dev[p, in_band]))
        depth = -float(dev[p, in_band][k])
        if depth > CANCELLATION_DB:
            flagged.append({"position": p, "freq_hz": float(f[in_band][k]), "depth_db": depth})
    return flagged


def apply_bass_limit(freq_hz: np.ndarray, correction_db: np.ndarray, limit_hz: float) -> np.ndarray:
    """Cap the correction below ``limit_hz`` at its own 200 Hz to 2 kHz median.

    Returns
    -------
    correction_db : ndarray, shape (n_freqs,)
        Unchanged at and above the limit; below it never above the midrange
        median, so the drive below the loudspeaker's limit is never raised.
    """
    f = np.asarray(freq_hz)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    ref = float(np.median(correction_db[mid]))
    out = np.array(correction_db, dtype=float)
    below = f < limit_hz
    out[below] = np.minimum(out[below], ref)
    return out


def design_channel(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    target_shape_db: np.ndarray,
    *,
    weights: np.ndarray | None = None,
    band_lo_hz: float | None = None,
    band_hi_hz: float | None = None,
    band_limits_hz: tuple[float, float] = (15.0, 20000.0),
    speaker_low_hz: float | None = None,
    max_boost_db: float = 4.0,
    max_cut_db: float = 15.0,
    name: str = "mono",
    shrink: bool = True,
) -> ChannelPlan:
    """Design one channel's correction curve for the listening area.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db : ndarray, shape (n_positions, n_freqs)
        Smoothed level of every position.
    target_shape_db : ndarray, shape (n_freqs,)
        Target shape (its level is chosen here).
    weights : ndarray, shape (n_positions,), optional
    band_lo_hz, band_hi_hz : float, optional
        Band edges given by the user (``None``: found here).
    band_limits_hz : (float, float)
        Automatic edges stay inside these.
    speaker_low_hz : float, optional
        The loudspeaker's stated low limit.
    max_boost_db, max_cut_db : float
    name : str
        Channel name for error messages.
    shrink : bool
        Apply the cross-validated strength per region (the prediction is made
        either way). Off for main loudspeakers crossed over to a subwoofer:
        there the bass is judged on the summed response by the system plan
        (:mod:`roomcorr.design.system.align`), not on the main loudspeaker alone.

    Returns
    -------
    ChannelPlan
        ``correction_db`` never exceeds ``max_boost_db`` nor falls below
        ``-max_cut_db``.
    """
    f = np.asarray(freq_hz, dtype=float)
    avg, spread = power_average(measured_db, weights)
    wide = _wide_db(f, avg)
    limit_hz, how = speaker_low_limit(f, wide, speaker_low_hz)
    first = (band_lo_hz or band_limits_hz[0], band_hi_hz or band_limits_hz[1])
    target, mid_target = choose_level(
        f, avg, target_shape_db, (max(first[0], limit_hz), MODAL_TOP_HZ)
    )
    auto_hi = crossing_band(f, wide, mid_target, band_limits_hz)[1]
    auto_lo = low_edge(f, wide, band_limits_hz)
    band = (band_lo_hz or auto_lo, band_hi_hz or auto_hi)
    if band[0] >= band[1]:
        raise SettingsError(
            f"channel {name}: correction band {band[0]:.0f}-{band[1]:.0f} Hz is empty; "
            "set --band-lo/--band-hi"
        )
    avg, spread, raw, corr, withheld, basic = _curve(
        f, measured_db, weights, target, band, max_boost_db, max_cut_db
    )
    strength, pred = cross_validate(
        f, measured_db, target, band, limit_hz, max_boost_db, max_cut_db
    )
    if not shrink:
        strength = np.ones_like(strength)
    # The rules above (caps, allowances, agreement) leave corners a filter of
    # the default length cannot follow; a light smoothing rounds them.
    smoothed = smooth_log_grid(
        _scaled_curve(f, corr, strength), points_per_octave_of(f), FINAL_SMOOTH_OCT
    )
    # ... but never so that it lifts a dip the boost rules refused (deep, or
    # where the positions disagree): there the curve stays at or below 0 dB.
    refused = correction_curve(f, avg, spread, avg, band, max_boost_db, max_cut_db)
    inside = (f >= band[0]) & (f <= band[1])
    no_boost = inside & (refused.boost_allowance <= 0.0)
    smoothed[no_boost] = np.minimum(smoothed[no_boost], 0.0)
    final = apply_bass_limit(f, smoothed, limit_hz)
    withheld = withheld + np.maximum(corr - final, 0.0)
    final = np.clip(final, -max_cut_db, max_boost_db)
    held_back = np.abs(final - basic)
    return ChannelPlan(
        average_db=avg,
        spread_db=spread,
        target_db=target,
        raw_db=raw,
        correction_db=final,
        boost_withheld_db=withheld,
        held_back_db=held_back,
        band_hz=(float(band[0]), float(band[1])),
        speaker_low_hz=float(limit_hz),
        speaker_low_how=how,
        prediction=pred,
    )


def channel_area_fields(
    speaker_low_hz: float | None, speaker_low_how: str | None, prediction: Prediction | None
) -> dict:
    """What the listening-area design found, as JSON-friendly fields (manifest, curves file).

    Returns
    -------
    dict
        ``speaker_low_hz``, ``speaker_low_found_by`` (``stated``, ``measured``,
        ``assumed``), and when a prediction exists ``cv_band_hz``,
        ``cv_uncorrected_db``, ``cv_predicted_db`` (bass variation now and
        predicted at unmeasured seats, dB), ``cv_positions`` and
        ``cv_flagged`` (``[position, freq_hz, depth_db]`` rows; positions
        counted from 1, in the order of the measurement files).
    """
    out: dict = {}
    if speaker_low_hz is not None:
        out["speaker_low_hz"] = round(float(speaker_low_hz), 2)
        out["speaker_low_found_by"] = str(speaker_low_how)
    if prediction is not None:
        out["cv_band_hz"] = [round(float(x), 2) for x in prediction.band_hz]
        out["cv_uncorrected_db"] = round(prediction.uncorrected_db, 2)
        out["cv_predicted_db"] = round(prediction.predicted_db, 2)
        out["cv_positions"] = len(prediction.per_position_db)
        out["cv_flagged"] = [
            [int(g["position"]) + 1, round(g["freq_hz"], 1), round(g["depth_db"], 1)]
            for g in prediction.flagged
        ]
    return out


def area_fields_of(channel: object) -> dict:
    """:func:`channel_area_fields` of a :class:`roomcorr.pipeline.ChannelDesign` (or ``{}``)."""
    return channel_area_fields(
        getattr(channel, "speaker_low_hz", None),
        getattr(channel, "speaker_low_how", None),
        getattr(channel, "prediction", None),
    )


def area_arrays_of(channel: object) -> dict[str, np.ndarray]:
    """:func:`area_fields_of` as arrays for the curves file (no pickling needed)."""
    out = {}
    for key, value in area_fields_of(channel).items():
        if key == "speaker_low_found_by":
            out[key] = np.asarray(value, dtype=str)
        elif key == "cv_flagged":
            out[key] = np.asarray(value, dtype=float).reshape(-1, 3)
        else:
            out[key] = np.asarray(value, dtype=float)
    return out
