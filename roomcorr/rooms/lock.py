"""The room lock: one command writes a room folder at a time.

The lock is an advisory ``flock`` on ``.roomcorr-lock``; the operating system
releases it when the process ends in any way. The lock file is the one file not
written through :mod:`roomcorr.deliver.atomic`: it must keep its identity for
``flock`` and holds only a note of who holds it.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from roomcorr.errors import OutputError, RoomBusyError
from roomcorr.rooms.folder import LOCK_FILE, Room, iso_utc, utc_now

_HELD: dict[Path, list[Any]] = {}


def _holder_note(path: Path) -> str:
    try:
        info = json.loads(path.read_text(encoding="utf-8") or "{}")
    except (OSError, json.JSONDecodeError):
        info = {}
    if not info:
        return "another roomcorr command"
    what = f", {info['purpose']}" if info.get("purpose") else ""
    return (
        f"process {info.get('pid')} on {info.get('host')} since {info.get('since')} "
        f"('{info.get('command') or 'roomcorr'}'{what})"
    )


def command_line() -> str:
    """The command as the lock note and run markers record it (``roomcorr design``)."""
    args = [Path(sys.argv[0]).name if sys.argv else "python", *sys.argv[1:3]]
    if args[0] in ("__main__.py", "roomcorr", "-m", "-c"):
        args[0] = "roomcorr"
    return " ".join(args)


@contextlib.contextmanager
def room_lock(room: Room, purpose: str = "") -> Iterator[None]:
    """Hold the room's lock for the duration of the block.

    The lock is an advisory ``flock`` on ``.roomcorr-lock``; the operating
    system releases it when the process ends in any way (even killed), so a
    crash never leaves a stale lock. Re-entrant within one process.
    ``purpose`` (e.g. "writing a measurement") appears in the message another
    command gets while the lock is held.

    Raises
    ------
    OutputError
        If another process holds the lock (the message says which).
    """
    key = room.root.resolve()
    if key in _HELD:
        _HELD[key][1] += 1
        try:
            yield
        finally:
            _HELD[key][1] -= 1
        return
    path = key / LOCK_FILE
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"{path}: cannot create the lock file ({exc.strerror})") from None
    try:
        _try_lock(fd)
    except BlockingIOError:
        os.close(fd)
        raise RoomBusyError(
            f"{room.root}: in use by {_holder_note(path)}; wait for it to finish and "
            "try again (two commands must not write one room folder at once)"
        ) from None
    note = {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "command": command_line(),
        "purpose": purpose,
        "since": iso_utc(utc_now()),
    }
    os.ftruncate(fd, 0)
    os.lseek(fd, 0, os.SEEK_SET)
    os.write(fd, json.dumps(note).encode())
    _HELD[key] = [fd, 1]
    try:
        yield
    finally:
        del _HELD[key]
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
        _unlock(fd)
        os.close(fd)


def _try_lock(fd: int) -> None:
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        import msvcrt

        try:
            msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
        except OSError:
            raise BlockingIOError from None
        return
    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)


def _unlock(fd: int) -> None:
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        import msvcrt

        with contextlib.suppress(OSError):
            os.lseek(fd, 0, 0)
            msvcrt.locking(fd, msvcrt.LK_UNLCK, 1)
        return
    fcntl.flock(fd, fcntl.LOCK_UN)


def is_locked(room: Room) -> bool:
    """Whether some command (another process, or this one) holds the room's lock now."""
    if room.root.resolve() in _HELD:
        return True
    path = room.root / LOCK_FILE
    if not path.exists():
        return False
    fd = os.open(path, os.O_RDONLY)
    try:
        try:
            import fcntl

            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except ImportError:  # pragma: no cover - Windows
            return False
        except BlockingIOError:
            return True
        fcntl.flock(fd, fcntl.LOCK_UN)
        return False
    finally:
        os.close(fd)
