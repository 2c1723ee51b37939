"""The room lock: one command writes a room folder at a time.

The lock is an advisory ``flock`` on ``.roomcorr-lock``; the operating system
releases it when the process ends in any way. A thread lock beside it keeps the
app's request threads apart as well. The lock file is the one file not
written through :mod:`roomcorr.deliver.atomic`: it must keep its identity for
``flock`` and holds only a note of who holds it.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import socket
import stat
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from roomcorr.errors import OutputError, RoomBusyError
from roomcorr.rooms.folder import LOCK_FILE, Room, iso_utc, utc_now

#: Locks this process holds: room folder -> [lock file descriptor, depth, owning thread id].
_HELD: dict[Path, list[Any]] = {}
#: Guards ``_HELD``: the app's request threads take and release room locks concurrently.
_HELD_GUARD = threading.Lock()

#: ``open`` flags of the lock file: never follow a symbolic link (a link named
#: ``.roomcorr-lock`` would make the note land in a file outside the room), never block.
_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
_OPEN_FLAGS = os.O_RDWR | os.O_CREAT | _NOFOLLOW


def _open_lock_file(path: Path) -> int:
    """Open (or create) the lock file without following links; refuse anything but a plain
    file of its own (a link, a hard link to another file, a pipe)."""
    if path.is_symlink():  # O_NOFOLLOW refuses it too (ELOOP); this names the cause
        raise OutputError(
            f"{path}: is a symbolic link; the lock file must be a plain file inside the room "
            "folder (remove the link)"
        )
    try:
        fd = os.open(path, _OPEN_FLAGS, 0o644)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise OutputError(
                f"{path}: is a symbolic link; the lock file must be a plain file inside the "
                "room folder (remove the link)"
            ) from None
        raise OutputError(f"{path}: cannot create the lock file ({exc.strerror})") from None
    st = os.fstat(fd)
    if not stat.S_ISREG(st.st_mode) or st.st_nlink != 1:
        os.close(fd)
        raise OutputError(
            f"{path}: not a plain file of its own (a pipe, a folder or a hard link to another "
            "file); remove it and try again"
        )
    return fd


def _holder_note(path: Path) -> str:
    info: Any = {}
    with contextlib.suppress(OSError, ValueError, RecursionError):
        fd = os.open(path, os.O_RDONLY | _NOFOLLOW)
        with os.fdopen(fd, "rb") as fh:
            info = json.loads(fh.read(4096).decode("utf-8") or "{}")
    if not isinstance(info, dict) or not info:
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
    crash never leaves a stale lock. It excludes other processes and other
    threads of this process alike (the app's request threads); only the thread
    holding it may take it again inside the block (a report written under the
    lock that starts a run). The lock file is opened without following links.
    ``purpose`` (e.g. "writing a measurement") appears in the message another
    command gets while the lock is held.

    Raises
    ------
    RoomBusyError
        If another process, or another thread of this one, holds the lock.
    OutputError
        If the lock file is a link or cannot be created.
    """
    key = room.root.resolve()
    me = threading.get_ident()
    with _HELD_GUARD:
        held = _HELD.get(key)
        if held is not None and held[2] == me:
            held[1] += 1
            nested = True
        elif held is not None:
            raise RoomBusyError(
                f"{room.root}: in use by this program ({_holder_note(key / LOCK_FILE)}); wait "
                "for it to finish and try again (one write to a room folder at a time)"
            )
        else:
            nested = False
            _HELD[key] = [None, 1, me]  # reserved while the file lock is taken
    if nested:
        try:
            yield
        finally:
            with _HELD_GUARD:
                _HELD[key][1] -= 1
        return
    try:
        fd = _take(room, key, purpose)
    except BaseException:
        with _HELD_GUARD:
            del _HELD[key]
        raise
    with _HELD_GUARD:
        _HELD[key][0] = fd
    try:
        yield
    finally:
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
        _unlock(fd)
        os.close(fd)
        with _HELD_GUARD:
            del _HELD[key]


def _take(room: Room, key: Path, purpose: str) -> int:
    """Open the lock file, take the ``flock`` and write the note; return the descriptor."""
    path = key / LOCK_FILE
    fd = _open_lock_file(path)
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
    try:
        os.ftruncate(fd, 0)
        os.lseek(fd, 0, os.SEEK_SET)
        os.write(fd, json.dumps(note).encode())
    except BaseException:
        _unlock(fd)
        os.close(fd)
        raise
    return fd


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
    if not path.exists() or path.is_symlink():
        return False
    try:
        fd = os.open(path, os.O_RDONLY | _NOFOLLOW)
    except OSError:
        return False
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
