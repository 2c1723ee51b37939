"""Read-only views of a room folder: its runs, a design's curves, a measurement's responses.

Every path a caller names (run id, file inside a run) is resolved and must lie
inside the room folder; a run id is a plain folder name, never a path.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.compare import compare_measurements
from roomcorr.app.history import history
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.errors import InputFileError
from roomcorr.grid import log_grid
from roomcorr.pipeline import analyse_positions, default_channel_names
from roomcorr.report.compare import format_comparison

#: Plot curves are thinned to this many points per octave (the design grid has 96).
PLOT_POINTS_PER_OCTAVE = 48


def _finite_list(values: np.ndarray, ndigits: int = 3) -> list[float | None]:
    """Floats rounded for transport; NaN and infinities become ``None`` (JSON null)."""
    out: list[float | None] = []
    for v in np.asarray(values, dtype=float).ravel():
        out.append(round(float(v), ndigits) if math.isfinite(v) else None)
    return out


def _thin(freq_hz: np.ndarray) -> np.ndarray:
    """Indices of the log grid kept for plotting (every k-th point)."""
    ppo = (freq_hz.size - 1) / np.log2(freq_hz[-1] / freq_hz[0])
    step = max(1, int(round(ppo / PLOT_POINTS_PER_OCTAVE)))
    return np.arange(0, freq_hz.size, step)


def run_folder(room: rooms.Room, kind: str, run_id: str) -> Path:
    """The folder of run ``run_id`` of ``kind``, contained in the room folder.

    Raises
    ------
    InputFileError
        If ``run_id`` is not the plain name of an existing run of that kind.
    """
    if kind not in rooms.KINDS:
        raise InputFileError(f"{kind}: not a kind of run (measurement or design)")
    name = str(run_id)
    if not name or name in {".", ".."} or "/" in name or "\\" in name or name.startswith("."):
        raise InputFileError(f"{run_id!r}: not a run id")
    base = (room.root / rooms.KINDS[kind]).resolve()
    path = (base / name).resolve()
    if path.parent != base or not path.is_dir():
        raise InputFileError(f"{run_id}: no such {kind} run in {room.root}")
    return path


def room_overview(room: rooms.Room) -> dict[str, Any]:
    """Name, folder and history of a room (the same runs as ``roomcorr history``).

    Returns
    -------
    dict
        ``name``, ``root``, ``runs`` (:func:`roomcorr.app.history.history` entries
        with paths made relative to the room folder).
    """
    runs = history(room)
    for r in runs:
        r["path"] = Path(r["path"]).relative_to(room.root).as_posix()
    return {"name": rooms.room_name(room), "root": str(room.root), "runs": runs}


def design_view(room: rooms.Room, run_id: str) -> dict[str, Any]:
    """Curves of a design run, ready to plot.

    Returns
    -------
    dict
        ``freq_hz``; ``pre_gain_db``; ``channels``: per channel ``name``,
        ``band_hz`` and the curves ``measured_db`` (per position), ``average_db``,
        ``spread_db``, ``target_db``, ``correction_db``, ``boost_withheld_db``
        and ``predicted_db`` (average plus correction, per position as well);
        ``filters``: per sample rate and channel the FIR's magnitude (dB, with
        the pre-gain), phase (degrees, unwrapped) and group delay (ms);
        ``manifest``: the design's manifest.
    """
    from roomcorr.design.fir import fir_response_db

    folder = run_folder(room, "design", run_id)
    rooms.verified(room, folder, use=[folder / "design.npz", folder / "manifest.json"])
    curves = load_design_curves(folder)
    freq = np.asarray(curves["freq_hz"], dtype=float)
    keep = _thin(freq)
    f = freq[keep]
    channels = []
    for ch in curves["channels"]:
        corr = np.asarray(ch["correction_db"])[keep]
        measured = np.asarray(ch["measured_db"])[:, keep]
        channels.append(
            {
                "name": ch["name"],
                "band_hz": list(ch["band_hz"]),
                "measured_db": [_finite_list(m) for m in measured],
                "predicted_db": [_finite_list(m + corr) for m in measured],
                **{
                    key: _finite_list(np.asarray(ch[key])[keep])
                    for key in (
                        "average_db",
                        "spread_db",
                        "target_db",
                        "correction_db",
                        "boost_withheld_db",
                    )
                },
            }
        )
    filters: dict[str, list[dict[str, Any]]] = {}
    f_plot = f[f <= 20000.0]
    for fs, firs in sorted(curves["firs"].items()):
        per_rate = []
        for c, h in enumerate(np.asarray(firs)):
            band = f_plot[f_plot < fs / 2]
            n_fft = 1 << int(np.ceil(np.log2(max(h.size * 2, 65536))))
            spec = np.fft.rfft(h, n_fft)
            bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
            phase = np.unwrap(np.angle(spec))
            gd = -np.gradient(phase, 2 * np.pi * bins) * 1000.0
            per_rate.append(
                {
                    "channel": curves["channels"][c]["name"],
                    "freq_hz": _finite_list(band, 2),
                    "magnitude_db": _finite_list(fir_response_db(h, fs, band)),
                    "phase_deg": _finite_list(np.degrees(np.interp(band, bins, phase)), 1),
                    "group_delay_ms": _finite_list(np.interp(band, bins, gd)),
                }
            )
        filters[str(fs)] = per_rate
    return {
        "run_id": folder.name,
        "freq_hz": _finite_list(f, 2),
        "pre_gain_db": round(float(curves["pre_gain_db"]), 3),
        "channels": channels,
        "filters": filters,
        "manifest": read_manifest(folder),
    }


def measurement_view(room: rooms.Room, run_id: str) -> dict[str, Any]:
    """Windowed, smoothed responses of every position and channel of a measurement run.

    The same analysis as the design's (:func:`roomcorr.pipeline.analyse_positions`),
    without a calibration; curves are in dB relative to full scale.
    """
    folder = run_folder(room, "measurement", run_id)
    files = rooms.measurement_files(folder)
    rooms.verified(room, folder, use=files)
    irs, fs, _ = read_ir_set([str(p) for p in files])
    freq = log_grid()
    measured, arrival = analyse_positions(irs, fs, freq)
    keep = _thin(freq)
    n_ch = irs.shape[1]
    names = default_channel_names(n_ch)
    return {
        "run_id": folder.name,
        "freq_hz": _finite_list(freq[keep], 2),
        "positions": [p.stem for p in files],
        "channels": [
            {
                "name": names[c],
                "measured_db": [_finite_list(measured[p, c, keep]) for p in range(irs.shape[0])],
                "arrival_ms": _finite_list(arrival[:, c] * 1000.0),
            }
            for c in range(n_ch)
        ],
    }


def _plain(value: Any) -> Any:
    """JSON-ready copy: arrays to lists, numpy scalars to floats, non-finite to None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _finite_list(value) if value.ndim <= 1 else [_plain(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, Path):
        return str(value)
    return value


def compare_view(room: rooms.Room, before: str, after: str) -> dict[str, Any]:
    """Two measurement runs of the room compared, as ``roomcorr compare`` does.

    Returns
    -------
    dict
        The result of :func:`roomcorr.app.compare.compare_measurements` (with the
        response curves of both, per channel) and ``text``: the lines
        ``roomcorr compare`` prints.
    """
    a = run_folder(room, "measurement", before)
    b = run_folder(room, "measurement", after)
    res = compare_measurements(a, b, room=room, with_curves=True)
    out = _plain(res)
    out["text"] = format_comparison(res)
    return out


def run_files(room: rooms.Room, run_id: str) -> list[dict[str, Any]]:
    """The files a design run wrote, as its manifest lists them (path, kind, SHA-256...)."""
    folder = run_folder(room, "design", run_id)
    rooms.verified(room, folder, use=[folder / "manifest.json"])
    entries = []
    for e in read_manifest(folder).get("files", []):
        if isinstance(e, dict) and isinstance(e.get("path"), str):
            entries.append({k: v for k, v in e.items() if isinstance(v, str | int | float)})
    return entries


def run_file(room: rooms.Room, kind: str, run_id: str, rel_path: str) -> Path:
    """A regular file inside a run folder, by its path relative to that folder.

    Raises
    ------
    InputFileError
        For anything outside the run folder (``..``, absolute paths, links
        leading out), a folder, or a missing file.
    """
    folder = run_folder(room, kind, run_id)
    rel = Path(rel_path)
    if rel.is_absolute() or ".." in rel.parts:
        raise InputFileError(f"{rel_path}: not a file of run {run_id}")
    path = (folder / rel).resolve()
    if folder not in path.parents or not path.is_file():
        raise InputFileError(f"{rel_path}: not a file of run {run_id}")
    rooms.verified(room, folder, use=[path])
    return path


__all__ = [
    "compare_view",
    "design_view",
    "measurement_view",
    "room_overview",
    "run_file",
    "run_files",
]
