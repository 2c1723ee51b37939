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

from roomcorr.errors import SettingsError

SETTINGS_FILE = "roomcorr-room.toml"
LOCK_FILE = ".roomcorr-lock"
COMPLETE_MARKER = "complete.json"
SETTINGS_SNAPSHOT = "room-settings.toml"
KINDS = {"measurement": "measurements", "design": "designs"}


@dataclass(frozen=True)
class Room:
    """A room folder."""

    root: Path

    @property
    def settings_path(self) -> Path:
        return self.root / SETTINGS_FILE

    @property
    def measurements_dir(self) -> Path:
        return self.root / KINDS["measurement"]

    @property
    def designs_dir(self) -> Path:
        return self.root / KINDS["design"]


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
