"""Designing filters: from impulse-response files or a room's measurement to a design folder.

The command line (``roomcorr design``, ``roomcorr demo``) and the browser app
call these functions; neither orchestrates a design on its own. A live preview
(:class:`DesignPreview`) analyses a measurement once and then recomputes the
correction curves for every edit of the target with the same function the
design uses (:func:`roomcorr.pipeline.design_curves`).
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.explore import run_folder
from roomcorr.app.placement import causes_for_design, find_layout
from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.atomic import atomic_write_bytes
from roomcorr.deliver.export import check_out_dir, input_digests, write_design
from roomcorr.design.curve.target import target_from_table
from roomcorr.design.realise.fir import synthesize_fir
from roomcorr.design.realise.iir_fit import design_iir
from roomcorr.design.realise.safety import PEAK_BAND, common_pre_gain_db, full_band_peak_gain_db
from roomcorr.design.system.align import apply_plan, plan_system
from roomcorr.errors import OutputError, RoomcorrError, SettingsError
from roomcorr.grid import log_grid
from roomcorr.measure.timing import timing_basis
from roomcorr.pipeline import (
    Analysis,
    DesignResult,
    analyse,
    design_curves,
    fir_taps_for,
    resolve_calibration,
    resolve_target,
    run_design,
)
from roomcorr.settings import Settings, design_from_dict

#: Folder of a room where targets shaped in the browser app are kept (one TOML file each).
TARGETS_DIR = rooms.TARGETS
_TARGET_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,47}$")


def names_from_measurement(files: list[Path], settings: Settings) -> None:
    """Channel names stored by ``measure --names`` when the design has none of its own."""
    if settings.design.channel_names is not None:
        return
    for folder in dict.fromkeys(Path(f).parent for f in files):
        record = rooms.measurement_record(folder)  # a damaged record is one line
        names = (record.get("settings") or {}).get("names") if record is not None else None
        if names:
            settings.design = design_from_dict({"channel_names": names}, base=settings.design)
            return


def basis_of_files(files: list[Path]) -> dict[str, Any]:
    """Timing basis of the measurement the files come from
    (:func:`roomcorr.measure.timing.timing_basis`; unknown unless one folder records it)."""
    folders = list(dict.fromkeys(Path(f).parent for f in files))
    record = None
    if len(folders) == 1 and not (folders[0] / "measurement.json").is_symlink():
        try:
            record = rooms.measurement_record(folders[0])  # checked, bounded
        except RoomcorrError:
            record = None
    return timing_basis(record)


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
        iir = design_iir(result)  # fitted and safety-checked before anything is written
    info: dict[str, Any] = {
        "measurements": [str(f) for f in files],
        "peak_gain_band": PEAK_BAND,
        # SHA-256 of every input, so the design can be reproduced and checked
        "inputs": input_digests(files, settings.design.calibration, settings.design.target),
        # what the measurement's arrivals (and so the delays) are measured from
        "timing_basis": basis_of_files(files),
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


def filter_levels(
    irs: np.ndarray,
    analysis: Analysis,
    channels: list[Any],
    target_shape: np.ndarray,
    settings: Settings,
) -> dict[str, Any]:
    """Boost and pre-gain of the filters an edit would give: the saved design's own chain.

    The same steps and functions as :func:`roomcorr.pipeline.run_design`, which writes the
    manifest: per design rate each channel's FIR from its correction
    (:func:`roomcorr.design.realise.fir.synthesize_fir`, the design's tap count), the system plan's
    alignment and level trims (:func:`roomcorr.design.system.align.plan_system`,
    :func:`~roomcorr.design.system.align.apply_plan`), then each filter's peak gain from DC to
    Nyquist (:func:`roomcorr.design.realise.safety.full_band_peak_gain_db`) and the common pre-gain
    (:func:`~roomcorr.design.realise.safety.common_pre_gain_db`), as
    :func:`~roomcorr.design.realise.safety.apply_safety` computes them. A mixed-phase design's
    excess-phase part is left out (it changes the peak gain by a few tenths of a dB).

    Returns
    -------
    dict
        ``peak_gain_before_pre_gain_db`` (per channel, the largest over the rates: the
        boost) and ``pre_gain_db`` (dB, never positive), rounded to 0.01 dB.
    """
    d = settings.design
    freq, fs = analysis.freq_hz, analysis.fs
    lowest = min(float(ch.band_hz[0]) for ch in channels)
    firs: dict[int, np.ndarray] = {}
    for rate in d.sample_rates:
        n_taps = fir_taps_for(rate, d.taps, lowest)
        firs[rate] = np.stack(
            [synthesize_fir(freq, ch.correction_db, rate, n_taps) for ch in channels]
        )
    system = plan_system(irs, fs, freq, channels, target_shape, firs, d, analysis.weights)
    if system is not None:
        firs = apply_plan(firs, system)
    peaks = np.array(
        [[full_band_peak_gain_db(h[c], rate) for c in range(h.shape[0])]
         for rate, h in firs.items()]
    )
    return {
        "peak_gain_before_pre_gain_db": [round(float(p), 2) for p in peaks.max(axis=0)],
        "pre_gain_db": round(float(common_pre_gain_db(list(peaks.ravel()), d.ceiling_db)), 2),
    }


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
        self.irs = irs
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
        view: dict[str, Any] = {
            "measurement": self.measurement,
            "freq_hz": _rounded(freq, keep),
            "positions": [p.stem for p in self.files],
            "channels": out,
        }
        if edit.get("levels"):  # the filters' figures: a few hundred ms, asked when idle
            levels = filter_levels(self.irs, self.analysis, channels, shape, settings)
            for item, peak in zip(out, levels["peak_gain_before_pre_gain_db"], strict=True):
                item["max_boost_db"] = round(max(peak, 0.0), 2)
            view["pre_gain_db"] = levels["pre_gain_db"]
            view["sample_rates"] = [int(r) for r in settings.design.sample_rates]
        return view

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
        label = name or "shaped"
        if table:
            if not _TARGET_NAME.match(label):
                raise SettingsError(
                    f"target name {label[:60]!r}: use letters, digits, - and _ (at most 48)"
                )
            target_from_table(self.analysis.freq_hz, table, "target")  # checked before writing
        # The lock is held from the first file written to the last: a save refused
        # because the room is busy writes nothing, and no other thread or command
        # writes the room in between.
        with rooms.room_lock(self.room, "saving a design from the app"):
            rooms.check_kind_folder(self.room, "design")  # refused before the target is kept
            if table:
                path = keep_target(self.room, label, target_toml(table))
                settings.design = design_from_dict({"target": str(path)}, base=settings.design)
            files = [str(p) for p in self.files]
            run_dir, _, entries = design_in_room(self.room, settings, ir_paths=files)
        return run_dir, entries


def keep_target(room: rooms.Room, label: str, text: str) -> Path:
    """Keep a target shaped in the app as ``targets/LABEL.toml`` and return its path.

    A target file is never replaced: an earlier design records the SHA-256 of the
    target it used, and must stay repeatable. When ``LABEL.toml`` exists with other
    content, the target is kept as ``LABEL-2.toml``, ``LABEL-3.toml``...; a file
    with the same content is used as it is. Call with the room lock held.

    Raises
    ------
    OutputError
        If ``targets/`` is a link or leads outside the room, or all names are taken.
    """
    folder = rooms.room_folder(room, rooms.TARGETS, create=True)
    data = text.encode("utf-8")
    for n in range(1, 1000):
        path = folder / (f"{label}.toml" if n == 1 else f"{label}-{n}.toml")
        if path.is_symlink():
            continue  # never written through, never taken for the target
        if not path.exists():
            atomic_write_bytes(path, data)
            return path
        if path.is_file() and path.read_bytes() == data:
            return path
    raise OutputError(f"{folder}: no free name for target {label!r}; remove old targets")


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
