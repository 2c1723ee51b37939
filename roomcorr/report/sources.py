"""Reading a design or measurement folder for its report: curves, quality,
biquads, the through-filters check and the header's facts.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from roomcorr.analysis.average import power_average
from roomcorr.audio_io import read_ir_set
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import (
    PathEscapeError,
    contained,
)
from roomcorr.errors import InputFileError, RoomcorrError
from roomcorr.grid import log_grid
from roomcorr.pipeline import analyse_positions, default_channel_names
from roomcorr.report import glance
from roomcorr.report.quality import quality_from_record
from roomcorr.rooms import COMPLETE_MARKER, measurement_record


def read_through(folder: Path) -> dict[str, Any] | None:
    """``through.check`` of a measurement made with ``measure --through`` (None otherwise)."""

    data = measurement_record(folder)  # a damaged record is one line, never a traceback
    check = (data.get("through") or {}).get("check") if data is not None else None
    return check if isinstance(check, dict) and "measured_db" in check else None


def read_quality(folder: Path) -> list[dict[str, Any]] | None:
    data = measurement_record(folder)  # a damaged record is one line, never a traceback
    return quality_from_record(data) if data is not None else None


def read_iir(folder: Path) -> dict[str, list[dict[str, Any]]] | None:
    """The biquad documents ``iir/<rate>/<name>.json`` of a design folder, by channel name."""
    out: dict[str, list[dict[str, Any]]] = {}
    for p in sorted(folder.glob("iir/*/*.json")):
        try:
            doc = read_json(p, "biquad file")
        except RoomcorrError:
            continue
        if isinstance(doc, dict) and doc.get("format") == "roomcorr-iir":
            out.setdefault(str(doc.get("channel_name", p.stem)), []).append(doc)
    return out or None


def session_curves(folder: Path) -> dict[str, Any]:
    """Curves of a measurement session folder (IR WAVs, no design)."""

    wavs: list[Path] = []
    data = measurement_record(folder)  # the session's own list of impulse responses, in order
    if data is not None:
        try:
            positions = data.get("positions", [])
            wavs = [contained(folder, p["file"]) for p in positions if p.get("file")]
        except PathEscapeError as exc:
            raise InputFileError(f"{folder / 'measurement.json'}: damaged record: {exc}") from None
    if not wavs:
        wavs = sorted(p for p in folder.glob("*.wav"))
    if not wavs:
        raise InputFileError(
            f"{folder}: neither a design folder (manifest.json, design.npz) nor a measurement "
            "folder (impulse-response WAVs); point report at one of those"
        )
    irs, fs, _ = read_ir_set(wavs)
    freq = log_grid()
    measured, _ = analyse_positions(irs, fs, freq)
    channels = []
    for c, name in enumerate(default_channel_names(irs.shape[1])):
        avg, spread = power_average(measured[:, c])
        channels.append({"index": c, "name": name, "measured_db": measured[:, c],
                         "average_db": avg, "spread_db": spread})
    return {"freq_hz": freq, "fs_in": fs, "pre_gain_db": 0.0, "irs": irs, "firs": {},
            "channels": channels}


def _how_measured(folder: Path) -> str:
    """The sweep of a measurement folder's record, or that its responses came as WAV files."""
    try:
        record = read_json(folder / "measurement.json", "measurement.json")
        ms = record["settings"]
        return (
            f"sweeps {float(ms['f_start_hz']):g} Hz to {float(ms['f_end_hz']):g} Hz, "
            f"{float(ms['sweep_s']):g} s, peak {float(ms['level_dbfs']):g} dBFS, "
            f"{int(ms['repeats'])} per loudspeaker"
        )
    except (RoomcorrError, OSError, ValueError, KeyError, TypeError):
        return "impulse responses read from WAV files"


def header_facts(d: Path, manifest: dict[str, Any] | None, curves: dict[str, Any]) -> list[str]:
    """The header's lines for a design (``manifest`` given) or measurement folder."""
    names = [str(ch["name"]) for ch in curves["channels"]]
    if manifest is not None:
        sources = [Path(str(m)) for m in manifest.get("measurements") or []]
        positions = [p.stem for p in sources]
        measured_in = sources[0].parent if sources else None
        m_id = manifest.get("measurement")
        m_id = str(m_id) if m_id else (measured_in.name if measured_in is not None else None)
    else:
        positions = [p.stem for p in sorted(d.glob("*.wav"))]
        measured_in, m_id = d, None
    what = _how_measured(measured_in) if measured_in is not None else None
    return glance.header_lines(d.name, manifest is not None, m_id, positions, names,
                               int(curves["fs_in"]), what)


def _complete(run_dir: Path) -> bool:
    try:
        data = read_json(run_dir / COMPLETE_MARKER, COMPLETE_MARKER)
    except RoomcorrError:
        return False
    return isinstance(data, dict) and data.get("complete") is True
