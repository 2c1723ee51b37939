"""The one atomic-write helper every writer in roomcorr goes through.

A file is written under a temporary name in its destination folder, flushed
to disk and then moved into place with :func:`os.replace`, so a reader sees
either the old file, the complete new one, or nothing; never half a file.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

TMP_PREFIX = ".roomcorr-tmp-"


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
        Temporary file to write. It is removed if the block raises.
    """
    dest = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=TMP_PREFIX, suffix=dest.suffix, dir=dest.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    # mkstemp creates mode 0600; give the file the usual permissions (umask applied).
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp_path, dest)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
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
