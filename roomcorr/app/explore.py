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
from roomcorr.analysis.decay import (
    MIN_BANDWIDTH_TIME,
    NOISE_MARGIN_DB,
    RANGES_DB,
    band_decay,
    decay_method,
    filter_limited,
    low_frequency_decay_map,
    mean_band_decay,
    ringing_modes,
)
from roomcorr.app.compare import compare_measurements
from roomcorr.app.history import history
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.errors import BadNameError, InputFileError
from roomcorr.grid import log_grid
from roomcorr.pipeline import analyse_positions, default_channel_names
from roomcorr.report.compare import format_comparison
from roomcorr.report.curves import corrected_responses, filter_response
from roomcorr.report.figures import DECAY_MAP_FLOOR_DB, DECAY_MAP_STOPS
from roomcorr.rooms.runs import RUN_NAME

#: Plot curves are thinned to this many points per octave (the design grid has 96).
PLOT_POINTS_PER_OCTAVE = 48


def _finite_list(values: np.ndarray, ndigits: int = 3) -> list[float | None]:
    """Floats rounded for transport; NaN and infinities become ``None`` (JSON null)."""
    a = np.round(np.asarray(values, dtype=float).ravel(), ndigits)
    out: list[float | None] = a.tolist()
    if not np.all(np.isfinite(a)):
        out = [v if v is not None and math.isfinite(v) else None for v in out]
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
    if not RUN_NAME.match(name):
        shown = name if len(name) <= 40 else name[:40] + "..."
        raise BadNameError(f"{shown!r}: not a run id")
    base = rooms.room_folder(room, rooms.KINDS[kind]).resolve()  # a link out is refused
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
        the pre-gain), phase (degrees, wrapped) and group delay (ms), from the
        report's :func:`roomcorr.report.curves.filter_response`;
        ``manifest``: the design's manifest.
    """

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
        # evaluated at the frequencies as sent (rounded to 0.01 Hz): a notch's
        # group delay can change by 0.1 ms within that rounding
        band = np.round(f_plot[f_plot < fs / 2], 2)
        per_rate = []
        for c, h in enumerate(np.asarray(firs)):
            # the report's filter figures: gain, wrapped phase and group delay of the taps
            gain, phase, gd = filter_response(h, int(fs), band)
            per_rate.append(
                {
                    "channel": curves["channels"][c]["name"],
                    "freq_hz": _finite_list(band, 2),
                    "magnitude_db": _finite_list(gain),
                    "phase_deg": _finite_list(phase, 1),
                    "group_delay_ms": _finite_list(gd),
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


#: Schroeder curves are sent with at most this many points per band (the plot is a few
#: hundred pixels wide).
DECAY_CURVE_POINTS = 600
#: Decay curves are cut where they fall below this level (the report's figure does the same).
DECAY_CURVE_FLOOR_DB = -70.0


def _band_rows(bands: list[Any], fraction: int) -> dict[str, Any]:
    """EDT/T20/T30 of a list of :class:`~roomcorr.analysis.decay.BandDecay` as columns.

    ``valid`` as the report marks values (range within the noise margin);
    ``filter_limited`` where the band filter is too narrow for the decay time
    (:func:`roomcorr.analysis.decay.filter_limited`).
    """

    return {
        "filter_limited": {
            k: [filter_limited(b.centre_hz, fraction, getattr(b, f"{k}_s")) for b in bands]
            for k in ("edt", "t20", "t30")
        },
        "edt_s": _finite_list(np.array([b.edt_s for b in bands]), 4),
        "t20_s": _finite_list(np.array([b.t20_s for b in bands]), 4),
        "t30_s": _finite_list(np.array([b.t30_s for b in bands]), 4),
        "valid": {k: [bool(b.valid[k]) for b in bands] for k in ("edt", "t20", "t30")},
        "dynamic_range_db": _finite_list(np.array([b.dynamic_range_db for b in bands]), 1),
    }


def _decay_curve(curve: Any) -> dict[str, Any]:
    """A Schroeder curve thinned for plotting (finite part above the floor)."""
    sel = np.flatnonzero(np.isfinite(curve.edc_db) & (curve.edc_db > DECAY_CURVE_FLOOR_DB))
    step = max(1, int(np.ceil(sel.size / DECAY_CURVE_POINTS)))
    sel = sel[::step]
    return {
        "time_s": _finite_list(curve.time_s[sel], 4),
        "edc_db": _finite_list(curve.edc_db[sel], 2),
        "truncation_s": round(float(curve.truncation_s), 4),
    }


def _decay_map(m: Any, modes: list[tuple[float, float]] | None = None) -> dict[str, Any]:
    out: dict[str, Any] = {
        "time_s": _finite_list(m.time_s, 4),
        "freq_hz": _finite_list(m.freq_hz, 3),
        "level_db": [_finite_list(row, 1) for row in np.asarray(m.level_db)],
    }
    if modes is not None:
        out["modes"] = [
            {"freq_hz": round(float(f), 2), "decay_s": _finite_list(np.array([d]), 3)[0]}
            for f, d in modes
        ]
    return out


def decay_view(
    room: rooms.Room,
    kind: str,
    run_id: str,
    fraction: int = 1,
    position: int = 0,
    channel: int | None = None,
) -> dict[str, Any]:
    """Decay times per band and the low-frequency ringing map of a run, ready to plot.

    The same functions as the report's decay and ringing sections
    (:func:`roomcorr.analysis.decay.band_decay`, :func:`mean_band_decay`,
    :func:`low_frequency_decay_map`, :func:`ringing_modes`); for a design run
    the corrected map is made from the measured responses convolved with the
    design's filter at the measurement's rate
    (:func:`roomcorr.report.curves.corrected_responses`), as the report does.

    Parameters
    ----------
    room : Room
    kind : {"design", "measurement"}
    run_id : str
    fraction : {1, 3}
        Octave or third-octave bands.
    position : int
        Position (0-based) whose Schroeder curves and ringing map are returned
        (the report shows the first).
    channel : int, optional
        Analyse only this channel (0-based); the others are listed by name only.
        Default: every channel.

    Returns
    -------
    dict
        ``run_id``, ``kind``, ``fs``, ``fraction``, ``positions`` (names),
        ``position``, ``ranges_db`` (ISO 3382-1 evaluation ranges),
        ``noise_margin_db``; ``channels``: per channel ``name``, ``bands``
        (``label``, ``centre_hz``), ``combined`` (mean over positions: ``edt_s``,
        ``t20_s``, ``t30_s`` with ``valid`` flags per parameter; a value is not
        valid when the range comes within ``noise_margin_db`` of the noise
        floor; ``filter_limited`` where bandwidth x decay time is below
        ``min_bandwidth_time``, so that the band filter's own ringing
        lengthens it), ``per_position`` (the same per position, with
        ``dynamic_range_db``), ``curves`` (Schroeder curves of ``position`` per
        band: ``time_s``, ``edc_db``) and ``ringing``: ``measured`` and, for a
        design made at the measurement's rate, ``corrected`` maps (``time_s``,
        ``freq_hz``, ``level_db`` of shape (n_times, n_freqs), ``modes``).
        A channel left out by ``channel``, or one too short or silent for a
        decay analysis, has its ``name`` only.

    Raises
    ------
    InputFileError
        For an unknown run, a band fraction other than 1 or 3 or a position
        the run does not have.
    """

    if fraction not in (1, 3):
        raise InputFileError(f"bands={fraction!r}: use 1 (octave) or 3 (third-octave)")
    folder = run_folder(room, kind, run_id)
    firs: np.ndarray | None = None
    if kind == "design":
        rooms.verified(room, folder, use=[folder / "design.npz", folder / "manifest.json"])
        curves = load_design_curves(folder)
        irs = np.asarray(curves["irs"], dtype=float)
        fs = int(curves["fs_in"])
        names = [str(ch["name"]) for ch in curves["channels"]]
        measured = [str(m) for m in read_manifest(folder).get("measurements", [])]
        positions = (
            [Path(m).stem for m in measured]
            if len(measured) == irs.shape[0]
            else [f"position {p + 1}" for p in range(irs.shape[0])]
        )
        if fs in curves["firs"]:
            firs = np.asarray(curves["firs"][fs], dtype=float)
    else:
        files = rooms.measurement_files(folder)
        rooms.verified(room, folder, use=files)
        irs, fs, _ = read_ir_set([str(p) for p in files])
        names = default_channel_names(irs.shape[1])
        positions = [p.stem for p in files]
    if not (isinstance(position, int) and 0 <= position < irs.shape[0]):
        raise InputFileError(f"position={position!r}: run {run_id} has {irs.shape[0]} positions")
    if channel is not None and not (isinstance(channel, int) and 0 <= channel < len(names)):
        raise InputFileError(f"channel={channel!r}: run {run_id} has {len(names)} channels")
    channels = []
    for c, name in enumerate(names):
        if channel is not None and c != channel:
            channels.append({"name": name})
            continue
        try:
            per_pos = [band_decay(irs[p, c], fs, fraction) for p in range(irs.shape[0])]
        except ValueError:  # too short or silent: no decay analysis, as in the report
            per_pos = []
        item: dict[str, Any] = {"name": name}
        if per_pos and per_pos[0]:
            combined = mean_band_decay(per_pos)
            item["bands"] = {
                "label": [b.label for b in combined],
                "centre_hz": _finite_list(np.array([b.centre_hz for b in combined]), 2),
            }
            item["combined"] = _band_rows(combined, fraction)
            item["per_position"] = [_band_rows(bands, fraction) for bands in per_pos]
            item["curves"] = [_decay_curve(b.curve) for b in per_pos[position]]
            measured_map = low_frequency_decay_map(irs[position, c], fs)
            ringing = {"measured": _decay_map(measured_map, ringing_modes(measured_map))}
            if firs is not None and c < firs.shape[0]:
                corrected = corrected_responses(irs[position : position + 1, c], firs[c])
                ringing["corrected"] = _decay_map(low_frequency_decay_map(corrected[0], fs))
            item["ringing"] = ringing
        channels.append(item)
    return {
        "run_id": folder.name,
        "kind": kind,
        "fs": fs,
        "fraction": fraction,
        "positions": positions,
        "position": position,
        "ranges_db": {k: list(v) for k, v in RANGES_DB.items()},
        "noise_margin_db": NOISE_MARGIN_DB,
        "min_bandwidth_time": MIN_BANDWIDTH_TIME,
        "method": decay_method(),
        "colour_scale": {
            "floor_db": DECAY_MAP_FLOOR_DB,
            "stops": [[db, list(rgb)] for db, rgb in DECAY_MAP_STOPS],
        },
        "channels": channels,
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
        response curves of both, per channel, and ``difference_db``: after minus
        before) and ``text``: the lines ``roomcorr compare`` prints.
    """
    a = run_folder(room, "measurement", before)
    b = run_folder(room, "measurement", after)
    res = compare_measurements(a, b, room=room, with_curves=True)
    out = _plain(res)
    out["text"] = format_comparison(res)
    for ch, ch_res in zip(out.get("channels", []), res.get("channels", []), strict=True):
        curves = ch_res.get("curves")
        if curves is not None:  # what changed, per frequency: after minus before (dB)
            diff = np.asarray(curves["after_db"], dtype=float) - np.asarray(
                curves["before_db"], dtype=float
            )
            ch["curves"]["difference_db"] = _finite_list(diff)
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
    if "\x00" in rel_path or len(rel_path) > 1024:
        raise BadNameError(f"{rel_path[:40]!r}: not a file name")
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
    "decay_view",
    "design_view",
    "measurement_view",
    "room_overview",
    "run_file",
    "run_files",
]
