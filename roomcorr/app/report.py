"""Reports: write a folder's report and say what it shows (``roomcorr report``)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from roomcorr import rooms
from roomcorr.app.compare import compare_measurements
from roomcorr.app.explore import run_folder
from roomcorr.checked import read_json
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.deliver.figures import figures_of_manifest
from roomcorr.deliver.system import system_sentences
from roomcorr.errors import InputFileError, RoomcorrError
from roomcorr.report.html import check_report_folder, write_report
from roomcorr.report.summary import summary_sentences
from roomcorr.report.system import system_fields


def write_folder_report(
    folder: str | Path,
    compare_with: str | Path | None = None,
    out_dir: str | Path | None = None,
    dpi: int = 90,
) -> Path:
    """Write the report of a folder, with its comparison section when there is one.

    Parameters
    ----------
    folder : path
        A design output folder or a measurement folder (see
        :func:`roomcorr.report.html.write_report`).
    compare_with : path or str, optional
        Earlier measurement for the comparison section (see
        :func:`report_comparison`); by default a run folder of a room is
        compared with the room's previous complete measurement, if any.
    out_dir : path, optional
        Where to write (see :func:`roomcorr.report.html.report_destination`).
    dpi : int

    Returns
    -------
    Path
        The ``report.html`` written.
    """
    check_report_folder(folder)  # a missing folder or damaged run is named first
    comparison = report_comparison(folder, compare_with)
    return write_report(folder, dpi=dpi, comparison=comparison, out_dir=out_dir)


def report_folder(
    folder: str | Path,
    compare_with: str | Path | None = None,
    out_dir: str | Path | None = None,
) -> tuple[Path, list[str]]:
    """Write the report of a design or measurement folder.

    Parameters
    ----------
    folder : path
        A design output folder or a measurement folder (see
        :func:`roomcorr.report.html.write_report`).
    compare_with : path or str, optional
        Earlier measurement for the comparison section.
    out_dir : path, optional
        Where to write the report (default: beside the folder's files when
        roomcorr wrote the folder, else a new ``DIR-report``).

    Returns
    -------
    (Path, list of str)
        The ``report.html`` written, and for a design the plain-language
        summary (what the filters do, then how the loudspeakers play together);
        empty for a measurement.
    """
    folder = Path(folder)
    path = write_folder_report(folder, compare_with, out_dir)
    lines: list[str] = []
    if (folder / "manifest.json").is_file() and (folder / "design.npz").is_file():
        manifest = read_manifest(folder)
        caps = (manifest.get("settings") or {}).get("design", {})
        curves = load_design_curves(folder)
        lines += summary_sentences(curves, caps.get("max_boost_db"), figures_of_manifest(manifest))
        lines += system_sentences(system_fields(curves))
    return path, lines


def report_in_room(room: rooms.Room, kind: str, run_id: str) -> dict[str, Any]:
    """Write the full report of a run of the room, beside its files (the browser app).

    The same report as ``roomcorr report RUN`` writes for a run of a room
    (:func:`report_folder`, default destination), written under the room lock
    so it never races a command writing to the room.

    Parameters
    ----------
    room : roomcorr.rooms.Room
    kind : {"design", "measurement"}
    run_id : str
        Plain name of an existing run (contained in the room folder).

    Returns
    -------
    dict
        ``path``: the report's path relative to the run folder; ``summary``:
        the plain-language lines (empty for a measurement).

    Raises
    ------
    RoomcorrError
        For a run id that is not a run of the room, a damaged run, or a room
        held by another command.
    """
    folder = run_folder(room, kind, run_id)
    with rooms.room_lock(room, "writing a report"):
        path, lines = report_folder(folder)
    return {"path": path.resolve().relative_to(folder).as_posix(), "summary": lines}


def report_comparison(
    folder: str | Path, compare_with: str | Path | None = None
) -> dict[str, Any] | None:
    """The comparison for the report of ``folder``, or None when none is meaningful.

    Parameters
    ----------
    folder : path
        A run folder of a room (a design whose source measurement is recorded
        in its ``complete.json`` info or manifest, or a measurement), or any
        design or measurement folder when ``compare_with`` is given.
    compare_with : path or str, optional
        The earlier measurement: a run id of the room, a measurement folder or a
        WAV file. Default: the newest complete measurement of the room older
        than the one behind ``folder``.

    Returns
    -------
    dict or None
        :func:`roomcorr.app.compare.compare_measurements` result with curves, with
        ``before`` and ``after`` shortened to paths inside the room. None
        without an earlier measurement (or when the automatic comparison is not
        possible, e.g. a different number of loudspeakers).

    Raises
    ------
    InputFileError
        Only when ``compare_with`` is given and cannot be used.
    """
    d = Path(folder).resolve()
    room, after = _source_measurement(d, rooms.find_room(d))
    if compare_with is None:
        before: Any = _earlier_measurement(room, after)
        if before is None:
            return None
        try:
            res = compare_measurements(before, after, room=room, with_curves=True)
        except RoomcorrError:
            return None
    else:
        if after is None:
            raise InputFileError(
                f"--compare-with: {d} records no measurement it was made from; "
                "report a measurement folder, or a design that names its measurement"
            )
        before = rooms.resolve_run(room or rooms.find_room(), compare_with)
        res = compare_measurements(before, after, room=room, with_curves=True)
    res["before"] = _label(before, room)
    res["after"] = _label(after, room)
    return res


def _source_measurement(d: Path, room: Any) -> tuple[Any, Any]:
    """(room, the measurement behind folder ``d``) or (room, None).

    The measurement is a folder (a measurement run, or ``d`` itself when it is
    a measurement folder) or, for a design outside a room, the list of IR files
    in its manifest.
    """
    if not ((d / "manifest.json").is_file() and (d / "design.npz").is_file()):
        return room, d
    try:
        manifest = read_json(d / "manifest.json", "manifest")
    except RoomcorrError:
        manifest = {}
    if not isinstance(manifest, dict):
        manifest = {}
    if room is not None and d.parent == room.designs_dir.resolve():
        run = next((r for r in rooms.list_runs(room, "design") if r.path.resolve() == d), None)
        ref = (run.marker.get("info", {}).get("measurement") if run else None) or manifest.get(
            "measurement"
        )
        if not ref and run is not None:
            ref = rooms.design_source(run)
        if ref:
            cand = room.measurements_dir / Path(str(ref)).name
            if cand.is_dir():
                return room, cand
    files = manifest.get("measurements")
    if isinstance(files, list) and files:
        paths = [Path(str(f)) if Path(str(f)).is_absolute() else Path.cwd() / str(f)
                 for f in files]
        parents = {q.parent.resolve() for q in paths}
        if len(parents) == 1:  # all from one measurement run of a room: use that room
            parent = parents.pop()
            other = rooms.find_room(parent)
            if other is not None and parent.parent == other.measurements_dir.resolve():
                return other, parent
        if all(q.is_file() for q in paths):
            return room, [str(q) for q in paths]
    return room, None


def _earlier_measurement(room: Any, after: Any) -> Path | None:
    """The newest complete measurement run of ``room`` older than run folder ``after``."""
    if room is None or not isinstance(after, Path):
        return None
    after = after.resolve()
    if after.parent != room.measurements_dir.resolve():
        return None
    runs = rooms.list_runs(room, "measurement")
    idx = next((i for i, r in enumerate(runs) if r.path.resolve() == after), None)
    if idx is None:
        return None
    earlier = [r for r in runs[:idx] if r.complete]
    return earlier[-1].path if earlier else None


def _label(ref: Any, room: Any) -> str:
    if isinstance(ref, list):
        return ", ".join(Path(x).name for x in ref)
    p = Path(ref).resolve()
    if room is not None:
        try:
            return p.relative_to(room.root.resolve()).as_posix()
        except ValueError:
            pass
    return str(p)
