"""The report's section on a measurement made through the design's filters."""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.report import figures as fg
from roomcorr.report.parts import SECTION_TITLES, Column, Figure, Section
from roomcorr.report.summary import fmt_hz


def _through_ranges(ranges: list[list[float]]) -> str:
    return ", ".join(f"{fmt_hz(lo)} to {fmt_hz(hi)}" for lo, hi in ranges[:5]) or "nowhere"


def through_section(check: dict[str, Any], names: list[str], png: Any) -> Section:
    """Measured through the filters against the design's prediction, one column per channel.

    ``check`` is ``through.check`` of ``measurement.json``: ``freq_hz``,
    ``measured_db`` and ``predicted_db`` (positions x channels x freqs, 1/6
    octave), ``positions``, ``limit_db`` and ``over_limit_hz`` (per position and
    channel, the ranges where the two differ by more than ``limit_db``).
    """

    freq = np.asarray(check["freq_hz"], dtype=float)
    meas = np.asarray(check["measured_db"], dtype=float)
    pred = np.asarray(check["predicted_db"], dtype=float)
    limit = float(check.get("limit_db", 1.0))
    positions = list(check.get("positions") or range(1, meas.shape[0] + 1))
    over = check.get("over_limit_hz") or []
    sec = Section("through", SECTION_TITLES["through"])
    sec.paragraphs.append(
        "The sweeps were played through the design's filters (pre-gain included) and "
        "compared with what the design predicted for the same positions "
        f"({float(check.get('smoothing_oct', 1 / 6)):.2g}-octave smoothing). Where the two "
        f"differ by more than {limit:g} dB, the room or the microphone position changed, or "
        "the filters are not loaded as designed."
    )
    for c in range(meas.shape[1]):
        name = names[c] if c < len(names) else f"channel {c + 1}"
        col = Column(name)
        for i, pos in enumerate(positions):
            ranges = over[i][c] if i < len(over) and c < len(over[i]) else []
            col.paragraphs.append(
                f"Position {pos}: more than {limit:g} dB apart {_through_ranges(ranges)}."
            )
        col.figures.append(
            Figure(
                f"{name}-through",
                f"Measured through the filters against the prediction, {name}",
                png(fg.plot_through(freq, meas[:, c], pred[:, c], positions, f"Through: {name}")),
            )
        )
        sec.columns.append(col)
    return sec


def through_sentence(check: dict[str, Any]) -> str:
    over = check.get("over_limit_hz") or []
    n_bad = sum(1 for per_pos in over for ranges in per_pos if ranges)
    n_all = sum(len(per_pos) for per_pos in over)
    limit = float(check.get("limit_db", 1.0))
    if n_bad == 0:
        return (
            f"Measured through the filters, every position stays within {limit:g} dB of the "
            "design's prediction."
        )
    return (
        f"Measured through the filters, {n_bad} of {n_all} loudspeaker positions differ from "
        f"the design's prediction by more than {limit:g} dB somewhere (see that section)."
    )
