"""Room folders: what a room folder is, where it is, and its layout.

Layout of a room folder::

    ROOM/roomcorr-room.toml                 settings (TOML, commented, settings_version)
    ROOM/.roomcorr-lock                     lock file (held by a running command)
    ROOM/measurements/2026-01-31_201502Z/   pos1.wav ... measurement.json, complete.json
    ROOM/designs/2026-01-31_203010Z/        manifest.json, design.npz, fir/..., complete.json
"""

from __future__ import annotations

import datetime as _dt
import os
from dataclasses import dataclass
from pathlib import Path

from roomcorr.deliver.atomic import is_link_or_outside
from roomcorr.errors import OutputError, SettingsError

SETTINGS_FILE = "roomcorr-room.toml"
LOCK_FILE = ".roomcorr-lock"
COMPLETE_MARKER = "complete.json"
SETTINGS_SNAPSHOT = "room-settings.toml"
#: The room's layout (size, loudspeakers, seat, measured positions; read and checked by
#: :mod:`roomcorr.placement.layout`). A measurement run keeps a copy of it under the same
#: name: the layout it was measured with.
LAYOUT_FILE = "layout.toml"
KINDS = {"measurement": "measurements", "design": "designs"}
#: Folders of a room that roomcorr reads and writes: runs of both kinds, and targets
#: shaped in the app. Each must be a plain folder inside the room (:func:`room_folder`).
TARGETS = "targets"
ROOM_FOLDERS = (*KINDS.values(), TARGETS)


@dataclass(frozen=True)
class Room:
    """A room folder."""

    root: Path

    @property
    def settings_path(self) -> Path:
        return self.root / SETTINGS_FILE

    @property
    def layout_path(self) -> Path:
        return self.root / LAYOUT_FILE

    @property
    def measurements_dir(self) -> Path:
        return self.root / KINDS["measurement"]

    @property
    def designs_dir(self) -> Path:
        return self.root / KINDS["design"]


def room_folder(room: Room, name: str, create: bool = False) -> Path:
    """``room.root / name`` (one of :data:`ROOM_FOLDERS`), refused unless it is a plain
    folder inside the room.

    The one containment rule for the folders the command line and the app read and
    write: a symbolic link, or anything resolving outside the room folder, is refused
    before any file in it is opened, so nothing is read from or written to another place.

    Parameters
    ----------
    room : Room
    name : str
        ``measurements``, ``designs`` or ``targets``.
    create : bool
        Create the folder when it does not exist yet (checked again afterwards).

    Raises
    ------
    OutputError
        If it is a link, not a folder, or leads outside the room.
    """
    if name not in ROOM_FOLDERS:
        raise ValueError(f"{name!r} is not a folder of a room")
    path = room.root / name

    def check() -> None:
        if (path.exists() or path.is_symlink()) and (
            is_link_or_outside(path, room.root) or not path.is_dir()
        ):
            raise OutputError(
                f"{path}: is a symbolic link or not a folder; files of a room must stay inside "
                "the room folder (make it a plain folder)"
            )

    check()
    if create and not path.exists():
        path.mkdir(exist_ok=True)
        check()  # created (or replaced by a link) by someone else in between: check again
    return path


def find_room(path: str | os.PathLike[str] | None = None) -> Room | None:
    """Return the room folder that holds ``path`` (itself or a parent), or ``None``.

    Parameters
    ----------
    path : path-like, optional
        File or folder; default the working folder.
    """
    p = Path(path if path is not None else os.getcwd()).resolve()
    if p.is_file():
        p = p.parent
    for cand in (p, *p.parents):
        if (cand / SETTINGS_FILE).is_file():
            return Room(cand)
    return None


def open_room(path: str | os.PathLike[str]) -> Room:
    """Return the room folder at (or above) ``path``; raise if there is none."""
    room = find_room(path)
    if room is None:
        raise SettingsError(
            f"{path}: not inside a room folder (no {SETTINGS_FILE}); "
            "create one with 'roomcorr init DIR'"
        )
    return room


def utc_now() -> _dt.datetime:
    """The current time in UTC (run folder names and markers use it)."""
    return _dt.datetime.now(_dt.UTC)


def iso_utc(t: _dt.datetime) -> str:
    """``2026-01-31T20:15:02Z``: the time stamps of markers, settings and the lock note."""
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")
