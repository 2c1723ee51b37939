"""History of a room: every run with its key figures, and the text of ``roomcorr history``."""

from __future__ import annotations

import json
import math
import os
import unicodedata
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.analysis.compare import direct_arrival_s
from roomcorr.audio_io import read_ir_set
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.deliver.export import read_manifest
from roomcorr.deliver.figures import figures_of_manifest, fmt_db
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.measure.timing import timing_basis
from roomcorr.rooms import (
    Room,
    check_run,
    design_source,
    is_locked,
    list_runs,
    measurement_files,
    measurement_record,
    open_room,
    room_lock,
    room_name,
)

#: The room's names and notes of its runs: one file at the room's top, never inside a run
#: (run folders are sealed; an unlisted file in one would mark it damaged).
LABELS_FILE = "run-labels.json"
LABELS_VERSION = 1
#: Longest name and note (characters).
NAME_MAX = 60
NOTE_MAX = 500


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
    figs["timing_basis"] = timing_basis(None)
    data = measurement_record(run_dir)  # checked: a damaged record makes the run damaged
    if data is not None:
        figs.update(_record_figures(data))
        figs["timing_basis"] = timing_basis(data)
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
        failed = sorted({str(g.get("name")) for g in gates
                         if g.get("passed") is False and g.get("severity") != "warning"})
        warned = sorted({str(g.get("name")) for g in gates
                         if g.get("passed") is False and g.get("severity") == "warning"})
        if warned:
            out["gates_warned"] = warned
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
    try:  # every figure from the manifest's figures block (roomcorr/deliver/figures.py)
        stored = figures_of_manifest(man)
    except ValueError as exc:
        raise OutputError(f"{run_dir / 'manifest.json'}: {exc}") from None
    figs: dict[str, Any] = {"pre_gain_db": stored["pre_gain_db"], "files": len(files)}
    if firs:
        figs["sample_rates"] = sorted({int(e["sample_rate"]) for e in firs if "sample_rate" in e})
        for key in ("largest_boost_db", "peak_gain_db", "worst_case_gain_db"):
            if stored.get(key) is not None:
                figs[key] = stored[key]
    if stored.get("latency_ms"):
        figs["latency_ms"] = stored["latency_ms"]
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
        length_ms, arrival_ms per channel, peak_dbfs, timing_basis (from
        :func:`roomcorr.measure.timing.timing_basis`); designs: the manifest's
        figures block (pre_gain_db, largest_boost_db, peak_gain_db,
        worst_case_gain_db, latency_ms when not 0), rates, band, target).
    """
    runs = list_runs(room)
    labels = run_labels(room)
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
        label = labels.get(f"{r.kind}/{r.run_id}")
        if label:
            entry["label"] = label
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
        label = e.get("label") or {}
        if label.get("name"):
            head += f"  \"{label['name']}\""
        lines.append(head)
        if label.get("note"):
            lines.append("      note: " + " / ".join(label["note"].splitlines()))
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
            if f.get("gates_warned"):
                extra.append("WARNING: " + ", ".join(f["gates_warned"]))
            if "min_snr_db" in f:
                extra.append(f"lowest SNR {f['min_snr_db']} dB")
            if f.get("timing_basis"):
                extra.append(f"timing: {f['timing_basis']['label']}")
            if extra:
                lines.append("      " + "; ".join(extra))
        elif e["kind"] == "design" and f:
            band = f.get("band_hz")
            band_txt = f"{band[0]:.0f}-{band[1]:.0f} Hz" if band else "-"
            lines.append(
                f"      target {f.get('target', '-')}, band {band_txt}, rates "
                + ",".join(str(r) for r in f.get("sample_rates", []))
            )
            text = (
                f"      pre-gain {fmt_db(f.get('pre_gain_db'), 2, True)}, largest boost "
                f"{fmt_db(f.get('largest_boost_db'))}, peak gain "
                f"{fmt_db(f.get('peak_gain_db'), 2, True)}, worst-case gain "
                f"{fmt_db(f.get('worst_case_gain_db'), 2, True)}"
            )
            if f.get("latency_ms"):
                text += f", latency {f['latency_ms']:g} ms"
            lines.append(text)
        elif e["status"] == "incomplete":
            lines.append("      interrupted before it finished; ignored by other commands")
    return lines


def run_labels(room: Room) -> dict[str, dict[str, str]]:
    """The names and notes given to runs: ``{"kind/run_id": {"name": ..., "note": ...}}``.

    A missing file is no labels; a damaged one is refused (:class:`InputFileError`) rather
    than silently emptied, so the next save cannot drop what it held.
    """
    path = room.root / LABELS_FILE
    if not path.is_file():
        return {}
    try:
        data = read_json(path, LABELS_FILE)  # bounded size and depth
    except InputFileError as exc:
        raise InputFileError(f"{exc}: damaged; fix or remove it") from None
    runs = data.get("runs") if isinstance(data, dict) else None
    if not isinstance(runs, dict):
        raise InputFileError(f"{path}: damaged (expected {{'runs': {{...}}}}); fix or remove it")
    out: dict[str, dict[str, str]] = {}
    for key, value in runs.items():
        if isinstance(value, dict):
            out[str(key)] = {k: str(value[k]) for k in ("name", "note") if value.get(k)}
    return out


def _clean_text(value: Any, what: str, limit: int, one_line: bool) -> str:
    if value is None:
        return ""
    if not isinstance(value, str):
        raise InputFileError(f"{what}: expected text")
    text = value.strip()
    if len(text) > limit:
        raise InputFileError(f"{what}: at most {limit} characters, not {len(text)}")
    allowed = {"\n"} if not one_line else set()
    if any(unicodedata.category(c) == "Cc" and c not in allowed for c in text):
        raise InputFileError(f"{what}: control characters are not allowed")
    return text


def set_run_label(
    room: Room, kind: str, run_id: str, name: Any = None, note: Any = None
) -> dict[str, str]:
    """Give a run a name and a note (both empty: remove them), under the room's lock.

    The room's one labels file (:data:`LABELS_FILE`) is read, changed and written back
    atomically while the room lock is held, so two writers never lose each other's labels.

    Parameters
    ----------
    room : Room
    kind : {"measurement", "design"}
    run_id : str
        A run of the room.
    name : str, optional
        At most :data:`NAME_MAX` characters, one line.
    note : str, optional
        At most :data:`NOTE_MAX` characters.

    Returns
    -------
    dict
        The run's label as stored (``name``, ``note``; empty ones left out).

    Raises
    ------
    InputFileError
        For an unknown run or text that is too long or holds control characters.
    RoomBusyError
        When another process holds the room.
    """
    clean_name = _clean_text(name, "name", NAME_MAX, one_line=True)
    clean_note = _clean_text(note, "note", NOTE_MAX, one_line=False)
    if not any(r.kind == kind and r.run_id == run_id for r in list_runs(room)):
        raise InputFileError(f"{kind} {run_id}: not a run of the room {room.root}")
    key = f"{kind}/{run_id}"
    label = {k: v for k, v in (("name", clean_name), ("note", clean_note)) if v}
    with room_lock(room, "storing a run's name and note"):
        labels = run_labels(room)
        if label:
            labels[key] = label
        else:
            labels.pop(key, None)
        doc = {"format": LABELS_VERSION, "runs": dict(sorted(labels.items()))}
        atomic_write_text(
            room.root / LABELS_FILE, json.dumps(doc, indent=2, ensure_ascii=False) + "\n"
        )
    return label
