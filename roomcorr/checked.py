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

import json
import math
import os
import stat
import tomllib
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


# --------------------------------------------------------------------------- structured files

#: Deepest nesting of objects and arrays accepted in a JSON document or TOML file roomcorr
#: reads. Its own files nest less than ten levels; Python's parsers recurse per level and
#: fail with RecursionError near 1000 (``sys.getrecursionlimit``), so the limit is checked
#: first, by counting brackets, and the parser never gets near its own.
MAX_NESTING = 64
#: Most digits an integer in a JSON document may have. Python refuses to convert
#: integers longer than 4300 digits (``sys.get_int_max_str_digits``, CVE-2020-10735) with
#: a ValueError; no number roomcorr stores needs more than 20.
MAX_INT_DIGITS = 40
#: Largest JSON or TOML file read (records and manifests are a few kilobytes).
MAX_DOCUMENT_BYTES = 16 << 20


def nesting_depth(text: str) -> int:
    """Deepest nesting of ``[``/``{`` in a JSON or TOML text, brackets inside strings
    excepted (``"`` and ``'`` strings, backslash escapes in ``"`` strings, ``#`` comments).

    Linear in the text and stops counting at :data:`MAX_NESTING` + 1 (enough to refuse).
    """
    depth = deepest = 0
    quote = ""
    escaped = comment = False
    for ch in text:
        if comment:  # a TOML comment runs to the end of the line
            comment = ch != "\n"
            continue
        if quote:
            if escaped:
                escaped = False
            elif ch == "\\" and quote == '"':
                escaped = True
            elif ch == quote or ch == "\n":
                quote = ""
            continue
        if ch in "\"'":
            quote = ch
        elif ch == "#":
            comment = True
        elif ch in "[{":
            depth += 1
            if depth > deepest:
                deepest = depth
                if deepest > MAX_NESTING:
                    return deepest
        elif ch in "]}":
            depth -= 1
    return deepest


def _json_int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INT_DIGITS:
        raise ValueError(f"an integer of {len(text)} digits")
    return int(text)


def loads_json(
    text: str | bytes,
    what: str,
    error: type[RoomcorrError] = InputFileError,
    constants: bool = False,
) -> Any:
    """Parse a JSON document from a file or a request, turning every failure into ``error``.

    Refused with one line: invalid JSON, not UTF-8, nesting deeper than
    :data:`MAX_NESTING`, integers longer than :data:`MAX_INT_DIGITS` digits,
    ``NaN``/``Infinity`` (not JSON, RFC 8259 section 6) unless ``constants``
    (then they are read as floats, for a caller that checks every number with
    :func:`checked_number` and names the key in its message).

    Parameters
    ----------
    text : str or bytes
    what : str
        Names the document in the message (a path, ``request``).
    error : RoomcorrError subclass
    """
    if isinstance(text, bytes | bytearray):
        try:
            text = bytes(text).decode("utf-8")
        except UnicodeDecodeError:
            raise error(f"{what}: not valid JSON (not UTF-8 text)") from None
    if nesting_depth(text) > MAX_NESTING:
        raise error(f"{what}: not valid JSON (nested deeper than {MAX_NESTING} levels)")

    def no_constant(name: str) -> Any:
        raise ValueError(f"{name} is not a JSON number")

    try:
        if constants:
            return json.loads(text, parse_int=_json_int)
        return json.loads(text, parse_int=_json_int, parse_constant=no_constant)
    except (ValueError, RecursionError) as exc:  # JSONDecodeError is a ValueError
        raise error(f"{what}: not valid JSON ({exc})") from None


def read_json(
    path: str | Path,
    what: str = "JSON file",
    error: type[RoomcorrError] = InputFileError,
    max_bytes: int = MAX_DOCUMENT_BYTES,
) -> Any:
    """Read and parse a JSON file (a regular file of at most ``max_bytes``).

    See :func:`loads_json` for what is refused.
    """
    raw = read_regular_bytes(path, what, error, max_bytes)
    return loads_json(raw, str(path), error)


def loads_toml(text: str, what: str, error: type[RoomcorrError] = SettingsError) -> dict[str, Any]:
    """Parse TOML text, turning every failure (deep nesting included) into ``error``."""
    if nesting_depth(text) > MAX_NESTING:
        raise error(f"{what}: not valid TOML (nested deeper than {MAX_NESTING} levels)")
    try:
        return tomllib.loads(text)
    except (tomllib.TOMLDecodeError, RecursionError, ValueError) as exc:
        raise error(f"{what}: not valid TOML ({exc})") from None


def expect(
    value: Any,
    kind: type | tuple[type, ...],
    what: str,
    error: type[RoomcorrError] = InputFileError,
) -> Any:
    """``value`` if it is of ``kind`` (booleans are not numbers), else ``error`` naming ``what``.

    For the shapes of records read from files: ``expect(doc.get("settings", {}), dict,
    "manifest.json: settings")``.
    """
    kinds = kind if isinstance(kind, tuple) else (kind,)
    bad_bool = isinstance(value, bool) and bool not in kinds
    if bad_bool or not isinstance(value, kinds):
        names = " or ".join(_KIND_NAMES.get(k, k.__name__) for k in kinds)
        raise error(
            f"{what}: expected {names}, found {_KIND_NAMES.get(type(value), type(value).__name__)}"
        )
    return value


_KIND_NAMES = {
    dict: "a table (JSON object)",
    list: "a list",
    str: "text",
    int: "a whole number",
    float: "a number",
    bool: "true or false",
    type(None): "nothing (null)",
}
