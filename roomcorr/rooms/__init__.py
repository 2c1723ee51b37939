"""Room folders: storage (runs, markers, settings file), locking, verification on read.

Public functions (the signatures other commands rely on)::

    find_room(path=None) -> Room | None
        The room folder holding ``path`` (default: the working folder), or None.
    open_room(path) -> Room                      # raises SettingsError if not a room
    init_room(path, name=None) -> Room           # creates the folder and settings file
    load_room_settings(room) -> Settings         # reads (and upgrades) roomcorr-room.toml
    room_folder(room, name, create=False) -> Path  # measurements/, designs/, targets/:
        # a plain folder inside the room, or OutputError (the one containment rule)
    room_lock(room, purpose="") -> context manager (excludes other processes and threads)
    new_run(room, kind, info=None) -> context manager yielding the run folder (Path)
        kind is "measurement" or "design". Takes the room lock, creates a new
        time-stamped folder, and writes its "complete" marker only when the
        block finishes without an exception. ``info`` (a dict the caller may
        keep filling inside the block) is stored in the marker, e.g.
        ``{"measurement": "<run id>"}`` for a design.
    latest_measurement(room) -> Path             # newest complete one; InputFileError if none
    list_runs(room, kind=None) -> list[RunInfo]  # oldest first, incomplete ones included
    add_measurement(room, paths) -> Path         # copy IR WAVs from elsewhere into a new run
    measurement_files(folder) -> list[Path]      # the IR WAVs of a measurement folder
    measurement_record(folder) -> dict | None    # its measurement.json, checked
    check_run(run, use=None) -> str | None       # what changed since the run finished
    verified(room, folder, use=None)             # InputFileError for a damaged run

Modules: :mod:`~roomcorr.rooms.folder` (the ``Room`` and its layout),
:mod:`~roomcorr.rooms.settings_file` (the settings file), :mod:`~roomcorr.rooms.lock`
(the lock), :mod:`~roomcorr.rooms.runs` (runs, markers, verification). History
and comparison of runs are in :mod:`roomcorr.app`.
"""

from roomcorr.rooms.folder import (
    COMPLETE_MARKER,
    KINDS,
    LAYOUT_FILE,
    LOCK_FILE,
    ROOM_FOLDERS,
    SETTINGS_FILE,
    SETTINGS_SNAPSHOT,
    TARGETS,
    Room,
    find_room,
    open_room,
    room_folder,
)
from roomcorr.rooms.lock import is_locked, room_lock
from roomcorr.rooms.runs import (
    RunInfo,
    add_measurement,
    check_kind_folder,
    check_run,
    design_source,
    latest_measurement,
    list_runs,
    measurement_files,
    measurement_record,
    new_run,
    refuse_finished_run,
    resolve_run,
    run_sort_key,
    verified,
    verify_run,
)
from roomcorr.rooms.settings_file import (
    MIGRATIONS,
    init_room,
    load_room_settings,
    room_name,
    settings_text,
)

__all__ = [
    "COMPLETE_MARKER",
    "KINDS",
    "LAYOUT_FILE",
    "LOCK_FILE",
    "MIGRATIONS",
    "ROOM_FOLDERS",
    "SETTINGS_FILE",
    "SETTINGS_SNAPSHOT",
    "TARGETS",
    "Room",
    "RunInfo",
    "add_measurement",
    "check_kind_folder",
    "check_run",
    "design_source",
    "find_room",
    "init_room",
    "is_locked",
    "latest_measurement",
    "list_runs",
    "load_room_settings",
    "measurement_files",
    "measurement_record",
    "new_run",
    "open_room",
    "refuse_finished_run",
    "resolve_run",
    "room_folder",
    "room_lock",
    "room_name",
    "run_sort_key",
    "settings_text",
    "verified",
    "verify_run",
]
