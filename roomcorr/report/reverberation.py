"""The report's per-channel sections on decay: reverberation times by octave
(ISO 3382-1) and low-frequency ringing.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.analysis.decay import low_frequency_decay_map, octave_band_decay, ringing_modes
from roomcorr.analysis.decay import mean_band_decay as _mean_band_decay
from roomcorr.report import figures as fg
from roomcorr.report.context import ReportChannel, ReportContext
from roomcorr.report.parts import Column, Figure
from roomcorr.report.summary import fmt_hz


def _decay_table(bands: list[Any]) -> list[list[str]]:
    def cell(v: float, ok: bool) -> str:
        if not np.isfinite(v):
            return "n/a"
        # rounded first to the 4 decimals the app's decay view stores, so both print the
        # same two decimals (no double-rounding difference at x.xx5)
        return f"{float(np.round(v, 4)):.2f}" + ("" if ok else " *")

    rows = [["band (Hz)", "EDT (s)", "T20 (s)", "T30 (s)", "peak-to-noise (dB)"]]
    for b in bands:
        rows.append(
            [
                b.label,
                cell(b.edt_s, b.valid["edt"]),
                cell(b.t20_s, b.valid["t20"]),
                cell(b.t30_s, b.valid["t30"]),
                f"{b.dynamic_range_db:.0f}",
            ]
        )
    return rows


def _position_decay(x: ReportChannel, ctx: ReportContext) -> list[Any]:
    """Octave-band decay averaged over positions (empty when it cannot be analysed)."""

    if x.pos_irs is None:
        return []
    try:
        per_pos = [octave_band_decay(x.pos_irs[p], ctx.fs) for p in range(len(x.pos_irs))]
    except ValueError:  # too short or silent: no decay analysis possible
        return []
    return _mean_band_decay(per_pos) if per_pos and per_pos[0] else []


def decay_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    bands = _position_decay(x, ctx)
    if not bands:
        return None
    col = Column(x.name)
    col.table = _decay_table(bands)
    col.figures.append(
        Figure(f"{x.name}-decay", f"Decay curves and times, {x.name}",
               ctx.png(fg.plot_decay(bands, f"Decay: {x.name}")))
    )
    return col


def ringing_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    if x.pos_irs is None or not _position_decay(x, ctx):
        return None
    before_map = low_frequency_decay_map(x.pos_irs[0], ctx.fs)
    modes = ringing_modes(before_map)
    maps = [("as measured", before_map)]
    if x.corrected is not None:
        maps.append(("corrected", low_frequency_decay_map(x.corrected[0], ctx.fs)))
    col = Column(x.name)
    if modes:
        txt = ", ".join(f"{f0:.0f} Hz ({t0:.2f} s)" for f0, t0 in modes)
        col.paragraphs.append(
            f"Peaks still loudest 200 ms after the sound stops (60 dB decay time): {txt}."
        )
        ctx.ringing_notes.append(
            f"{x.name} around {fmt_hz(modes[0][0])} ({modes[0][1]:.2f} s to decay 60 dB)"
        )
    col.figures.append(
        Figure(f"{x.name}-ringing", f"Low-frequency decay map, {x.name}",
               ctx.png(fg.plot_decay_map(maps, modes, f"Low-frequency decay: {x.name}")))
    )
    return col
