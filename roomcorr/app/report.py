"""Reports: write a folder's report and say what it shows (``roomcorr report``)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from roomcorr import rooms
from roomcorr.app.explore import run_folder
from roomcorr.deliver.export import load_design_curves, read_manifest
from roomcorr.deliver.figures import figures_of_manifest
from roomcorr.deliver.system import system_sentences
from roomcorr.report.html import write_report
from roomcorr.report.summary import summary_sentences
from roomcorr.report.system import system_fields


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
    path = write_report(folder, compare_with=compare_with, out_dir=out_dir)
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
