"""The one atomic-write helper every writer in roomcorr goes through.

A file is written under a temporary name in its destination folder, flushed
to disk and then moved into place with :func:`os.replace`, so a reader sees
either the old file, the complete new one, or nothing; never half a file.

A whole folder (a design, a report's figures) is replaced the same way with
:func:`staged_folder`: it is built in a temporary sibling folder and swapped
in only when complete, so the old folder stays whole until the new one is.

Temporary names carry the writing process's id
(``.roomcorr-tmp-<pid>-<random>``, ``.roomcorr-tmp-<name>-<pid>-<random>``);
what a killed process left behind is removed by :func:`clean_stale` the next
time roomcorr writes there, and only when that process no longer runs.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import hashlib
import os
import re
import secrets
import shutil
import sys
from collections.abc import Callable, Iterator
from pathlib import Path

TMP_PREFIX = ".roomcorr-tmp-"
OLD_PREFIX = ".roomcorr-old-"
_PID_PART = re.compile(r"-(\d+)-[0-9a-f]{16}(?:\.[^/]*)?$")


class PathEscapeError(ValueError):
    """A relative path read from a file points outside the folder it belongs to."""


def _tmp_name(stem: str = "", suffix: str = "") -> str:
    mid = f"{stem}-" if stem else ""
    return f"{TMP_PREFIX}{mid}{os.getpid()}-{secrets.token_hex(8)}{suffix}"


def _umask() -> int:
    umask = os.umask(0)
    os.umask(umask)
    return umask


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; move it into place on success.

    Parameters
    ----------
    path : path-like
        Final destination. Its folder must exist.

    Yields
    ------
    Path
        Temporary file to write. It is removed if the block raises (Ctrl-C
        included), whenever the interruption arrives.
    """
    dest = Path(path)
    # The name is chosen before anything exists on disk and the file is created
    # inside the ``try``, so an interrupt at any point leaves nothing behind.
    tmp_path = dest.parent / _tmp_name(suffix=dest.suffix)
    try:
        fd = os.open(tmp_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)  # umask applies
        os.close(fd)
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp_path, dest)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically and return the path."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def atomic_write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically and return the path."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_with(path: str | os.PathLike[str], writer: Callable[[Path], None]) -> Path:
    """Call ``writer(tmp_path)`` to fill a temporary file, then move it to ``path``."""
    with atomic_path(path) as tmp:
        writer(tmp)
    return Path(path)


# --------------------------------------------------------------------------- paths


def contained(base: str | os.PathLike[str], rel: str | os.PathLike[str]) -> Path:
    """``base / rel``, refused unless it lies inside ``base`` (symbolic links resolved).

    Parameters
    ----------
    base : path-like
        The folder ``rel`` belongs to.
    rel : path-like
        A path read from a file or given as a name: relative, without ``..``
        leading outside, not through a link that leads outside.

    Raises
    ------
    PathEscapeError
        If ``rel`` is absolute or resolves outside ``base``.
    """
    text = os.fspath(rel)
    if not isinstance(text, str) or not text or "\x00" in text:
        raise PathEscapeError(f"{rel!r}: not a file name")
    if Path(text).is_absolute() or Path(text).drive or text.startswith(("/", "\\")):
        raise PathEscapeError(f"{text}: an absolute path, expected one inside {base}")
    root = Path(base).resolve()
    full = (root / text).resolve()
    if full != root and root not in full.parents:
        raise PathEscapeError(f"{text}: leads outside {base}")
    return Path(base) / text


def holds_working_folder(path: Path) -> bool:
    """Whether ``path`` is the working folder or one of its parents (swapping it would
    leave the shell that started roomcorr in a deleted folder)."""
    try:
        here = Path.cwd().resolve()
        target = path.resolve()
    except OSError:
        return False
    return target == here or target in here.parents


def is_link_or_outside(path: Path, base: Path) -> bool:
    """Whether ``path`` is a symbolic link or resolves outside ``base``."""
    if path.is_symlink():
        return True
    root = base.resolve()
    full = path.resolve()
    return full != root and root not in full.parents


# --------------------------------------------------------------------------- folders


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def clean_stale(folder: str | os.PathLike[str], stem: str | None = None) -> list[Path]:
    """Remove what an interrupted roomcorr left in ``folder``; return what was removed.

    Only direct children named by this module (``.roomcorr-tmp-...``,
    ``.roomcorr-old-...``) whose writing process no longer runs are touched;
    with ``stem``, only the staging folders of that folder name. An old
    folder parked by an interrupted swap is moved back when the new one never
    arrived, and removed otherwise.
    """
    d = Path(folder)
    removed: list[Path] = []
    if not d.is_dir():
        return removed
    for p in sorted(d.iterdir()):
        name = p.name
        prefix = next((x for x in (TMP_PREFIX, OLD_PREFIX) if name.startswith(x)), None)
        m = _PID_PART.search(name)
        if prefix is None or m is None or _pid_alive(int(m.group(1))):
            continue
        own = name[len(prefix) : m.start()]  # the folder name it belonged to ("" for a file)
        if stem is not None and own != stem:
            continue
        if prefix == OLD_PREFIX and own:
            dest = d / own
            if not dest.exists() and not dest.is_symlink():
                os.rename(p, dest)  # the swap never finished: the old folder comes back
                continue
        if p.is_dir() and not p.is_symlink():
            shutil.rmtree(p)
        else:
            p.unlink()
        removed.append(p)
    return removed


def fsync_dir(path: Path) -> None:
    """Flush a folder's entries to disk (where the system allows it)."""
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths in one atomic step (Linux ``renameat2(RENAME_EXCHANGE)``);
    False where the system or file system does not offer it."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def swap_in(staging: Path, dest: Path) -> None:
    """Move the complete folder ``staging`` to ``dest``, replacing what was there.

    On Linux both folders are exchanged in one atomic step and the old one
    (now under the staging name) is removed. Elsewhere ``dest`` is parked
    under a temporary name, ``staging`` is renamed into place and the parked
    folder is removed; between the two renames ``dest`` is briefly absent,
    and :func:`clean_stale` puts the parked folder back if the process dies
    in that moment.
    """
    fsync_dir(staging)
    if not dest.exists():
        os.rename(staging, dest)
        fsync_dir(dest.parent)
        return
    if _exchange(staging, dest):  # one atomic step; staging now holds the old folder
        fsync_dir(dest.parent)
        shutil.rmtree(staging, ignore_errors=True)
        return
    parked = dest.parent / f"{OLD_PREFIX}{dest.name}-{os.getpid()}-{secrets.token_hex(8)}"
    os.rename(dest, parked)
    try:
        os.rename(staging, dest)
    except BaseException:
        os.rename(parked, dest)
        raise
    fsync_dir(dest.parent)
    shutil.rmtree(parked, ignore_errors=True)


@contextlib.contextmanager
def staged_folder(dest: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield an empty temporary sibling of ``dest``; swap it in when the block succeeds.

    Parameters
    ----------
    dest : path-like
        The folder to create or replace. Its parent must exist.

    Notes
    -----
    If the block raises, the staging folder is removed and ``dest`` is left as
    it was. If the process is killed, the staging folder stays behind under a
    name with the process id and :func:`clean_stale` removes it later.
    """
    target = Path(dest)
    parent = target.parent
    clean_stale(parent, target.name)
    staging = parent / _tmp_name(target.name)
    try:
        staging.mkdir()
        mode = (target.stat().st_mode & 0o7777) if target.is_dir() else (0o777 & ~_umask())
        os.chmod(staging, mode)
        yield staging
        swap_in(staging, target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def disk_error_text(exc: OSError) -> str:
    """A short reason for an operating-system error (``no space left on the disk``...)."""
    reasons = {
        errno.ENOSPC: "no space left on the disk",
        errno.EDQUOT: "disk quota exceeded",
        errno.EROFS: "the disk is read-only",
        errno.EACCES: "permission denied",
        errno.EPERM: "operation not permitted",
        errno.ENAMETOOLONG: "file name too long",
        errno.ENOTDIR: "a part of the path is a file, not a folder",
        errno.EISDIR: "is a folder",
        errno.ENOENT: "no such file or folder",
        errno.EEXIST: "already exists",
        errno.EXDEV: "on another disk",
        errno.EBUSY: "in use (a mount point?)",
    }
    return reasons.get(exc.errno or -1, exc.strerror or str(exc))


@contextlib.contextmanager
def staged_copy(dest: str | os.PathLike[str]) -> Iterator[Path]:
    """Like :func:`staged_folder`, but the staging folder starts as a copy of ``dest``.

    Files are hard links to the originals (roomcorr never changes a file in
    place, it replaces it), so the copy costs no disk space; the block edits
    the copy and the whole folder is swapped in when it succeeds. Used to add
    files to a folder and update its manifest in one step.
    """
    target = Path(dest)
    with staged_folder(target) as stage:
        _link_tree(target, stage)
        yield stage


def _link_tree(src: Path, dst: Path) -> None:
    for dirpath, dirnames, filenames in os.walk(src):
        here = Path(dirpath)
        rel = here.relative_to(src)
        dirnames[:] = [n for n in dirnames if not n.startswith((TMP_PREFIX, OLD_PREFIX))]
        for n in dirnames:
            p = here / n
            if p.is_symlink():
                os.symlink(os.readlink(p), dst / rel / n)
            else:
                (dst / rel / n).mkdir()
                shutil.copymode(p, dst / rel / n)
        for n in filenames:
            if n.startswith((TMP_PREFIX, OLD_PREFIX)):
                continue
            p, q = here / n, dst / rel / n
            if p.is_symlink():
                os.symlink(os.readlink(p), q)
                continue
            try:
                os.link(p, q)
            except OSError:
                shutil.copy2(p, q)


def sha256_of(path: Path) -> str:
    """SHA-256 hex digest of a file."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
