"""Comparing two measurements: which runs or files, the analysis, and whether the
filters designed from the earlier one still fit the later one."""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.analysis.compare import compare_sets, filter_fit
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.atomic import is_link_or_outside, sha256_of
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.design.fir import fir_response_db as _fir_db
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.pipeline import default_channel_names, run_design
from roomcorr.report.compare import write_comparison_plot
from roomcorr.rooms import (
    Room,
    check_run,
    design_source,
    find_room,
    list_runs,
    load_room_settings,
    measurement_files,
    measurement_record,
    open_room,
    resolve_run,
    run_sort_key,
    verified,
)
from roomcorr.settings import find_preset, settings_from_dict


def fir_response_db(fir: np.ndarray, fs: int, freq_hz: np.ndarray) -> np.ndarray:
    """Magnitude response of FIR filters at ``freq_hz`` (above ``fs/2``: held), dB.

    Parameters
    ----------
    fir : ndarray, shape (..., n_taps)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)

    Returns
    -------
    ndarray, shape (..., n_freqs)
    """
    f = np.minimum(np.asarray(freq_hz, dtype=float), fs / 2.0)
    h = np.atleast_2d(np.asarray(fir, dtype=float))
    out = np.maximum(np.stack([_fir_db(row, fs, f) for row in h]), -300.0)
    return out.reshape(np.shape(fir)[:-1] + (f.size,))


def _channel_names(folder: Path, n: int) -> list[str]:
    record = folder / "measurement.json"
    if folder.is_dir() and record.is_file():
        data = measurement_record(folder)  # a damaged record is one line
        names = data.get("channel_names") if data is not None else None
        if isinstance(names, list) and len(names) == n:
            return [str(x) for x in names]
    return default_channel_names(n)


def _run_id_of(path: Path, room: Room | None) -> str | None:
    if room is None:
        return None
    with contextlib.suppress(ValueError):
        rel = path.resolve().relative_to(room.measurements_dir.resolve())
        return rel.parts[0] if rel.parts else None
    return None


def _design_for(room: Room, meas_id: str | None, before: Path) -> Path | None:
    """The newest complete design made from measurement ``meas_id`` (else the newest
    design finished before run folder ``before`` was started)."""
    designs = list_runs(room, "design", include_incomplete=False)
    if meas_id is not None:
        own = [d for d in designs if design_source(d) == meas_id]
        if own:
            return own[-1].path
    key = run_sort_key(before)
    older = [d for d in designs if run_sort_key(d.path) < key]
    return older[-1].path if older else None


def _contain_design_inputs(design_dir: Path, manifest: dict[str, Any], settings: Any) -> None:
    """Refuse to read a calibration or target file a design's manifest names unless it lies
    inside the design's room folder and matches the SHA-256 the manifest recorded for it."""
    room = find_room(design_dir)
    recorded = {
        str(e.get("role")): e
        for e in manifest.get("inputs", []) or []
        if isinstance(e, dict) and isinstance(e.get("sha256"), str)
    }
    for role in ("calibration", "target"):
        spec = getattr(settings.design, role)
        if not spec or (role == "target" and find_preset(str(spec)) is not None):
            continue
        p = Path(str(spec))
        where = f"{design_dir / 'manifest.json'}: {role} {spec}"
        if room is None or is_link_or_outside(p.resolve(), room.root):
            raise OutputError(f"{where}: lies outside the room folder; not read")
        entry = recorded.get(role)
        if entry is None or not p.is_file() or sha256_of(p) != entry["sha256"]:
            raise OutputError(f"{where}: missing or changed since the design (SHA-256)")


def _fit_check(design_dir: Path, irs_b, fs_b: int) -> dict[str, Any]:
    """Old filters (from ``design_dir``) vs a fresh design on the new measurement."""
    room = find_room(design_dir)
    verified(room, design_dir, [design_dir / "manifest.json", design_dir / "design.npz"])
    old = load_design_curves(design_dir)
    manifest = read_manifest(design_dir)
    settings = settings_from_dict(manifest.get("settings", {}), source=str(design_dir))
    _contain_design_inputs(design_dir, manifest, settings)
    rates = sorted(old["firs"])
    if not rates:
        return {"available": False, "reason": f"{design_dir}: holds no FIR filters"}
    rate = fs_b if fs_b in old["firs"] else min(rates, key=lambda r: abs(r - fs_b))
    settings.design.sample_rates = (rate,)
    fresh = run_design(irs_b, fs_b, settings)
    old_firs = old["firs"][rate]
    if old_firs.shape[0] != len(fresh.channels):
        return {
            "available": False,
            "reason": f"{design_dir}: {old_firs.shape[0]} channels, new measurement has "
            f"{len(fresh.channels)}",
        }
    freq = fresh.freq_hz
    per_channel = []
    for ch in fresh.channels:
        old_db = fir_response_db(old_firs[ch.index], rate, freq)
        new_db = fir_response_db(fresh.firs[rate][ch.index], rate, freq)
        fit = filter_fit(freq, ch.average_db, old_db, new_db, ch.target_db, ch.band_hz)
        fit.update(index=ch.index, name=ch.name, band_hz=[round(x, 1) for x in ch.band_hz])
        per_channel.append(fit)
    return {
        "available": True,
        "design": str(design_dir),
        "sample_rate": rate,
        "still_fit": bool(np.all([c["still_fit"] for c in per_channel])),
        "channels": per_channel,
    }


def _resolve_set(room: Room | None, ref: Any) -> tuple[Path, list[Path]]:
    """(the measurement's folder or first file, its IR files) for a run id, folder, WAV
    file, comma-separated WAV files or a list of them."""
    if isinstance(ref, str) and "," in ref and not Path(ref).exists():
        ref = [x.strip() for x in ref.split(",") if x.strip()]
    if isinstance(ref, list | tuple):
        if not ref:
            raise InputFileError("compare: a measurement was given as commas only; name WAV files")
        files = [f for item in ref for f in measurement_files(item)]
        for f in files:
            verified(room, f.parent, [f])
        return Path(ref[0]), files
    p = resolve_run(room, ref)
    files = measurement_files(p)
    verified(room, p, files)
    return p, files


def compare_measurements(
    a: str | os.PathLike[str] | list | None = None,
    b: str | os.PathLike[str] | list | None = None,
    room: Room | None = None,
    temperature_c: float | None = None,
    fit_check: bool = True,
    with_curves: bool = False,
) -> dict[str, Any]:
    """Compare two measurements (folders, WAV files or run ids of ``room``).

    Parameters
    ----------
    a, b : path-like, str or list, optional
        Before and after: a run id, a measurement folder, a WAV file, several
        WAV files (a list, or one string with commas; one file per position).
        Default: the room's last two complete measurements.
    room : Room, optional
        Room for run ids, settings (temperature) and the old design.
    temperature_c : float, optional
        Overrides the settings' ``design.temperature_c`` (default 20 °C).
    fit_check : bool
        Also judge whether the design made from ``a`` still fits ``b``.

    Returns
    -------
    dict
        The result of :func:`roomcorr.analysis.compare.compare_sets` plus
        ``before``, ``after``, ``speed_of_sound_formula`` and ``filter_fit``.
    """
    if a is None or b is None:
        if room is None:
            raise InputFileError("compare: give two measurements (folders or IR files)")
        runs = [
            r
            for r in list_runs(room, "measurement", include_incomplete=False)
            if check_run(r, []) is None  # damaged runs are skipped (history names them)
        ]
        if len(runs) < 2:
            raise InputFileError(
                f"{room.measurements_dir}: {len(runs)} complete measurement(s); compare needs "
                "two (or give two folders)"
            )
        (pa, files_a), (pb, files_b) = (
            _resolve_set(room, runs[-2].path),
            _resolve_set(room, runs[-1].path),
        )
    else:
        (pa, files_a), (pb, files_b) = _resolve_set(room, a), _resolve_set(room, b)
    if temperature_c is None:
        temperature_c = load_room_settings(room).design.temperature_c if room else 20.0
    irs_a, fs_a, _ = read_ir_set(files_a)
    irs_b, fs_b, _ = read_ir_set(files_b)
    if irs_a.shape[1] != irs_b.shape[1]:
        raise InputFileError(
            f"{pb}: {irs_b.shape[1]} loudspeaker channels, but {pa} has {irs_a.shape[1]}; "
            "compare measurements of the same loudspeakers"
        )
    names = _channel_names(pb if pb.is_dir() else pb.parent, irs_b.shape[1])
    res = compare_sets(irs_a, fs_a, irs_b, fs_b, temperature_c, names, with_curves=with_curves)
    res["before"] = str(pa)
    res["after"] = str(pb)
    res["before_files"] = [str(f) for f in files_a]
    res["after_files"] = [str(f) for f in files_b]
    res["speed_of_sound_formula"] = (
        "c = 343.2 * sqrt((t + 273.15) / 293.15) m/s (ISO 9613-1, annex A)"
    )
    fit: dict[str, Any] = {"available": False, "reason": "not asked for"}
    if fit_check:
        design = _design_for(room, _run_id_of(pa, room), pb) if room is not None else None
        if design is None:
            fit = {"available": False, "reason": "no earlier design found in the room folder"}
        else:
            try:
                fit = _fit_check(design, irs_b, fs_b)
            except RoomcorrError as exc:
                fit = {"available": False, "reason": " ".join(str(exc).split())}
    res["filter_fit"] = fit
    return res


def compare_command(
    a: str | None = None,
    b: str | None = None,
    room_dir: str | None = None,
    temperature_c: float | None = None,
    fit_check: bool = True,
    plot: str | None = None,
) -> dict[str, Any]:
    """What ``roomcorr compare`` does: compare two measurements, optionally drawing them.

    Parameters
    ----------
    a, b : str, optional
        As for :func:`compare_measurements`; both or neither (then the room's
        last two measurements).
    room_dir : str, optional
        Room folder (default: the one holding the working folder).
    temperature_c : float, optional
    fit_check : bool
    plot : str, optional
        PNG file to draw both responses into
        (:func:`roomcorr.report.compare.write_comparison_plot`).

    Returns
    -------
    dict
        :func:`compare_measurements`' result (without the curves of the plot).
    """
    room = open_room(room_dir) if room_dir else find_room()
    if room is None and a is None:
        room = open_room(".")  # raises with the message on how to make a room folder
    res = compare_measurements(
        a,
        b,
        room=room,
        temperature_c=temperature_c,
        fit_check=fit_check,
        with_curves=bool(plot),
    )
    if plot:
        write_comparison_plot(res, plot)
        for ch in res["channels"]:
            ch.pop("curves", None)
    return res
