"""The room layout: the room's size and where the loudspeakers, the seat and the microphone stood.

A TOML file (metres; ``x`` across the room from the left wall to the right wall
as seen from the seat facing the loudspeakers, ``y`` from the front wall behind
the loudspeakers towards the back wall, ``z`` up from the floor)::

    [room]
    size_m = [5.2, 6.3, 2.6]
    [loudspeakers]
    left = [1.40, 0.95, 1.00]
    right = [3.80, 0.95, 1.00]
    [seat]
    position = [2.60, 3.60, 1.10]
    [[measured]]
    position = [2.60, 3.60, 1.10]

Inside a room folder it is kept as ``layout.toml`` beside the room's settings.
Every number is checked finite and in range; positions outside the room, a
loudspeaker inside the listening area around the seat (a head width) and
unknown keys are refused with a message naming the file and the key.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from roomcorr.checked import checked_number, loads_toml
from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.errors import SettingsError
from roomcorr.rooms.folder import LAYOUT_FILE
from roomcorr.settings import read_toml

#: Smallest and largest room extent accepted, m.
ROOM_SIZE_RANGE_M = (1.5, 40.0)
#: Half the width of the listening area around the seat, m: a loudspeaker closer
#: than this (horizontally) to the seat would sit on the listener's head. A head is
#: about 0.15 m wide and the listening area reaches a head width either side of its
#: centre (common practice).
HEAD_HALF_WIDTH_M = 0.3
#: At most this many loudspeakers in a layout.
MAX_LOUDSPEAKERS = 16
#: At most this many measured positions.
MAX_MEASURED = 64
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,31}$")
_AXES = "xyz"

Position = tuple[float, float, float]


@dataclass(frozen=True)
class Layout:
    """Where everything stands, in metres (see the module's coordinates).

    Attributes
    ----------
    size_m : (width, length, height)
    loudspeakers : dict of name -> (x, y, z), in the file's (and the channels') order
    seat : (x, y, z)
    measured : list of (x, y, z), one per measurement position in file order (may be empty)
    """

    size_m: Position
    loudspeakers: dict[str, Position]
    seat: Position
    measured: list[Position] = field(default_factory=list)

    @property
    def names(self) -> list[str]:
        """Loudspeaker names in order."""
        return list(self.loudspeakers)

    def to_dict(self) -> dict[str, Any]:
        """Plain data with the file's keys (JSON-ready)."""
        out: dict[str, Any] = {
            "room": {"size_m": list(self.size_m)},
            "loudspeakers": {k: list(v) for k, v in self.loudspeakers.items()},
            "seat": {"position": list(self.seat)},
        }
        if self.measured:
            out["measured"] = [{"position": list(p)} for p in self.measured]
        return out


def _where(source: str, key: str) -> str:
    return f"{source}: {key}" if source else key


def _triple(value: Any, what: str, lo: Position, hi: Position) -> Position:
    if not isinstance(value, list | tuple) or len(value) != 3:
        raise SettingsError(f"{what}: expected three numbers [x, y, z] in metres, got {value!r}")
    out = []
    for axis, v, a, b in zip(_AXES, value, lo, hi, strict=True):
        out.append(float(checked_number(v, f"{what} {axis}", a, b, unit="m")))
    return (out[0], out[1], out[2])


def _inside(value: Any, what: str, size: Position) -> Position:
    """A position inside the room: every coordinate strictly between 0 and the room's extent."""
    p = _triple(value, what, (-1e6,) * 3, (1e6,) * 3)  # type: ignore[arg-type]
    for axis, v, extent in zip(_AXES, p, size, strict=True):
        if not 0.0 < v < extent:
            raise SettingsError(
                f"{what} = {list(p)}: {axis} = {v:g} m lies outside the room (0 to {extent:g} m); "
                "measure from the left wall (x), the front wall (y) and the floor (z)"
            )
    return p


def _table(data: dict[str, Any], key: str, source: str) -> dict[str, Any]:
    t = data.get(key)
    if not isinstance(t, dict):
        raise SettingsError(f"{_where(source, key)}: missing table [{key}]")
    return t


def _only(table: dict[str, Any], allowed: set[str], what: str) -> None:
    extra = sorted(set(table) - allowed)
    if extra:
        raise SettingsError(
            f"{what}: unknown key {extra[0]!r} (expected {', '.join(sorted(allowed))})"
        )


def layout_from_dict(data: dict[str, Any], source: str = "") -> Layout:
    """Check plain data with the file's keys and return a :class:`Layout`.

    Raises
    ------
    SettingsError
        Naming ``source`` and the key: a missing or unknown key, a number that is not
        finite or out of range, a position outside the room, a loudspeaker within
        :data:`HEAD_HALF_WIDTH_M` of the seat, or a bad loudspeaker name.
    """
    if not isinstance(data, dict):
        raise SettingsError(f"{source or 'layout'}: expected a table")
    _only(data, {"room", "loudspeakers", "seat", "measured"}, source or "layout")
    room = _table(data, "room", source)
    _only(room, {"size_m"}, _where(source, "[room]"))
    lo, hi = ROOM_SIZE_RANGE_M
    size = _triple(room.get("size_m"), _where(source, "room.size_m"), (lo,) * 3, (hi,) * 3)
    spk = _table(data, "loudspeakers", source)
    if not spk:
        raise SettingsError(f"{_where(source, '[loudspeakers]')}: name at least one loudspeaker")
    if len(spk) > MAX_LOUDSPEAKERS:
        raise SettingsError(
            f"{_where(source, '[loudspeakers]')}: at most {MAX_LOUDSPEAKERS} loudspeakers"
        )
    seat_t = _table(data, "seat", source)
    _only(seat_t, {"position"}, _where(source, "[seat]"))
    seat = _inside(seat_t.get("position"), _where(source, "seat.position"), size)
    speakers: dict[str, Position] = {}
    for name, pos in spk.items():
        if not _NAME.match(name):
            raise SettingsError(
                f"{_where(source, 'loudspeakers')}: name {name!r} must be letters, digits, "
                "'-' or '_' (up to 32)"
            )
        p = _inside(pos, _where(source, f"loudspeakers.{name}"), size)
        gap = ((p[0] - seat[0]) ** 2 + (p[1] - seat[1]) ** 2) ** 0.5
        if gap < HEAD_HALF_WIDTH_M:
            raise SettingsError(
                f"{_where(source, f'loudspeakers.{name}')}: {gap:.2f} m from the seat, inside "
                f"the listening area (a loudspeaker needs at least {HEAD_HALF_WIDTH_M:g} m); "
                "check the positions"
            )
        speakers[name] = p
    measured_raw = data.get("measured", [])
    if not isinstance(measured_raw, list) or len(measured_raw) > MAX_MEASURED:
        raise SettingsError(
            f"{_where(source, 'measured')}: expected up to {MAX_MEASURED} [[measured]] tables"
        )
    measured = []
    for i, entry in enumerate(measured_raw):
        what = _where(source, f"measured[{i + 1}]")
        if not isinstance(entry, dict):
            raise SettingsError(f"{what}: expected a table with 'position'")
        _only(entry, {"position"}, what)
        measured.append(_inside(entry.get("position"), f"{what}.position", size))
    return Layout(size_m=size, loudspeakers=speakers, seat=seat, measured=measured)


def read_layout(path: str | Path) -> Layout:
    """Read and check a layout TOML file (:func:`layout_from_dict`)."""
    return layout_from_dict(read_toml(path), str(path))


def _num(v: float) -> str:
    return f"{v:.3f}".rstrip("0").rstrip(".") if v != int(v) else f"{v:.1f}"


def _vec(p: Position) -> str:
    return "[" + ", ".join(_num(float(v)) for v in p) + "]"


def layout_text(layout: Layout) -> str:
    """The layout as TOML text with the file's keys (millimetre resolution)."""
    lines = [
        "# Room layout for roomcorr (metres): x across the room from the left wall, y from the",
        "# front wall (behind the loudspeakers) towards the back, z up from the floor.",
        "[room]",
        f"size_m = {_vec(layout.size_m)}",
        "",
        "[loudspeakers]",
    ]
    lines += [f"{name} = {_vec(p)}" for name, p in layout.loudspeakers.items()]
    lines += ["", "[seat]", f"position = {_vec(layout.seat)}"]
    for p in layout.measured:
        lines += ["", "[[measured]]", f"position = {_vec(p)}"]
    return "\n".join(lines) + "\n"


def write_layout(path: str | Path, layout: Layout) -> Path:
    """Write ``layout`` as TOML (atomically); the text reads back to the same layout
    (to the file's millimetre resolution).

    The text itself is checked before it is written: a position within half a millimetre
    of a wall is inside the room as a number but on the wall once written to the file's
    resolution, and a file that does not read back would stop every later command.
    """
    text = layout_text(layout)
    layout_from_dict(loads_toml(text, str(path)), str(path))  # never write what would not read back
    return atomic_write_text(path, text)


def room_layout_path(root: str | Path) -> Path:
    """Where a room folder keeps its layout."""
    return Path(root) / LAYOUT_FILE
