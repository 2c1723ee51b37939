"""The report's per-channel sections on the correction: the room as measured, the
predicted result, the filter, and its biquad version.
"""

from __future__ import annotations

import numpy as np

from roomcorr.deliver.export_iir import pre_gain_note
from roomcorr.deliver.figures import fmt_db
from roomcorr.report import figures as fg
from roomcorr.report import glance
from roomcorr.report.context import ReportChannel, ReportContext
from roomcorr.report.curves import filter_response, iir_response_db
from roomcorr.report.parts import Column, Figure
from roomcorr.report.summary import fmt_hz, withheld_regions


def _target_note(x: ReportChannel, ctx: ReportContext) -> str:
    """What the dashed target line is, beside each figure that draws it."""
    return glance.target_note(ctx.freq, x.ch["target_db"], ctx.target_shape, ctx.target_spec)


def room_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    col = Column(x.name)
    if x.ch.get("target_db") is not None:
        col.paragraphs.append(_target_note(x, ctx))
    col.figures.append(
        Figure(
            f"{x.name}-room",
            f"Measured response, {x.name}",
            ctx.png(
                fg.plot_responses(
                    ctx.freq, x.ch["measured_db"], x.ch["average_db"], x.ch.get("target_db"),
                    x.band, ctx.caps["max_boost_db"], f"Measured: {x.tag}",
                )
            ),
        )
    )
    return col


def result_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    if x.predicted is None:
        return None
    col = Column(x.name)
    col.paragraphs.append(f"Predicted from {x.how}.")
    col.paragraphs.append(_target_note(x, ctx))
    col.figures.append(
        Figure(
            f"{x.name}-result",
            f"Predicted result, {x.name}",
            ctx.png(fg.plot_predicted(ctx.freq, x.predicted, x.ch["average_db"],
                                      np.asarray(x.ch["target_db"]) + ctx.pre_gain, x.band,
                                      f"Corrected: {x.tag}", ctx.pre_gain)),
        )
    )
    return col


_REFUSAL_REASONS = {
    "cancellation": "the dip is a cancellation that moves with the listener, "
    "so boost would burn headroom for nothing",
    "spread": "the positions disagree too much there",
    "cap": "the boost cap was reached",
}


def filter_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    if x.fir is None or x.predicted is None:
        return None
    gain, phase, gd = filter_response(x.fir, x.rate, ctx.freq)
    col = Column(x.name)
    col.paragraphs.append(_filter_description(x, ctx))
    regions = withheld_regions(ctx.freq, x.ch, ctx.caps["max_boost_db"])
    for r in regions[:4]:
        col.paragraphs.append(
            f"Boost refused around {fmt_hz(r['freq_hz'])} "
            f"({fmt_hz(r['lo_hz'])} to {fmt_hz(r['hi_hz'])}, "
            f"{r['withheld_db']:.1f} dB withheld): {_REFUSAL_REASONS[r['reason']]}."
        )
    if not regions:
        col.paragraphs.append("No boost was refused.")
    col.figures.append(
        Figure(
            f"{x.name}-filter",
            f"Filter magnitude, phase and group delay, {x.name}",
            ctx.png(fg.plot_filter(ctx.freq, gain, phase, gd, x.ch["correction_db"],
                                   x.ch["boost_withheld_db"], x.band, ctx.pre_gain, x.rate,
                                   f"Filter: {x.name}")),
        )
    )
    return col


def _filter_description(x: ReportChannel, ctx: ReportContext) -> str:
    """What the filter is: minimum phase, or mixed phase with latency and measured pre-ringing."""
    pre = fmt_db((ctx.figures or {}).get("pre_gain_db", ctx.pre_gain), 2, True)
    if not ctx.mixed:
        return (
            f"Minimum-phase FIR at {x.rate} Hz, {len(x.fir)} taps, pre-gain {pre} included; "
            "a minimum-phase filter adds no latency and has no pre-ringing."
        )
    n = ctx.mixed["latency_samples"].get(x.rate)
    lat = f"{ctx.mixed['latency_ms']:g} ms" + ("" if n is None else f" ({n} samples)")
    ring = (ctx.figures or {}).get("pre_ringing_db")
    ring_txt = (
        "" if ring is None
        else f"; its pre-ringing, measured, is at most {fmt_db(ring)} re its main peak"
    )
    return (
        f"Mixed-phase FIR at {x.rate} Hz, {len(x.fir)} taps, latency {lat}, pre-gain {pre} "
        f"included: minimum phase in the bass, and above it the loudspeaker's excess phase "
        f"undone as well{ring_txt} (see the time and mixed-phase sections)."
    )


def iir_column(x: ReportChannel, ctx: ReportContext) -> Column | None:
    """The biquad version of one channel: both pre-gains, the sections by frequency, notes."""

    docs = (ctx.iir or {}).get(x.name)
    if not docs or "correction_db" not in x.ch:
        return None
    freq = ctx.freq
    col = Column(x.name)
    cascades = {int(d["sample_rate"]): iir_response_db(d, freq) for d in docs}
    fir_db = filter_response(x.fir, x.rate, freq)[0] if x.fir is not None else None
    doc = min(docs, key=lambda d: abs(int(d["sample_rate"]) - 48000))
    figs = doc.get("figures") or {}
    iir_pre = float(doc.get("pre_gain_db", 0.0))
    col.paragraphs.append(
        f"{len(doc.get('sections') or [])} biquad sections (Audio EQ Cookbook forms) fitted to "
        "the same correction, for players that take parametric filters instead of an FIR; "
        "the table lists the sections at "
        f"{doc['sample_rate']} Hz by frequency (# is the stage in the .csv). Peak gain "
        f"{fmt_db(figs.get('peak_gain_db'), 2)}, "
        f"worst-case gain {fmt_db(figs.get('worst_case_gain_db'), 2)}, fit error "
        f"{fmt_db(figs.get('fit_rms_error_db'), 2)} rms."
    )

    col.paragraphs.append(pre_gain_note(iir_pre, ctx.pre_gain))
    notes = [str(n) for n in doc.get("notes") or []]
    if notes:
        col.details = (f"Why {len(notes)} narrow section(s) sit beside refused dips", notes)
    rows = [["#", "type", "frequency (Hz)", "gain (dB)", "Q"]]
    secs = list(enumerate(doc.get("sections") or [], start=1))
    for i, sct in sorted(secs, key=lambda t: (float(t[1].get("freq_hz", 0)), t[0])):
        rows.append([str(i), str(sct.get("type")), f"{float(sct.get('freq_hz', 0)):.1f}",
                     f"{float(sct.get('gain_db', 0)):.2f}", f"{float(sct.get('q', 0)):.2f}"])
    col.table = rows
    col.figures.append(
        Figure(f"{x.name}-iir", f"Biquad cascade against the FIR, {x.name}",
               ctx.png(fg.plot_iir(freq, cascades, fir_db,
                                   np.asarray(x.ch["correction_db"]) + ctx.pre_gain, x.band,
                                   f"Biquads: {x.name}")))
    )
    return col
