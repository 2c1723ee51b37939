"""Designing filters: from impulse-response files or a room's measurement to a design folder.

The command line (``roomcorr design``, ``roomcorr demo``) and the browser app
call these functions; neither orchestrates a design on its own. A live preview
(:class:`DesignPreview`) analyses a measurement once and then recomputes the
correction curves for every edit of the target with the same function the
design uses (:func:`roomcorr.pipeline.design_curves`).
"""

from __future__ import annotations

import copy
import json
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.explore import run_folder
from roomcorr.app.placement import causes_for_design, find_layout
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.deliver.export import check_out_dir, input_digests, write_design
from roomcorr.design.safety import PEAK_BAND
from roomcorr.design.target import target_from_table
from roomcorr.errors import SettingsError
from roomcorr.grid import log_grid
from roomcorr.pipeline import (
    Analysis,
    DesignResult,
    analyse,
    design_curves,
    resolve_calibration,
    resolve_target,
    run_design,
)
from roomcorr.settings import Settings, design_from_dict

#: Folder of a room where targets shaped in the browser app are kept (one TOML file each).
TARGETS_DIR = "targets"
_TARGET_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,47}$")


def names_from_measurement(files: list[Path], settings: Settings) -> None:
    """Channel names stored by ``measure --names`` when the design has none of its own."""
    if settings.design.channel_names is not None:
        return
    for folder in dict.fromkeys(Path(f).parent for f in files):
        p = folder / "measurement.json"
        try:
            names = json.loads(p.read_text(encoding="utf-8")).get("settings", {}).get("names")
        except (OSError, ValueError, AttributeError):
            continue
        if names:
            settings.design = design_from_dict({"channel_names": names}, base=settings.design)
            return


def design_from_files(
    ir_paths: list[str],
    out: Path,
    settings: Settings,
    replace: bool = False,
    extra: dict[str, Any] | None = None,
    force: bool = False,
    on_start: Callable[[], None] | None = None,
    layout: Any = None,
) -> tuple[DesignResult, list[dict[str, Any]]]:
    """Design from impulse-response files and write the design folder ``out``.

    Parameters
    ----------
    ir_paths : list of str
        WAV files or folders (one file per position, one channel per loudspeaker).
    out : Path
        Output folder (refused before any work if it cannot be written as asked).
    settings : Settings
    replace : bool
        Replace an earlier design in ``out`` (all or nothing).
    extra : dict, optional
        Stored in the manifest.
    force : bool
        Design even from files that do not look like impulse responses.
    on_start : callable, optional
        Called once every input has been checked, when the work starts (the
        command line prints its cautions there).
    layout : Layout, optional
        The room's layout: the causes of peaks and withheld dips stored in the
        manifest (``causes``) then name modes and surfaces.

    Returns
    -------
    (DesignResult, list of dict)
        The design and the manifest's file entries.
    """
    check_out_dir(out, replace)  # refuse before the work, not after it
    irs, fs, files = read_ir_set(ir_paths, require_impulse=not force)
    names_from_measurement(files, settings)
    resolve_target(log_grid(), settings.design.target)
    resolve_calibration(log_grid(), settings.design.calibration)
    if on_start is not None:
        on_start()
    result = run_design(irs, fs, settings)
    iir = None
    if settings.design.iir:
        from roomcorr.design.iir_fit import design_iir

        iir = design_iir(result)  # fitted and safety-checked before anything is written
    info: dict[str, Any] = {
        "measurements": [str(f) for f in files],
        "peak_gain_band": PEAK_BAND,
        # SHA-256 of every input, so the design can be reproduced and checked
        "inputs": input_digests(files, settings.design.calibration, settings.design.target),
    }
    if extra:
        info.update(extra)
    # A plain-words cause for each peak and withheld dip (roomcorr.placement.causes)
    info["causes"] = causes_for_design(result, layout)
    entries = write_design(result, out, replace=replace, extra=info, iir=iir)
    return result, entries


def design_in_room(
    room: rooms.Room,
    settings: Settings,
    ir_paths: list[str] | None = None,
    force: bool = False,
    on_start: Callable[[], None] | None = None,
    on_source: Callable[[Path], None] | None = None,
) -> tuple[Path, DesignResult, list[dict[str, Any]]]:
    """Design into a new run of a room folder.

    Parameters
    ----------
    room : Room
    settings : Settings
    ir_paths : list of str, optional
        Impulse responses to use; default the room's latest complete measurement.
    force, on_start
        As for :func:`design_from_files`.
    on_source : callable, optional
        Called with the measurement run used when none was named.

    Returns
    -------
    (Path, DesignResult, list of dict)
        The new run folder, the design and the manifest's file entries.
    """
    if ir_paths:
        paths = [str(p) for p in ir_paths]
        source: dict[str, Any] = {"measurement": None, "measurement_paths": paths}
    else:
        meas = rooms.latest_measurement(room)
        files = rooms.measurement_files(meas)
        rooms.verified(room, meas, use=files)
        paths = [str(p) for p in files]
        source = {"measurement": meas.name}
        if on_source is not None:
            on_source(meas)
    layout = find_layout(room_dir=str(room.root))  # refused before the run, not in it
    with rooms.new_run(room, "design", info=dict(source)) as run_dir:
        result, entries = design_from_files(
            paths, run_dir, settings, False, extra=source, force=force, on_start=on_start,
            layout=layout,
        )
    return run_dir, result, entries


def design_command(
    ir_paths: list[str],
    settings_for: Callable[[Settings | None], Settings],
    out: str | None = None,
    room_dir: str | None = None,
    replace: bool = False,
    force: bool = False,
    on_start: Callable[[], None] | None = None,
    on_source: Callable[[Path], None] | None = None,
    layout_file: str | None = None,
) -> tuple[Path, DesignResult, list[dict[str, Any]]]:
    """What ``roomcorr design`` does: design into ``out``, or into a new run of a room.

    With ``out`` the design goes into that folder (inside a room or not) and
    ``ir_paths`` must be given; otherwise it goes into a new design run of the
    room ``room_dir`` (default: the room folder holding the working folder).

    Parameters
    ----------
    ir_paths : list of str
        Impulse-response files or folders; in a room, empty means its latest measurement.
    settings_for : callable
        Turns the room's settings (None outside a room) into the settings of this
        design (the command line applies its options here).
    out, room_dir : str, optional
        Output folder; room folder.
    replace, force, on_start
        As for :func:`design_from_files`.
    on_source : callable, optional
        Called with the measurement run used (relative to the room folder) when
        none was named.
    layout_file : str, optional
        A layout file for the causes (default: the room's ``layout.toml``, if any).

    Returns
    -------
    (Path, DesignResult, list of dict)
        The folder written, the design and the manifest's file entries.
    """
    room = rooms.open_room(room_dir) if room_dir else None
    if room is None and not out:
        room = rooms.find_room()
    if out:  # a plain output folder, room or not
        if not ir_paths:
            raise SettingsError("design: name the impulse-response files or folders to use")
        settings = settings_for(rooms.load_room_settings(room) if room else None)
        result, entries = design_from_files(
            ir_paths, Path(out), settings, replace, force=force, on_start=on_start,
            layout=find_layout(layout_file, str(room.root) if room else None)
            if (layout_file or room) else None,
        )
        return Path(out), result, entries
    if room is None:
        raise SettingsError(
            "design: give --out DIR, or run it inside a room folder (see roomcorr init)"
        )
    settings = settings_for(rooms.load_room_settings(room))
    root = room.root
    return design_in_room(
        room,
        settings,
        ir_paths=ir_paths or None,
        force=force,
        on_start=on_start,
        on_source=None if on_source is None else lambda meas: on_source(meas.relative_to(root)),
    )


# --------------------------------------------------------------------------- live preview


def _rounded(values: np.ndarray, keep: np.ndarray) -> list[float | None]:
    out: list[float | None] = []
    for v in np.asarray(values, dtype=float)[..., keep].ravel():
        out.append(round(float(v), 2) if np.isfinite(v) else None)
    return out


def target_settings(base: Settings, edit: dict[str, Any]) -> tuple[Settings, dict[str, Any]]:
    """Settings and ``[target]`` table for an edit made in the app.

    ``edit`` holds ``target`` (a preset name, or ``None`` for a hand-shaped
    target given by ``table``), ``table`` (the keys of a preset's ``[target]``
    table) and any of ``max_boost_db``, ``band_lo_hz``, ``band_hi_hz``; each
    is checked like the same key of a settings file.
    """
    settings = copy.deepcopy(base)
    design_keys = {k: edit[k] for k in ("max_boost_db", "band_lo_hz", "band_hi_hz") if k in edit}
    if edit.get("target"):
        design_keys["target"] = str(edit["target"])
    settings.design = design_from_dict(design_keys, base=settings.design)
    table = edit.get("table") or {}
    if not isinstance(table, dict):
        raise SettingsError("target: expected a table of tilt, shelf and points")
    return settings, table


class DesignPreview:
    """Correction curves of a measurement for any target, recomputed in milliseconds.

    Parameters
    ----------
    room : Room
    measurement : str, optional
        Run id of a measurement of the room (default: the latest complete one).
    """

    def __init__(self, room: rooms.Room, measurement: str | None = None) -> None:
        self.room = room
        self.base = rooms.load_room_settings(room)
        folder = (
            run_folder(room, "measurement", measurement)
            if measurement
            else rooms.latest_measurement(room)
        )
        files = rooms.measurement_files(folder)
        rooms.verified(room, folder, use=files)
        irs, fs, _ = read_ir_set([str(p) for p in files], require_impulse=False)
        settings = copy.deepcopy(self.base)
        names_from_measurement(files, settings)
        self.base = settings
        self.measurement = folder.name
        self.files = files
        self.analysis: Analysis = analyse(irs, fs, settings)
        f = self.analysis.freq_hz
        self.keep = np.arange(0, f.size, 2)  # 1/48 octave is plenty on screen

    def update(self, edit: dict[str, Any]) -> dict[str, Any]:
        """Curves for one edit (see :func:`target_settings` for its keys)."""
        settings, table = target_settings(self.base, edit)
        freq = self.analysis.freq_hz
        shape = (
            target_from_table(freq, table, "target")
            if table
            else resolve_target(freq, settings.design.target)
        )
        channels = design_curves(self.analysis, settings, shape)
        keep = self.keep
        out = []
        for ch in channels:
            predicted = ch.measured_db + ch.correction_db[None, :]
            item: dict[str, Any] = {
                "name": ch.name,
                "band_hz": [round(float(x), 1) for x in ch.band_hz],
                "average_db": _rounded(ch.average_db, keep),
                "target_db": _rounded(ch.target_db, keep),
                "correction_db": _rounded(ch.correction_db, keep),
                "boost_withheld_db": _rounded(ch.boost_withheld_db, keep),
                "predicted_db": [_rounded(p, keep) for p in predicted],
            }
            pred = getattr(ch, "prediction", None)
            if pred is not None:
                item["bass_variation_db"] = {
                    "now": round(float(pred.uncorrected_db), 2),
                    "unmeasured_seats": round(float(pred.predicted_db), 2),
                }
            out.append(item)
        return {
            "measurement": self.measurement,
            "freq_hz": _rounded(freq, keep),
            "positions": [p.stem for p in self.files],
            "channels": out,
        }

    def save(self, edit: dict[str, Any], name: str = "") -> tuple[Path, list[dict[str, Any]]]:
        """Design with this edit into a new run of the room, as ``roomcorr design`` would.

        A hand-shaped target is first kept as ``targets/NAME.toml`` in the room
        folder, so the same design can be made from the command line with
        ``--target ROOM/targets/NAME.toml``.

        Returns
        -------
        (Path, list of dict)
            The new design run and its manifest's file entries.
        """
        settings, table = target_settings(self.base, edit)
        if table:
            label = name or "shaped"
            if not _TARGET_NAME.match(label):
                raise SettingsError(
                    f"target name {label!r}: use letters, digits, - and _ (at most 48)"
                )
            target_from_table(self.analysis.freq_hz, table, "target")  # checked before writing
            path = self.room.root / TARGETS_DIR / f"{label}.toml"
            path.parent.mkdir(exist_ok=True)
            atomic_write_text(path, target_toml(table))
            settings.design = design_from_dict({"target": str(path)}, base=settings.design)
        files = [str(p) for p in self.files]
        run_dir, _, entries = design_in_room(self.room, settings, ir_paths=files)
        return run_dir, entries


def target_toml(table: dict[str, Any]) -> str:
    """A ``[target]`` table as TOML text (numbers and a list of [Hz, dB] points)."""
    lines = ["# Target shaped in the roomcorr browser app; only its shape matters.", "[target]"]
    for key in ("tilt_db_per_octave", "tilt_pivot_hz", "bass_shelf_db", "bass_shelf_hz"):
        if key in table:
            lines.append(f"{key} = {float(table[key])!r}")
    points = table.get("points") or []
    if points:
        pts = ", ".join(f"[{float(f)!r}, {float(g)!r}]" for f, g in points)
        lines.append(f"points = [{pts}]")
    return "\n".join(lines) + "\n"
