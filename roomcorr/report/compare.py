"""What changed between two measurements, as text lines and as a figure
(``roomcorr compare``, ``--plot``, and the report's comparison section)."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.analysis.bands import nominal_label
from roomcorr.deliver.atomic import atomic_write_bytes
from roomcorr.errors import OutputError
from roomcorr.report.figures import FREQ_LABELS, FREQ_TICKS, new_figure, png_bytes


def format_comparison(res: dict[str, Any]) -> list[str]:
    """Lines for ``roomcorr compare`` from the result of
    :func:`roomcorr.app.compare.compare_measurements`."""
    lines = [
        f"before: {res['before']}",
        f"after:  {res['after']}",
        f"speed of sound {res['speed_of_sound_m_s']:.1f} m/s at {res['temperature_c']:g} °C "
        f"({res['speed_of_sound_formula']})",
    ]
    timing = res.get("timing")
    if timing:
        lines.append(
            f"timing: before {timing['before']['label']}; after {timing['after']['label']}"
        )
        lines.append(f"  {timing['reason']}")
    move = res.get("move")
    if move:
        lines.append(f"who moved: {move['sentence']}")
    if not res["paired_positions"]:
        lines.append("positions differ in number or sample rate: mean arrivals compared")
    relative = bool(move)
    for ch in res["channels"]:
        lines.append("")
        lines.append(f"{ch['name']}:")
        dist = ch["distance_change_m"]
        dist_text = "distance unsure" if dist is None else f"distance {dist:+.3f} m"
        if relative:
            dist_text += f" (measured {ch['relative_distance_change_m']:+.3f} m relative)"
        lines.append(
            f"  arrival {ch['arrival_before_ms']:.3f} ms -> {ch['arrival_after_ms']:.3f} ms: "
            f"{ch['arrival_change_ms']:+.3f} ms, {dist_text}"
            + (
                " (per position "
                + ", ".join(f"{d:+.3f}" for d in ch["position_distance_change_m"])
                + " m)"
                if len(ch["position_distance_change_m"]) > 1
                else ""
            )
        )
        pattern = ch.get("reflections_changed")
        if pattern is not None and relative and pattern["probability"] is None:
            lines.append(
                f"  early reflections too weak to compare ({pattern['snr_db']:.0f} dB above noise)"
            )
        elif pattern is not None and relative:
            lines.append(
                f"  early reflections {'changed' if pattern['probability'] >= 0.5 else 'unchanged'}"
                f" relative to its own direct sound (change {pattern['ratio']:.3g} x noise)"
            )
        lines.append(
            f"  level {ch['level_change_db']:+.2f} dB (100 Hz-10 kHz), direct sound "
            f"{ch['direct_level_change_db']:+.2f} dB"
        )
        if ch["polarity_inverted"]:
            lines.append("  POLARITY INVERTED: check the loudspeaker's wiring (+/- swapped)")
        bands = ch["lf_band_change_db"]
        if bands:
            lines.append("  low-frequency change per 1/3 octave (Hz: dB):")
            cells = [f"{nominal_label(b['centre_hz'])}: {b['change_db']:+.1f}" for b in bands]
            for i in range(0, len(cells), 7):
                lines.append("    " + "  ".join(f"{c:<12}" for c in cells[i : i + 7]).rstrip())
        changed = [e for e in ch["extrema"] if e["status"] != "unchanged"]
        same = len(ch["extrema"]) - len(changed)
        if changed:
            lines.append("  peaks and dips (relative to the 1-octave trend):")
        for e in changed:
            if e["status"] == "appeared":
                lines.append(
                    f"    {e['kind']} appeared at {e['freq_after_hz']:.0f} Hz "
                    f"({e['height_after_db']:+.1f} dB)"
                )
            elif e["status"] == "vanished":
                lines.append(
                    f"    {e['kind']} at {e['freq_before_hz']:.0f} Hz vanished "
                    f"(was {e['height_before_db']:+.1f} dB)"
                )
            else:
                lines.append(
                    f"    {e['kind']} {e['status']}: {e['freq_before_hz']:.0f} Hz "
                    f"{e['height_before_db']:+.1f} dB -> {e['freq_after_hz']:.0f} Hz "
                    f"{e['height_after_db']:+.1f} dB"
                )
        lines.append(f"  {same} peak(s)/dip(s) unchanged" if same else "  no peak or dip unchanged")
    fit = res.get("filter_fit", {})
    lines.append("")
    if res.get("predicted_change") is not None:
        lines.extend(prediction_lines(res["predicted_change"]))
    if not fit.get("available"):
        lines.append(f"filter check: not done ({fit.get('reason', 'no design')})")
        return lines
    lines.extend(fit_lines(fit))
    return lines


def _move_words(d: list[float]) -> str:
    """A displacement [dx, dy, dz] in the layout's axes, in plain words."""
    parts = []
    for v, pos, neg in ((d[1], "further from the front wall", "closer to the front wall"),
                        (d[0], "towards the right wall", "towards the left wall"),
                        (d[2], "up", "down")):
        if abs(v) >= 0.005:
            parts.append(f"{abs(v) * 100:.0f} cm {pos if v > 0 else neg}")
    return ", ".join(parts) or "less than 1 cm"


def prediction_lines(pc: dict[str, Any]) -> list[str]:
    """Lines of the predicted-against-measured change after a move (``roomcorr compare``,
    the report and the app), from ``predicted_change`` of
    :func:`roomcorr.app.compare.compare_measurements`."""
    if not pc.get("available"):
        return [f"predicted change: none ({pc.get('reason', 'no layout')})"]
    moves = pc["moves"]
    moved = [f"{n} {_move_words(d)}" for n, d in moves["loudspeakers"].items()]
    if moves["seat"]:
        moved.append(f"the seat {_move_words(moves['seat'])}")
    lines = [
        f"after the move ({'; '.join(moved)}), predicted by the room model from the earlier "
        f"measurement and its layout ({pc['layouts']['before']}):"
    ]
    if pc.get("suggestion"):
        lines.append(f"  {pc['suggestion']['text']}")
    lo, hi = pc["band_hz"]
    for ch in pc["channels"]:
        lines.append(
            f"  {ch['name']}: {ch['words']['text']}; over {lo:.0f}-{hi:.0f} Hz (1/"
            f"{pc['band_fraction']} octave) the prediction is off by {ch['held_db']:.1f} dB "
            f"RMS, assuming nothing changed by {ch['unchanged_db']:.1f} dB"
        )
    ratio = pc.get("ratio")
    lines.append(
        f"  {pc['verdict_text']} ({pc['held_db']:.1f} dB RMS against {pc['unchanged_db']:.1f} dB"
        + (f": {ratio:.2f} of the error of assuming nothing changed)" if ratio is not None
           else ")")
    )
    where = (f"position {pc['after_position']} of the later run (nearest its seat)"
             if not pc["assumed_at_seat"] else
             "position 1 of the later run, taken as the seat (its layout lists no measured "
             "positions)")
    offsets = ", ".join(f"{c['name']} {c['offset_db']:+.1f} dB" for c in pc["channels"])
    lines.append(
        f"  compared at {where} against position {pc['before_position']} of the earlier run; "
        f"level offset between the runs removed ({offsets})"
    )
    lines += [f"  {c}" for c in pc.get("cautions", [])]
    return lines


def predicted_change_png(pc: dict[str, Any]) -> bytes:
    """PNG of the predicted and the measured change per loudspeaker (1/6-octave bands),
    from an available ``predicted_change`` of
    :func:`roomcorr.app.compare.compare_measurements`."""
    chans = pc["channels"]
    fig = new_figure(10.0, 2.8 * len(chans), hspace=0.5, bottom=0.1, top=0.9)
    f = np.asarray(pc["bands_hz"], dtype=float)
    for i, ch in enumerate(chans):
        ax = fig.add_subplot(len(chans), 1, i + 1)
        ax.axhline(0.0, color="#7f8c8d", lw=0.8)
        ax.semilogx(f, ch["predicted_change_db"], "o-", color="#2c6fbb", lw=1.3, ms=3,
                    label="predicted change")
        ax.semilogx(f, ch["measured_change_db"], "s-", color="#e67e22", lw=1.3, ms=3,
                    label="measured change")
        ticks = [t for t in FREQ_TICKS if f[0] <= t <= f[-1]]
        ax.set_xticks(ticks, [FREQ_LABELS[FREQ_TICKS.index(t)] for t in ticks])
        ax.minorticks_off()
        ax.grid(True, color="#dde3ea", lw=0.7)
        ax.set_ylabel("dB")
        if i == len(chans) - 1:
            ax.set_xlabel("frequency (Hz), 1/6-octave bands")
        ax.legend(fontsize=7, loc="best")
        ax.set_title(f"{ch['name']}: prediction off by {ch['held_db']:.1f} dB RMS, "
                     f"nothing-changed by {ch['unchanged_db']:.1f} dB", fontsize=9)
    return png_bytes(fig)


VERDICT_TEXT = {
    "keep": "keep the existing filters: they still fit",
    "re-design": "design new filters: the existing ones no longer fit",
    "re-measure first": "measure again first: the new measurement is not one to design from",
}


def fit_lines(fit: dict[str, Any]) -> list[str]:
    """Lines of the filter check (``roomcorr compare``, the report and the app)."""
    made = f", made from measurement {fit['made_from']}" if fit.get("made_from") else ""
    lines = [
        f"filter check against design {fit['design']}{made} ({fit['sample_rate']} Hz): "
        f"{fit['verdict']}: {VERDICT_TEXT[fit['verdict']]}"
    ]
    lines += [f"  because {r}" for r in fit.get("reasons", [])]
    for c in fit["channels"]:
        lines.append(
            f"  {c['name']}: deviation from target with the old filters {c['old_rms_db']:.2f} dB "
            f"RMS (max {c['old_max_db']:.1f}), with a fresh design {c['fresh_rms_db']:.2f} dB "
            f"RMS (max {c['fresh_max_db']:.1f}) -> {'fit' if c['still_fit'] else 'refit'}"
        )
    system = fit.get("system") or {}
    for c in system.get("channels", []):
        lines.append(
            f"  {c['name']}: delay {c['delay_change_ms']:+.3f} ms against the old alignment "
            f"({c['phase_error_deg']:+.0f} degrees at {c['phase_at_hz']:.0f} Hz), level "
            f"{c['trim_change_db']:+.2f} dB against the old trims"
            + (", polarity inverted" if c["polarity_flipped"] else "")
        )
    if "align_tolerance_ms" in system:
        lines.append(
            f"  tolerances: arrival {system['align_tolerance_ms']:g} ms "
            f"({system['align_tolerance_deg']:g} degrees at {system['align_phase_hz']:.0f} Hz; "
            f"a subwoofer {system['crossover_phase_tolerance_deg']:g} degrees at the "
            f"crossover), level {system['trim_tolerance_db']:g} dB"
        )
    return lines


def comparison_png(res: dict[str, Any]) -> bytes:
    """PNG of both responses overlaid per channel, for ``roomcorr compare --plot``.

    ``res`` must come from :func:`roomcorr.app.compare.compare_measurements` with
    ``with_curves=True``.
    Each channel gets a full-range panel (1/24-octave, 20 Hz to 20 kHz) and a
    low-frequency panel (20 to 500 Hz) with the peaks and dips that appeared,
    moved or vanished marked.
    """
    chans = res["channels"]
    if not chans or "curves" not in chans[0]:
        raise ValueError("comparison_png needs compare_measurements(..., with_curves=True)")
    fig = new_figure(10.0, 3.2 * len(chans), hspace=0.45, wspace=0.2, bottom=0.08, top=0.93)
    marks = {
        "appeared": ("v", "#c0392b"),
        "vanished": ("x", "#7f8c8d"),
        "moved": ("o", "#d35400"),
        "changed": ("s", "#8e44ad"),
    }
    for i, ch in enumerate(chans):
        c = ch["curves"]
        f, before, after = np.asarray(c["freq_hz"]), c["before_db"], c["after_db"]
        ref = float(np.mean(before[(f >= 100) & (f <= 10000)]))
        for j, (lo, hi) in enumerate(((20.0, 20000.0), (20.0, 500.0))):
            ax = fig.add_subplot(len(chans), 2, 2 * i + j + 1)
            m = (f >= lo) & (f <= hi)
            ax.semilogx(f[m], before[m] - ref, color="#2c6fbb", lw=1.1, label="before")
            ax.semilogx(f[m], after[m] - ref, color="#e67e22", lw=1.1, label="after")
            ticks = [t for t in FREQ_TICKS if lo <= t <= hi]
            ax.set_xticks(ticks, [FREQ_LABELS[FREQ_TICKS.index(t)] for t in ticks])
            ax.minorticks_off()
            ax.set_xlim(lo, hi)
            ax.grid(True, color="#dde3ea", lw=0.7)
            ax.set_ylabel("dB")
            if j == 1:
                for e in ch["extrema"]:
                    if e["status"] in marks:
                        fx = e["freq_after_hz"] or e["freq_before_hz"]
                        curve = after if e["freq_after_hz"] else before
                        y = float(np.interp(np.log2(fx), np.log2(f), curve)) - ref
                        sym, col = marks[e["status"]]
                        ax.plot([fx], [y], sym, color=col, ms=6, label=e["status"])
                handles, labels = ax.get_legend_handles_labels()
                seen = dict(zip(labels, handles, strict=True))
                ax.legend(seen.values(), seen.keys(), fontsize=7, loc="best", ncol=3)
                ax.set_title(f"{ch['name']}: below 500 Hz", fontsize=9)
            else:
                ax.legend(fontsize=7, loc="lower left")
                dist = ch["distance_change_m"]
                ax.set_title(
                    f"{ch['name']}: distance "
                    + ("unsure" if dist is None else f"{dist:+.3f} m")
                    + f", level {ch['level_change_db']:+.1f} dB",
                    fontsize=9,
                )
    return png_bytes(fig)


def write_comparison_plot(res: dict[str, Any], path: str | os.PathLike[str]) -> Path:
    """Write :func:`comparison_png` to ``path`` atomically; return the path."""
    p = Path(path)
    if p.suffix.lower() != ".png":
        raise OutputError(f"--plot {path}: give a file name ending in .png")
    if not p.parent.is_dir():
        raise OutputError(f"--plot {path}: folder {p.parent} does not exist")
    return atomic_write_bytes(p, comparison_png(res))
