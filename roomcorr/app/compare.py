"""Comparing two measurements: which runs or files, the analysis, and whether the
filters designed from the earlier one still fit the later one."""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.analysis.compare import compare_sets, filter_fit, fit_verdict, system_fit
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.atomic import is_link_or_outside, sha256_of
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.deliver.system import manifest_fields
from roomcorr.design.realise.fir import fir_response_db as _fir_db
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.measure.timing import common_origin, timing_basis
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


def _record(folder: Path) -> dict[str, Any] | None:
    """The checked ``measurement.json`` of a measurement folder, or None if it has none."""
    record = folder / "measurement.json"
    if folder.is_dir() and record.is_file():
        return measurement_record(folder)  # a damaged record is one line
    return None


def _channel_names(folder: Path, n: int) -> list[str]:
    rec = _record(folder) or {}
    names = rec.get("channel_names")
    if not isinstance(names, list):
        settings = rec.get("settings")
        names = settings.get("names") if isinstance(settings, dict) else None
    if isinstance(names, list) and len(names) == n:
        return [str(x) for x in names]
    return default_channel_names(n)


def _gates_failed(folder: Path) -> list[str]:
    """Names of the quality gates a measurement run's record says it failed."""
    failed: set[str] = set()
    for pos in (_record(folder) or {}).get("positions", []) or []:
        if not isinstance(pos, dict) or not pos.get("file"):
            continue
        for ch in pos.get("channels", []) or []:
            for g in (ch or {}).get("gates", []) or []:
                if isinstance(g, dict) and g.get("passed") is False:
                    failed.add(str(g.get("name")))
    return sorted(failed)


def run_label(path: Path, room: Room | None) -> str:
    """A run named by its id and folder inside the room (``measurements/ID``), else the path."""
    if room is not None:
        with contextlib.suppress(ValueError):
            return path.resolve().relative_to(room.root.resolve()).as_posix()
    return str(path)


def _run_id_of(path: Path, room: Room | None) -> str | None:
    if room is None:
        return None
    with contextlib.suppress(ValueError):
        rel = path.resolve().relative_to(room.measurements_dir.resolve())
        return rel.parts[0] if rel.parts else None
    return None


def _design_for(room: Room, meas_id: str | None) -> Path | None:
    """The newest complete design made from measurement run ``meas_id`` (None: none)."""
    if meas_id is None:
        return None
    own = [
        d
        for d in list_runs(room, "design", include_incomplete=False)
        if design_source(d) == meas_id
    ]
    return own[-1].path if own else None


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


def _fit_check(
    design_dir: Path,
    irs_b: np.ndarray,
    fs_b: int,
    cmp: dict[str, Any],
    gates_failed: list[str],
    room: Room | None,
) -> dict[str, Any]:
    """Old filters (from ``design_dir``) against a fresh design on the new measurement:
    magnitude per channel, alignment, trims, polarity and crossover, and the verdict."""
    room_of = find_room(design_dir)
    verified(room_of, design_dir, [design_dir / "manifest.json", design_dir / "design.npz"])
    old = load_design_curves(design_dir)
    manifest = read_manifest(design_dir)
    settings = settings_from_dict(manifest.get("settings", {}), source=str(design_dir))
    _contain_design_inputs(design_dir, manifest, settings)
    label = run_label(design_dir, room)
    rates = sorted(old["firs"])
    if not rates:
        return {"available": False, "reason": f"{label}: holds no FIR filters"}
    rate = fs_b if fs_b in old["firs"] else min(rates, key=lambda r: abs(r - fs_b))
    settings.design.sample_rates = (rate,)
    names = None
    if settings.design.channel_names is None:
        names = [str(ch["name"]) for ch in cmp["channels"]]
        man_ch = manifest.get("channels")
        if isinstance(man_ch, list) and len(man_ch) == len(names):
            names = [str(c.get("name", n)) for c, n in zip(man_ch, names, strict=True)]
    fresh = run_design(irs_b, fs_b, settings, channel_names=names)
    old_firs = old["firs"][rate]
    if old_firs.shape[0] != len(fresh.channels):
        return {
            "available": False,
            "reason": f"{label}: {old_firs.shape[0]} channels, new measurement has "
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
    system = None
    new_fields = manifest_fields(fresh)
    old_outputs = manifest.get("outputs")
    if isinstance(old_outputs, list) and new_fields.get("outputs"):
        if len(old_outputs) != len(new_fields["outputs"]):
            return {"available": False, "reason": f"{label}: outputs differ in number"}
        old_xo = (manifest.get("system") or {}).get("crossover")
        new_xo = (new_fields.get("system") or {}).get("crossover")
        system = system_fit(
            old_outputs,
            new_fields["outputs"],
            old_xo if isinstance(old_xo, dict) else None,
            new_xo if isinstance(new_xo, dict) else None,
            [bool(c["polarity_inverted"]) for c in cmp["channels"]],
        )
    elif any(c["polarity_inverted"] for c in cmp["channels"]):
        system = {
            "channels": [],
            "reasons": [
                f"polarity of {c['name']} inverted since the design's measurement"
                for c in cmp["channels"]
                if c["polarity_inverted"]
            ],
        }
    verdict = fit_verdict(
        per_channel, system, [c["level_change_db"] for c in cmp["channels"]], gates_failed
    )
    return {
        "available": True,
        "design": design_dir.name,
        "design_folder": label,
        "made_from": design_source_of(room_of, design_dir),
        "sample_rate": rate,
        **verdict,
        "channels": per_channel,
        "system": system,
    }


def design_source_of(room: Room | None, design_dir: Path) -> str | None:
    """Run id of the measurement a design run was made from, if it records one."""
    if room is None:
        return None
    run = next(
        (r for r in list_runs(room, "design") if r.path.resolve() == design_dir.resolve()), None
    )
    return design_source(run) if run is not None else None


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


def _basis_of(path: Path) -> dict[str, Any]:
    """Timing basis of a measurement folder (or the folder of a WAV file)."""
    folder = path if path.is_dir() else path.parent
    return timing_basis(_record(folder))


def compare_measurements(
    a: str | os.PathLike[str] | list | None = None,
    b: str | os.PathLike[str] | list | None = None,
    room: Room | None = None,
    temperature_c: float | None = None,
    fit_check: bool = True,
    with_curves: bool = False,
    design: str | os.PathLike[str] | None = None,
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
    design : str or path, optional
        The design to judge instead (a design run id of the room, or its folder).

    Returns
    -------
    dict
        The result of :func:`roomcorr.analysis.compare.compare_sets` plus
        ``before``, ``after`` (run ids inside the room, else paths), ``timing``
        (each run's basis from :func:`roomcorr.measure.timing.timing_basis` and
        :func:`roomcorr.measure.timing.common_origin`), ``speed_of_sound_formula``
        and ``filter_fit``.
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
    basis_a, basis_b = _basis_of(pa), _basis_of(pb)
    origin = common_origin(basis_a, basis_b)
    res = compare_sets(
        irs_a,
        fs_a,
        irs_b,
        fs_b,
        temperature_c,
        names,
        with_curves=with_curves,
        origin=origin["origin"],
        reference_index=origin["reference_channel"],
    )
    res["before"] = run_label(pa, room)
    res["after"] = run_label(pb, room)
    res["timing"] = {"before": basis_a, "after": basis_b, **origin}
    res["before_files"] = [str(f) for f in files_a]
    res["after_files"] = [str(f) for f in files_b]
    res["speed_of_sound_formula"] = (
        "c = 343.2 * sqrt((t + 273.15) / 293.15) m/s (ISO 9613-1, annex A)"
    )
    fit: dict[str, Any] = {"available": False, "reason": "not asked for"}
    if fit_check:
        if design is not None:
            chosen: Path | None = resolve_run(room, design, kind="design")
            where = None
        else:
            meas_id = _run_id_of(pa, room)
            chosen = _design_for(room, meas_id) if room is not None else None
            where = (
                f"no design made from measurement {meas_id} in the room folder; choose one "
                "with --design RUN"
                if meas_id
                else "the earlier measurement is not a run of a room; choose a design with "
                "--design RUN"
            )
        if chosen is None:
            fit = {"available": False, "reason": where}
        else:
            try:
                fit = _fit_check(chosen, irs_b, fs_b, res, _gates_failed(pb), room)
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
    design: str | None = None,
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
    design : str, optional
        Design run (id or folder) to judge instead of the one made from ``a``.

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
        design=design,
    )
    if plot:
        write_comparison_plot(res, plot)
        for ch in res["channels"]:
            ch.pop("curves", None)
    return res
