"""The report's section on how good the measurement was (from ``measurement.json``)."""

from __future__ import annotations

from typing import Any

from roomcorr.report import figures as fg
from roomcorr.report.parts import SECTION_TITLES, Figure, Section


def quality_from_record(record: dict[str, Any]) -> list[dict[str, Any]]:
    """Per-recording quality figures from a session's ``measurement.json`` record.

    Returns
    -------
    list of dict
        ``label`` ("pos1 out1"), ``snr_db``, ``hd_freq_hz``, ``hd_db``,
        ``repeat_db`` and ``gates`` (list of gate dicts), one per recording.
    """
    out = []
    for pos in record.get("positions", []) or []:
        for ch in pos.get("channels", []) or []:
            fig = ch.get("figures", {}) or {}
            hd = fig.get("harmonic_distortion", {}) or {}
            out.append(
                {
                    "label": f"pos{pos.get('position', '?')} out{ch.get('output', '?')}",
                    "snr_db": fig.get("snr_db_per_octave") or {},
                    "hd_freq_hz": hd.get("fundamental_hz") or [],
                    "hd_db": hd.get("orders") or {},
                    "repeat_db": fig.get("repeat_disagreement_db"),
                    "gates": ch.get("gates") or [],
                }
            )
    return out


def quality_section(recordings: list[dict[str, Any]], png: Any) -> Section:
    sec = Section("quality", SECTION_TITLES["quality"])
    sec.paragraphs.append(
        "Signal to noise per octave band (40 dB or more is comfortable), the loudspeaker's "
        "harmonic distortion during the sweep (second harmonic solid, third dashed), and how "
        "far repeated sweeps differed from their mean, in dB relative to the response "
        "(lower is better)."
    )
    failed = [
        f"{r['label']}: {g.get('name')} ({g.get('message', '')})"
        for r in recordings
        for g in r["gates"]
        if not g.get("passed", True) and g.get("severity") != "warning"
    ]
    warned = [
        f"{r['label']}: {g.get('message', g.get('name'))}"
        for r in recordings
        for g in r["gates"]
        if not g.get("passed", True) and g.get("severity") == "warning"
    ]
    if warned:
        sec.paragraphs.append("Warning: " + "; ".join(warned) + ".")
    if failed:
        sec.paragraphs.append("Checks that failed (kept on request): " + "; ".join(failed) + ".")
    elif not warned:
        sec.paragraphs.append("Every recording passed every quality check.")
    rows = [["recording", "lowest SNR (dB)", "repeat difference (dB)", "checks passed"]]
    for r in recordings:
        snr = [float(v) for v in r["snr_db"].values() if v is not None]
        rep = r["repeat_db"]
        rows.append(
            [
                r["label"],
                f"{min(snr):.0f}" if snr else "n/a",
                "n/a" if rep is None else f"{float(rep):.1f}",
                f"{sum(bool(g.get('passed')) for g in r['gates'])} of {len(r['gates'])}",
            ]
        )
    sec.table = rows
    sec.figures.append(
        Figure("quality", "Measurement quality", png(fg.plot_quality(recordings, "Measurement")))
    )
    return sec
