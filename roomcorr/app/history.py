"""History of a room: every run with its key figures, and the text of ``roomcorr history``."""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.analysis.compare import direct_arrival_s
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.export import read_manifest
from roomcorr.errors import OutputError, RoomcorrError
from roomcorr.rooms import (
    Room,
    check_run,
    design_source,
    is_locked,
    list_runs,
    measurement_files,
    measurement_record,
    open_room,
    room_name,
)


def _measurement_figures(run_dir: Path) -> dict[str, Any]:
    figs: dict[str, Any] = {}
    irs, fs, files = read_ir_set(measurement_files(run_dir))
    figs.update(
        positions=irs.shape[0],
        channels=irs.shape[1],
        sample_rate=fs,
        length_ms=round(irs.shape[2] / fs * 1e3, 1),
    )
    figs["arrival_ms"] = [
        round(
            float(np.mean([direct_arrival_s(irs[p, c], fs) for p in range(irs.shape[0])])) * 1e3, 3
        )
        for c in range(irs.shape[1])
    ]
    figs["peak_dbfs"] = round(float(20 * np.log10(np.max(np.abs(irs)) + 1e-30)), 1)
    data = measurement_record(run_dir)  # checked: a damaged record makes the run damaged
    if data is not None:
        figs.update(_record_figures(data))
    return figs


def _record_figures(data: dict[str, Any]) -> dict[str, Any]:
    """Quality figures from a ``measurement.json`` record (as ``roomcorr measure`` writes it)."""
    out: dict[str, Any] = {}
    if isinstance(data.get("loopback"), bool):
        out["loopback"] = data["loopback"]
    gates = []
    snr = []
    for pos in data.get("positions", []) or []:
        for ch in (pos or {}).get("channels", []) or []:
            gates += [g for g in ch.get("gates", []) if isinstance(g, dict)]
            v = (ch.get("figures") or {}).get("min_snr_db")
            if isinstance(v, int | float):
                snr.append(float(v))
    if gates:
        failed = sorted({str(g.get("name")) for g in gates if g.get("passed") is False})
        out["gates_passed"] = f"{len(gates) - sum(g.get('passed') is False for g in gates)}"
        out["gates_passed"] += f"/{len(gates)}"
        if failed:
            out["gates_failed"] = failed
    if snr:
        out["min_snr_db"] = round(min(snr), 1)
    return out


def _design_figures(run_dir: Path) -> dict[str, Any]:
    man = read_manifest(run_dir)  # OutputError for a damaged manifest
    files = man["files"]
    firs = [e for e in files if e.get("kind") == "fir"]
    figs: dict[str, Any] = {"pre_gain_db": _number(man.get("pre_gain_db")), "files": len(files)}
    if firs:
        figs["sample_rates"] = sorted({int(e["sample_rate"]) for e in firs if "sample_rate" in e})
        for key in ("peak_gain_db", "worst_case_gain_db", "max_boost_db"):
            vals = [_number(e[key]) for e in firs if key in e]
            if None in vals:
                raise OutputError(f"{run_dir / 'manifest.json'}: {key} is not a finite number")
            if vals:
                figs[key] = max(vals)
    bands = [c.get("band_hz") for c in man.get("channels", []) if isinstance(c, dict)]
    if bands and all(isinstance(b, list) and len(b) == 2 for b in bands):
        figs["band_hz"] = [min(float(b[0]) for b in bands), max(float(b[1]) for b in bands)]
    design = (man.get("settings") or {}).get("design")
    target = design.get("target") if isinstance(design, dict) else None
    if target:
        figs["target"] = str(target)
    return figs


def _number(v: Any) -> float | None:
    """A finite float from a JSON value, else None."""
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def history(room: Room) -> list[dict[str, Any]]:
    """Every run of the room, oldest first, with its key figures.

    Returns
    -------
    list of dict
        ``kind, run_id, path, status ("complete", "incomplete" or "running"),
        started_utc, finished_utc, source`` (designs: the measurement used)
        and ``figures`` (measurements: positions, channels, sample_rate,
        length_ms, arrival_ms per channel, peak_dbfs; designs: pre_gain_db,
        peak/worst-case gain, boost, rates, band, target).
    """
    runs = list_runs(room)
    busy = is_locked(room)
    newest_incomplete = next((r for r in reversed(runs) if not r.complete), None)
    out = []
    for r in runs:
        status = "complete" if r.complete else "incomplete"
        if not r.complete and busy and r is newest_incomplete:
            status = "running"
        entry: dict[str, Any] = {
            "kind": r.kind,
            "run_id": r.run_id,
            "path": str(r.path),
            "status": status,
            "started_utc": r.marker.get("started_utc"),
            "finished_utc": r.marker.get("finished_utc"),
        }
        info = r.marker.get("info", {})
        if r.kind == "design":
            entry["source"] = design_source(r) if r.complete else info.get("measurement")
        if info.get("note"):
            entry["note"] = info["note"]
        problem = r.problem
        if r.complete:
            # Sizes of every file; SHA-256 of all but the raw recordings (large, and
            # read by no command after the run).
            use = [rel for rel in r.marker.get("files", {}) if not rel.startswith("raw/")]
            problem = check_run(r, use)
        if problem is None and r.complete:
            try:
                entry["figures"] = (
                    _measurement_figures(r.path)
                    if r.kind == "measurement"
                    else _design_figures(r.path)
                )
            except (RoomcorrError, OSError, ValueError, TypeError, KeyError, AttributeError) as e:
                problem = " ".join(str(e).split()) or type(e).__name__
        if problem is not None:
            entry["status"] = "damaged"
            entry["figures"] = {"problem": problem}
        out.append(entry)
    return out


def room_history(room_dir: str | os.PathLike[str]) -> dict[str, Any]:
    """What ``roomcorr history`` shows: the room folder, its name and every run.

    Returns
    -------
    dict
        ``room`` (the folder), ``name`` and ``runs`` (:func:`history` entries).
    """
    room = open_room(room_dir)
    return {"room": str(room.root), "name": room_name(room), "runs": history(room)}


def _fmt(v: Any, spec: str = "+.2f", unit: str = "") -> str:
    return "-" if v is None else f"{v:{spec}}{unit}"


def format_history(entries: list[dict[str, Any]], name: str = "") -> list[str]:
    """Lines for ``roomcorr history`` (one block per run, oldest first)."""
    lines = [f"Room {name}: {len(entries)} run(s)" if name else f"{len(entries)} run(s)"]
    if not entries:
        lines.append("  nothing measured yet; run 'roomcorr measure' inside the room folder")
    for e in entries:
        head = f"  {e['run_id']}  {e['kind']:<11}  {e['status']}"
        if e.get("source"):
            head += f"  from measurement {Path(str(e['source'])).name}"
        if e.get("note"):
            head += f"  ({e['note']})"
        lines.append(head)
        f = e.get("figures") or {}
        if f.get("problem"):
            lines.append(f"      problem: {f['problem']}")
        elif e["kind"] == "measurement" and f:
            arr = ", ".join(f"{a:.2f}" for a in f.get("arrival_ms", []))
            text = (
                f"      {f.get('positions')} position(s) x {f.get('channels')} channel(s), "
                f"{f.get('sample_rate')} Hz, {f.get('length_ms')} ms; arrival {arr} ms; "
                f"peak {f.get('peak_dbfs')} dBFS"
            )
            lines.append(text)
            extra = []
            if "gates_passed" in f:
                extra.append(f"quality gates passed {f['gates_passed']}")
            if f.get("gates_failed"):
                extra.append("failed: " + ", ".join(f["gates_failed"]))
            if "min_snr_db" in f:
                extra.append(f"lowest SNR {f['min_snr_db']} dB")
            if f.get("loopback") is False:
                extra.append("no loopback (arrival includes system latency)")
            if extra:
                lines.append("      " + "; ".join(extra))
        elif e["kind"] == "design" and f:
            band = f.get("band_hz")
            band_txt = f"{band[0]:.0f}-{band[1]:.0f} Hz" if band else "-"
            lines.append(
                f"      target {f.get('target', '-')}, band {band_txt}, rates "
                + ",".join(str(r) for r in f.get("sample_rates", []))
            )
            lines.append(
                f"      pre-gain {_fmt(f.get('pre_gain_db'), unit=' dB')}, peak gain "
                f"{_fmt(f.get('peak_gain_db'), unit=' dB')}, worst case "
                f"{_fmt(f.get('worst_case_gain_db'), unit=' dB')}, boost up to "
                f"{_fmt(f.get('max_boost_db'), '.1f', ' dB')}"
            )
        elif e["status"] == "incomplete":
            lines.append("      interrupted before it finished; ignored by other commands")
    return lines
