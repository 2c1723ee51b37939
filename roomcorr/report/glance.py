"""The report's short top: a few lines "at a glance", the header facts and the target's shape.

The full channel-by-channel sentences (:func:`roomcorr.report.summary.summary_sentences`)
stay in the report, in the section below the overview; this module condenses the same
curves into about one line per topic with both channels on the line, so a stereo design
reads in at most about eight lines.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from typing import Any

import numpy as np

from roomcorr.deliver.figures import fmt_db
from roomcorr.design.curve.area import LEVEL_BLEND_HZ
from roomcorr.design.curve.target import REFERENCE_BAND_HZ
from roomcorr.design.phase.mixedphase import latency_sentence
from roomcorr.errors import RoomcorrError
from roomcorr.pipeline import resolve_target
from roomcorr.report.summary import NOTABLE_DB, fmt_hz, withheld_regions

#: A run id as rooms name them: ``YYYY-MM-DD_HHMMSSZ`` (a suffix may follow).
_RUN_ID = re.compile(r"^(\d{4})-(\d{2})-(\d{2})_(\d{2})(\d{2})(\d{2})Z")

#: A level step of the target smaller than this (dB) is not mentioned.
STEP_NOTABLE_DB = 0.5


def _per_channel(items: list[tuple[str, str]]) -> str:
    """``"a (left), b (right)"``, or ``"a (both)"``/``"a (all)"`` when every item is the same."""
    values = [v for _, v in items]
    if len(items) > 1 and len(set(values)) == 1:
        return f"{values[0]} ({'both' if len(items) == 2 else 'all'})"
    return ", ".join(f"{v} ({n})" for n, v in items)


def _largest(f: np.ndarray, corr: np.ndarray, inside: np.ndarray, sign: float) -> str | None:
    v = np.where(inside, sign * corr, -np.inf)
    i = int(np.argmax(v))
    if not np.isfinite(v[i]) or v[i] < NOTABLE_DB / 2:
        return None
    return f"{v[i]:.1f} dB at {fmt_hz(float(f[i]))}"


def glance_sentences(
    curves: dict[str, Any],
    max_boost_db: float | None = None,
    figures: dict[str, Any] | None = None,
) -> list[str]:
    """At most about six lines about a design, every channel on the same line.

    Parameters
    ----------
    curves : dict
        Layout of :func:`roomcorr.deliver.export.load_design_curves`.
    max_boost_db : float, optional
        The boost cap in force (tells a capped boost from a refused one).
    figures : dict, optional
        The manifest's figures block (:func:`roomcorr.deliver.figures.figures_of_manifest`):
        the pre-gain, the filters' largest boost, peak and worst-case gain are stated as
        stored there, never computed again.

    Returns
    -------
    list of str
        Band, largest cut, largest boost, boost refused, the prediction at seats not
        measured, the pre-gain (and the latency of a mixed-phase design). Lines with
        nothing to say are left out.
    """
    f = np.asarray(curves["freq_hz"], dtype=float)
    band, cuts, boosts, refused, seats = [], [], [], [], []
    for ch in curves["channels"]:
        name = str(ch["name"])
        lo, hi = (float(v) for v in ch["band_hz"])
        corr = np.asarray(ch["correction_db"], dtype=float)
        inside = (f >= lo) & (f <= hi)
        band.append((name, f"{fmt_hz(lo)} to {fmt_hz(hi)}"))
        cuts.append((name, _largest(f, corr, inside, -1.0) or "none"))
        boosts.append((name, _largest(f, corr, inside, 1.0) or "none"))
        regions = withheld_regions(f, ch, max_boost_db)
        if regions:
            r = regions[0]
            places = f", {len(regions)} places in all" if len(regions) > 1 else ""
            refused.append((name, f"{r['depth_db']:.0f} dB dip at {fmt_hz(r['freq_hz'])}{places}"))
        if ch.get("cv_predicted_db") is not None:
            seats.append((name, f"{float(np.asarray(ch['cv_predicted_db'])):.1f} dB instead of "
                                f"{float(np.asarray(ch['cv_uncorrected_db'])):.1f} dB"))
    out = [f"Correction band {_per_channel(band)}; nothing changed outside it."]
    out.append(f"Largest cut (a room peak): {_per_channel(cuts)}.")
    out.append(f"Dips filled, the largest: {_per_channel(boosts)}.")
    if refused:
        out.append(
            f"Boost refused where it could not help safely, deepest: {_per_channel(refused)} "
            "(why: see the next section)."
        )
    if seats:
        bands = {tuple(np.asarray(ch["cv_band_hz"], dtype=float).tolist())
                 for ch in curves["channels"] if ch.get("cv_band_hz") is not None}
        where = ""
        if len(bands) == 1:
            b_lo, b_hi = next(iter(bands))
            where = f" ({fmt_hz(b_lo)} to {fmt_hz(b_hi)})"
        out.append(
            f"At seats not measured the bass{where} should vary by about "
            f"{_per_channel(seats)} (each position left out in turn)."
        )
    pg = float((figures or {}).get("pre_gain_db", curves.get("pre_gain_db", 0.0)))
    level = (
        f"Pre-gain {fmt_db(pg, 2, True)} on every filter, so no frequency leaves a filter "
        "louder than it went in" if fmt_db(pg, 2) != fmt_db(0.0, 2)
        else "No pre-gain needed: no filter rises above the ceiling"
    )
    if figures is not None and figures.get("largest_boost_db") is not None:
        level += (
            f"; largest boost {fmt_db(figures['largest_boost_db'])} before the pre-gain, "
            f"peak gain {fmt_db(figures['peak_gain_db'], 2, True)}"
        )
    out.append(level + ".")
    mp = curves.get("mixed_phase")
    if mp:  # the latency per rate and its caution stand here, once in the whole report
        out.append(latency_sentence(mp["latency_ms"], mp["latency_samples"]))
    return out


def run_date(run_id: str) -> str | None:
    """``"2026-12-04 20:31 UTC"`` from a run id such as ``2026-12-04_203110Z`` (None otherwise)."""
    m = _RUN_ID.match(run_id)
    if not m:
        return None
    y, mo, d, h, mi, s = (int(g) for g in m.groups())
    try:
        return datetime(y, mo, d, h, mi, s, tzinfo=UTC).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        return None


def header_lines(
    run_id: str,
    is_design: bool,
    measurement_id: str | None,
    positions: list[str],
    channel_names: list[str],
    fs: int,
    what: str | None = None,
) -> list[str]:
    """The facts under the report's title: date, run ids, positions, what was measured.

    Parameters
    ----------
    run_id : str
        The folder's name (a room's run id, or any folder name).
    is_design : bool
        A design run (else a measurement).
    measurement_id : str, optional
        The measurement a design was made from.
    positions : list of str
        Position names (file stems).
    channel_names : list of str
    fs : int
        Sample rate of the measurement.
    what : str, optional
        How it was measured (sweep, level), when the measurement's record says.

    Returns
    -------
    list of str
    """
    date = run_date(run_id)
    kind = "Design" if is_design else "Measurement"
    first = f"{kind} {run_id}" + (f", made {date}" if date else "")
    if is_design and measurement_id:
        m_date = run_date(measurement_id)
        first += f"; from measurement {measurement_id}" + (f" ({m_date})" if m_date else "")
    lines = [first]
    pos = ", ".join(positions) if positions else "unknown"
    lines.append(
        f"Measured: {len(channel_names)} loudspeaker channel"
        f"{'' if len(channel_names) == 1 else 's'} ({', '.join(channel_names)}) at "
        f"{len(positions)} microphone position{'' if len(positions) == 1 else 's'} ({pos}), "
        f"{fs} Hz" + (f"; {what}" if what else "") + "."
    )
    return lines


def target_shape_db(freq_hz: np.ndarray, spec: str | None) -> np.ndarray | None:
    """The target's own shape (before it is placed at the room's level), if it can be read."""
    if not spec:
        return None
    try:
        return resolve_target(freq_hz, str(spec))
    except (RoomcorrError, OSError, ValueError):
        return None


def target_note(
    freq_hz: np.ndarray, target_db: np.ndarray, shape_db: np.ndarray | None, spec: str | None
) -> str:
    """One or two sentences on the drawn target: which shape, and its level step in the bass.

    The design places the target at the midrange's median level and, below
    :data:`roomcorr.design.curve.area.LEVEL_BLEND_HZ`, lowers it to the bass's own level when
    that lies lower (:func:`roomcorr.design.curve.area.choose_level`): the step seen near
    250 Hz. Its size is the drawn target minus the shape, bass (below the blend)
    against midrange.
    """
    f = np.asarray(freq_hz, dtype=float)
    t = np.asarray(target_db, dtype=float)
    rest = t - (shape_db if shape_db is not None else 0.0)
    mid = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1]) & (f >= LEVEL_BLEND_HZ[1])
    bass = (f >= 30.0) & (f <= LEVEL_BLEND_HZ[0] * 0.75)
    name = f"the {spec} target" if spec else "the target"
    text = (
        f"The dashed line is {name}, placed at the median level of the midrange "
        f"({fmt_hz(REFERENCE_BAND_HZ[0])} to {fmt_hz(REFERENCE_BAND_HZ[1])})."
    )
    if not (np.any(mid) and np.any(bass)):
        return text
    step = float(np.median(rest[bass]) - np.median(rest[mid]))
    if step < -STEP_NOTABLE_DB:
        text += (
            f" Between {fmt_hz(LEVEL_BLEND_HZ[0])} and {fmt_hz(LEVEL_BLEND_HZ[1])} it steps "
            f"down {-step:.1f} dB to the bass's own level: the correction then takes out what "
            "stands out in the bass instead of lifting the whole bass to the midrange, a broad "
            "boost that would cost excursion and headroom."
        )
    return text
