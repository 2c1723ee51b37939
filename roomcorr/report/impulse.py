"""The report's per-channel sections in time: impulse and step, and for a
mixed-phase design the direct sound and latency.
"""

from __future__ import annotations

import numpy as np

from roomcorr.design.phase.mixedphase import PRE_RING_LIMIT_DB, PRE_RING_S
from roomcorr.report import figures as fg
from roomcorr.report.context import ReportChannel, ReportContext
from roomcorr.report.parts import Column, Figure
from roomcorr.report.summary import fmt_hz


def _latency_samples_at(ctx: ReportContext, fs: int) -> int:
    """Design latency in samples at ``fs`` (0 for minimum phase)."""
    if not ctx.mixed:
        return 0
    n = ctx.mixed["latency_samples"].get(fs)
    if n is None:
        return int(round(float(ctx.mixed["latency_ms"]) * fs / 1000.0))
    return int(n)


def time_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    if x.corrected is None or x.fir is None or x.pos_irs is None:
        return None
    col = Column(x.name)
    after = np.asarray(x.corrected[0])
    lat = _latency_samples_at(ctx, ctx.fs)
    if lat:  # drawn aligned: the design latency is taken out, so only pre-ringing leads
        after = np.concatenate([after[lat:], np.zeros(min(lat, after.size))])
    col.figures.append(
        Figure(
            f"{x.name}-time",
            f"Impulse and step response, {x.name}",
            ctx.png(fg.plot_time(ctx.fs, x.fir, x.pos_irs[0], after,
                                 f"Time response: {x.name}")),
        )
    )
    return col


def phase_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    """The mixed-phase part of one channel (``None`` for a minimum-phase design)."""

    mixed = ctx.mixed
    if not mixed or x.index >= len(mixed["channels"]):
        return None
    ch = mixed["channels"][x.index]
    col = Column(x.name)
    lo, hi = (float(v) for v in ch["band_hz"])
    col.paragraphs.append(
        f"The loudspeaker's excess phase (the measured phase minus that of the minimum-phase "
        f"response with the same magnitude) was estimated from the direct sound of every "
        f"position, before the first strong reflection, and undone between {fmt_hz(lo)} and "
        f"{fmt_hz(hi)} where the positions agree. Below that the room owns the phase, and "
        "the filter leaves it alone (a pure delay). The magnitude is the minimum-phase "
        "design's. From 300 Hz up (fading in from 150 Hz) the filter also takes out the group "
        "delay of its own magnitude correction, as far as the pre-ringing limit allows, so "
        "the corrected direct sound arrives at once at every frequency; in the bass it stays "
        "minimum phase."
    )
    if "view_gd_s" in ch:
        view = {k[len("view_") :]: v for k, v in ch.items() if k.startswith("view_")}
        col.figures.append(
            Figure(
                f"{x.name}-phase",
                f"Direct sound before and after, and pre-ringing, {x.name}",
                ctx.png(
                    fg.plot_mixed_phase(
                        view,
                        float(mixed["latency_ms"]),
                        PRE_RING_LIMIT_DB,
                        1000 * PRE_RING_S,
                        f"Mixed phase: {x.name}",
                    )
                ),
            )
        )
    else:
        col.paragraphs.append(
            "No filter was designed at the measurement's sample rate, so the direct sound "
            "could not be shown before and after."
        )
    return col  # the latency and its caution are stated once, in the overview


#: Intro of the time section for a mixed-phase design (instead of the minimum-phase one).
TIME_INTRO_MIXED = (
    "Top: the filter alone. Bottom: the first position before and after correction, the "
    "corrected response drawn with the design latency taken out so that both main peaks sit "
    "at 0 ms. Anything left of 0 ms is pre-ringing: a mixed-phase filter has some (measured "
    "in the mixed-phase section)."
)
