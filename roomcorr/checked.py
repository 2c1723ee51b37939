"""Checked inputs: every number and every input file a user gives passes through here.

Two rules hold at every trust boundary (command line, settings files, WAV
headers, curve files):

* A number is finite and inside its documented range. ``NaN`` compares false
  with everything, so a bare ``x > limit`` test lets it through; the checks
  here are written so that ``NaN`` and the infinities always fail.
* An input file is a regular file. Opening a FIFO or a device blocks for ever
  (or reads without end), so anything else is refused before it is opened.

Both raise a :class:`~roomcorr.errors.RoomcorrError` subclass chosen by the
caller, with a one-line message that names the option, key or file.
"""

from __future__ import annotations

import math
import os
import stat
from pathlib import Path
from typing import Any

from roomcorr.errors import InputFileError, RoomcorrError, SettingsError

#: Largest magnitude any number may have anywhere in roomcorr (far beyond every
#: real range, far below the float overflow that turns sums into ``inf``).
ABS_LIMIT = 1e12


def checked_number(
    value: Any,
    what: str,
    lo: float | None = None,
    hi: float | None = None,
    *,
    integer: bool = False,
    error: type[RoomcorrError] = SettingsError,
    unit: str = "",
    hint: str = "",
) -> float:
    """Return ``value`` as a finite float (or int) inside ``[lo, hi]``, else raise.

    Parameters
    ----------
    value : Any
        A number, or text holding one (``"48000"``, ``"-3.5"``). Booleans are
        refused (``True`` is not a number a user means).
    what : str
        Name for the message: an option (``--ceiling``) or key (``design.ceiling_db``).
    lo, hi : float, optional
        Inclusive range; ``None`` leaves that side open (still finite, and
        within :data:`ABS_LIMIT`).
    integer : bool
        Require a whole number; an ``int`` is returned.
    error : RoomcorrError subclass
        Raised on failure (``SettingsError`` by default).
    unit : str
        Appended to the range in the message (``"dB"``, ``"Hz"``).
    hint : str
        Appended in brackets to an out-of-range message (why the range exists).

    Returns
    -------
    float or int
    """

    def fail(rest: str, name: str = what) -> RoomcorrError:
        return error(f"{name}: {rest}" if name else rest)

    if isinstance(value, bool):
        raise fail(f"expected a number, got {value!r}")
    if isinstance(value, str):
        text = value.strip()
        if "_" in text:  # Python accepts 1_000; a user typing it probably meant something else
            raise fail(f"expected a number, got {value!r}")
        try:
            num = int(text) if integer and text.lstrip("+-").isdigit() else float(text)
        except ValueError:
            raise fail(f"expected a number, got {value!r}") from None
    elif isinstance(value, int | float):
        num = value
    else:
        try:  # numpy scalars
            num = float(value)
        except (TypeError, ValueError):
            raise fail(f"expected a number, got {value!r}") from None
    if not isinstance(num, int):
        num = float(num)
        if not math.isfinite(num):
            raise fail(f"{value!r} is not a finite number")
    if not -ABS_LIMIT <= num <= ABS_LIMIT:
        raise fail(f"{value!r} is out of range")
    if integer:
        if float(num) != math.floor(float(num)):
            raise fail(f"expected a whole number, got {value!r}")
        num = int(num)
    sfx = (f" {unit}" if unit else "") + (f" ({hint})" if hint else "")
    name = f"{what} = {value!r}" if what else f"{value!r}"
    if lo is not None and hi is not None and not lo <= num <= hi:
        raise fail(f"must lie between {lo:g} and {hi:g}{sfx}", name)
    if lo is not None and hi is None and not num >= lo:
        raise fail(f"must be at least {lo:g}{sfx}", name)
    if hi is not None and lo is None and not num <= hi:
        raise fail(f"must be at most {hi:g}{sfx}", name)
    return num


def regular_file(
    path: str | Path, what: str = "file", error: type[RoomcorrError] = InputFileError
) -> Path:
    """Return ``path`` if it names an existing regular file (symlinks followed), else raise.

    A FIFO, socket, device or folder is refused before anything opens it, so a
    wrong argument can never block the program.
    """
    p = Path(path)
    try:
        st = os.stat(p)
    except FileNotFoundError:
        raise error(f"{p}: {what} not found") from None
    except OSError as exc:
        raise error(f"{p}: cannot read {what} ({exc.strerror})") from None
    if stat.S_ISDIR(st.st_mode):
        raise error(f"{p}: is a folder, not a {what}")
    if not stat.S_ISREG(st.st_mode):
        raise error(
            f"{p}: not a regular file (a pipe, socket or device); name a {what} saved on disk"
        )
    return p


def read_regular_bytes(
    path: str | Path,
    what: str = "file",
    error: type[RoomcorrError] = InputFileError,
    max_bytes: int = 64 << 20,
) -> bytes:
    """Read a small regular file completely (refusing pipes, devices and huge files)."""
    p = regular_file(path, what, error)
    try:
        # O_NONBLOCK: should a pipe replace the file after the check, open() must not block
        fd = os.open(p, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as fh:
            st = os.fstat(fh.fileno())
            if not stat.S_ISREG(st.st_mode):  # replaced between the check and the open
                raise error(f"{p}: not a regular file; name a {what} saved on disk")
            if st.st_size > max_bytes:
                raise error(f"{p}: {st.st_size} bytes is too large for a {what}")
            return fh.read(max_bytes + 1)
    except OSError as exc:
        raise error(f"{p}: cannot read {what} ({exc.strerror})") from None
