"""After a move: the change at the seat the room model predicted, beside the measured one.

The earlier run and the layout it was measured with calibrate the room model
(:func:`roomcorr.placement.model.calibrate`). The level at the seat of the later
layout is predicted as ``roomcorr predict`` predicts it: the model's level for the
new loudspeaker positions at that point plus :func:`~roomcorr.placement.model.anchor_db`
(what the model missed at the measured position nearest to it). The predicted
change is that level minus the earlier run's measured level at the same measured
position; the measured change is the later run's level at the seat minus the
same. Both are compared per loudspeaker in 1/6-octave bands (IEC 61260-1 band
centres, :func:`roomcorr.analysis.bands.band_centres_hz`) between
:data:`CHANGE_BAND_HZ`, with the overall level offset between the runs (a
different volume or microphone gain) removed. How well the prediction held is the
RMS difference of the two changes in dB, set beside the RMS of the measured change
itself (the error of assuming that nothing changed).

Everything here is pure: layouts, arrays and a calibrated model in, plain data out.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.analysis.bands import band_centres_hz, band_edges_hz
from roomcorr.placement.layout import Layout
from roomcorr.placement.model import RoomModel, anchor_db, fit_grid, measured_levels_db

#: Bands of the comparison: 1/6 octave from 30 to 250 Hz (the prediction's valid range).
BAND_FRACTION = 6
CHANGE_BAND_HZ = (30.0, 250.0)
#: A position that moved less than this is taken as not moved, m (below tape accuracy).
SAME_POSITION_M = 0.01
#: A layout position matches a suggestion of ``advise`` within this, per coordinate, m
#: (a tape error of a few centimetres when the user set things where advised).
SUGGESTION_MATCH_M = 0.05
#: A band this far below (above) its 1-octave neighbourhood in the earlier run is a
#: dip (peak), dB (common practice: a 3 dB deviation is the usual threshold of audibility
#: for a broad resonance).
FEATURE_DB = 3.0
#: Ratios of the prediction's error to the error of assuming nothing changed at which
#: the prediction held well / partly (the figures to reach of the placement benchmark:
#: 0.5 after a move).
HELD_WELL = 0.5
HELD_PARTLY = 0.8
#: A measured change smaller than this (RMS, dB, offset removed) is too little to judge
#: a prediction by.
LITTLE_CHANGE_DB = 1.0


def change_bands_hz() -> np.ndarray:
    """Exact mid-band frequencies of the comparison's 1/6-octave bands, Hz."""
    return band_centres_hz(BAND_FRACTION, *CHANGE_BAND_HZ)


def band_levels_db(levels_db: np.ndarray, grid_hz: np.ndarray) -> np.ndarray:
    """Levels on ``grid_hz`` (dB, last axis) as 1/6-octave band levels: the power mean of
    the grid points inside each band (:func:`change_bands_hz`)."""
    centres = change_bands_hz()
    lo, hi = band_edges_hz(centres, BAND_FRACTION)
    lv = np.asarray(levels_db, dtype=float)
    g = np.asarray(grid_hz, dtype=float)
    out = []
    for a, b in zip(lo, hi, strict=True):
        sel = (g >= a) & (g < b)
        if not np.any(sel):
            sel = np.zeros(g.size, bool)
            sel[int(np.argmin(np.abs(np.log(g) - np.log(np.sqrt(a * b)))))] = True
        out.append(10.0 * np.log10(np.mean(10.0 ** (lv[..., sel] / 10.0), axis=-1)))
    return np.stack(out, axis=-1)


def layout_moves(before: Layout, after: Layout) -> dict[str, Any]:
    """What moved between two layouts.

    Returns
    -------
    dict
        ``changed`` (bool), ``loudspeakers`` (name -> [dx, dy, dz] m, for those that
        moved more than :data:`SAME_POSITION_M`), ``seat`` ([dx, dy, dz] or None),
        ``size_changed`` (bool), ``names_differ`` (bool: loudspeakers added or removed).
    """
    speakers = {}
    for name, p in after.loudspeakers.items():
        if name in before.loudspeakers:
            d = np.subtract(p, before.loudspeakers[name])
            if np.linalg.norm(d) > SAME_POSITION_M:
                speakers[name] = [round(float(v), 3) for v in d]
    ds = np.subtract(after.seat, before.seat)
    seat = [round(float(v), 3) for v in ds] if np.linalg.norm(ds) > SAME_POSITION_M else None
    size_changed = bool(np.max(np.abs(np.subtract(after.size_m, before.size_m))) > SAME_POSITION_M)
    names_differ = list(before.loudspeakers) != list(after.loudspeakers)
    return {
        "changed": bool(speakers or seat or size_changed or names_differ),
        "loudspeakers": speakers,
        "seat": seat,
        "size_changed": size_changed,
        "names_differ": names_differ,
    }


def matching_suggestion(suggestions: list[dict[str, Any]], after: Layout) -> int | None:
    """Index of the first suggestion whose loudspeaker and seat positions are where the
    later layout has them (within :data:`SUGGESTION_MATCH_M` per coordinate), else None."""
    for i, s in enumerate(suggestions):
        spk = s.get("speakers_m") or {}
        if set(spk) != set(after.loudspeakers):
            continue
        pairs = [(spk[n], after.loudspeakers[n]) for n in after.loudspeakers]
        pairs.append((s.get("seat_m"), after.seat))
        if all(np.max(np.abs(np.subtract(a, b))) <= SUGGESTION_MATCH_M for a, b in pairs):
            return i
    return None


def _rms(x: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(x))))


def _trend_db(levels_db: np.ndarray) -> np.ndarray:
    """Each band's 1-octave neighbourhood: the mean of the bands within half an octave."""
    half = BAND_FRACTION // 2
    n = levels_db.size
    return np.array([levels_db[max(0, i - half):min(n, i + half + 1)].mean() for i in range(n)])


def change_words(
    centres_hz: np.ndarray,
    before_db: np.ndarray,
    predicted_db: np.ndarray,
    measured_db: np.ndarray,
) -> dict[str, Any]:
    """The band the model predicted the largest change in, in plain words.

    Returns
    -------
    dict
        ``freq_hz``, ``feature`` ("dip", "peak" or None: how that band stood against
        its 1-octave neighbourhood in the earlier run), ``predicted_db``,
        ``measured_db`` and ``text`` ("predicted: the 108 Hz dip fills by 6 dB;
        measured: it filled by 5 dB").
    """
    i = int(np.argmax(np.abs(predicted_db)))
    f = float(centres_hz[i])
    dev = float(before_db[i] - _trend_db(before_db)[i])
    p, m = float(predicted_db[i]), float(measured_db[i])
    feature = "dip" if dev <= -FEATURE_DB else "peak" if dev >= FEATURE_DB else None
    what = f"the {f:.0f} Hz {feature}" if feature else f"the level at {f:.0f} Hz"
    verbs = {  # (predicted, measured) per feature and direction
        ("dip", True): ("fills by", "it filled by"),
        ("dip", False): ("deepens by", "it deepened by"),
        ("peak", True): ("rises by", "it rose by"),
        ("peak", False): ("falls by", "it fell by"),
        (None, True): ("rises by", "it rose by"),
        (None, False): ("falls by", "it fell by"),
    }
    pv, _ = verbs[(feature, p >= 0)]
    if abs(m) < 0.5:
        mtext = "it stayed within 0.5 dB"
    else:
        mtext = f"{verbs[(feature, m >= 0)][1]} {abs(m):.0f} dB"
    return {
        "freq_hz": round(f, 1),
        "feature": feature,
        "predicted_db": round(p, 2),
        "measured_db": round(m, 2),
        "text": f"predicted: {what} {pv} {abs(p):.0f} dB; measured: {mtext}",
    }


def held_verdict(held_db: float, unchanged_db: float) -> tuple[str, str]:
    """(verdict, sentence): how far to trust the next suggestion, from the prediction's
    RMS error and the measured change's own RMS (the error of assuming nothing changed)."""
    if unchanged_db < LITTLE_CHANGE_DB:
        return "too little change", (
            f"little changed at the seat ({unchanged_db:.1f} dB RMS): too little to judge the "
            "prediction by"
        )
    ratio = held_db / unchanged_db
    if ratio <= HELD_WELL:
        return "held", (
            "the prediction held: trust the direction and rough size of the next suggestion, "
            "and still re-measure after each move"
        )
    if ratio <= HELD_PARTLY:
        return "held partly", (
            "the prediction held partly: take the next suggestion as a direction, move in "
            "small steps and re-measure"
        )
    return "did not hold", (
        "the prediction did no better than assuming nothing changed: check the layout (a "
        "tape error, a loudspeaker not where the layout says, furniture moved) before "
        "trusting the next suggestion"
    )


def predicted_change(
    model: RoomModel,
    irs_before: np.ndarray,
    fs_before: int,
    before: Layout,
    irs_after: np.ndarray,
    fs_after: int,
    after: Layout,
) -> dict[str, Any]:
    """The predicted and the measured change at the seat, per loudspeaker.

    Parameters
    ----------
    model : RoomModel
        Calibrated on ``irs_before`` with ``before`` (its ``[[measured]]`` positions).
    irs_before : ndarray, shape (n_positions, n_speakers, n_samples)
    fs_before : int
    before : Layout
        The layout the earlier run was measured with.
    irs_after : ndarray, shape (n_positions_after, n_speakers, n_samples)
    fs_after : int
    after : Layout
        The layout the later run was measured with (same loudspeaker names).

    Returns
    -------
    dict
        ``bands_hz``; ``after_position`` (1-based position of the later run compared:
        the measured position nearest its seat) and ``assumed_at_seat`` (True when the
        later layout lists no measured positions and position 1 is taken as the seat);
        ``before_position`` (1-based, the earlier measured position nearest that point);
        ``point_m``; ``channels`` (per loudspeaker: ``name``, ``before_db`` (earlier
        band levels), ``predicted_change_db``, ``measured_change_db`` (level offset
        removed), ``offset_db``, ``held_db`` (RMS difference), ``unchanged_db`` (RMS of
        the measured change), ``words``); ``held_db``, ``unchanged_db`` and ``ratio``
        over all loudspeakers; ``verdict`` and ``verdict_text``.

    References
    ----------
    .. [1] IEC 61260-1:2014, fractional-octave band centres and edges.
    """
    names = list(before.loudspeakers)
    n_after = np.shape(irs_after)[0]
    if len(after.measured) == n_after:
        mics_b = np.asarray(after.measured, float)
        kb = int(np.argmin(np.linalg.norm(mics_b - np.asarray(after.seat), axis=1)))
        point = mics_b[kb]
        assumed = False
    else:
        kb, point, assumed = 0, np.asarray(after.seat, float), True
    spk_b = np.asarray([after.loudspeakers[n] for n in names], float) + model.offsets_m
    g = fit_grid()
    corr, ka = anchor_db(model, irs_before, fs_before, np.asarray(before.measured), point)
    predicted = model.levels_db(spk_b, point[None, :], g)[:, 0] + corr
    meas_a = measured_levels_db(np.asarray(irs_before, float)[ka], fs_before, g)
    meas_b = measured_levels_db(np.asarray(irs_after, float)[kb], fs_after, g)
    centres = change_bands_hz()
    a_db, p_db, b_db = (band_levels_db(x, g) for x in (meas_a, predicted, meas_b))
    channels = []
    for s, name in enumerate(names):
        pred = p_db[s] - a_db[s]
        meas = b_db[s] - a_db[s]
        offset = float(np.mean(meas - pred))
        meas_aligned = meas - offset
        channels.append({
            "name": name,
            "before_db": [round(float(v), 2) for v in a_db[s]],
            "predicted_change_db": [round(float(v), 2) for v in pred],
            "measured_change_db": [round(float(v), 2) for v in meas_aligned],
            "offset_db": round(offset, 2),
            "held_db": round(_rms(pred - meas_aligned), 2),
            "unchanged_db": round(_rms(meas - np.mean(meas)), 2),
            "words": change_words(centres, a_db[s], pred, meas_aligned),
        })
    held = _rms(np.array([c["held_db"] for c in channels]))
    unchanged = _rms(np.array([c["unchanged_db"] for c in channels]))
    verdict, sentence = held_verdict(held, unchanged)
    return {
        "bands_hz": [round(float(f), 2) for f in centres],
        "band_fraction": BAND_FRACTION,
        "band_hz": list(CHANGE_BAND_HZ),
        "after_position": kb + 1,
        "assumed_at_seat": assumed,
        "before_position": ka + 1,
        "point_m": [round(float(v), 3) for v in point],
        "channels": channels,
        "held_db": round(held, 2),
        "unchanged_db": round(unchanged, 2),
        "ratio": None if unchanged < 1e-9 else round(held / unchanged, 3),
        "verdict": verdict,
        "verdict_text": sentence,
    }
