"""The browser app's plan view: the room's layout drawn and edited, with advise's suggestions.

The page reads :func:`plan_view` and saves through :func:`save_plan`, which goes
through :func:`roomcorr.app.placement.set_layout`: the same checks and messages
as ``roomcorr layout set`` (positions inside the room, a loudspeaker outside the
seat's head width, finite numbers in range, names), the same atomic write and the
room lock (another command or thread holding it: :class:`~roomcorr.errors.RoomBusyError`).
"""

from __future__ import annotations

from typing import Any

from roomcorr import rooms
from roomcorr.app.placement import (
    PLACEMENT_CAUTIONS,
    load_advice,
    room_layout_file,
    set_layout,
)
from roomcorr.deliver.atomic import sha256_of
from roomcorr.errors import RoomcorrError, SettingsError
from roomcorr.placement.layout import (
    HEAD_HALF_WIDTH_M,
    MAX_LOUDSPEAKERS,
    MAX_MEASURED,
    ROOM_SIZE_RANGE_M,
    read_layout,
)

#: Keys a plan saved from the page may hold.
PLAN_KEYS = {"size_m", "loudspeakers", "seat", "measured"}


def plan_view(room: rooms.Room) -> dict[str, Any]:
    """The room's layout and stored advice, for drawing.

    Returns
    -------
    dict
        ``layout`` (the file's keys, or None), ``problem`` (why the file cannot be
        used, or None), ``file``; ``advice`` (advise's stored suggestions, current and
        suggested positions and bass map, or None), ``advice_current`` (made from the
        layout as it is now), ``advice_problem``; ``latest_measurement`` and
        ``latest_positions`` (its run id and number of positions, or None); ``limits``
        (the checks' ranges) and ``cautions``.
    """
    layout, problem, sha = None, None, None
    try:
        path = room_layout_file(room)
        if path.is_file():
            layout = read_layout(path).to_dict()
            sha = sha256_of(path)
    except RoomcorrError as exc:
        problem = " ".join(str(exc).split())
    advice, advice_problem = load_advice(room)
    try:  # how many positions the layout should list: one per file of the latest measurement
        latest = rooms.latest_measurement(room)
        positions: int | None = len(rooms.measurement_files(latest))
    except RoomcorrError:
        latest, positions = None, None
    return {
        "file": rooms.LAYOUT_FILE,
        "layout": layout,
        "problem": problem,
        "advice": advice,
        "advice_current": bool(advice and sha and advice.get("layout_sha256") == sha),
        "advice_problem": advice_problem,
        "latest_measurement": None if latest is None else latest.name,
        "latest_positions": positions,
        "limits": {
            "room_size_m": list(ROOM_SIZE_RANGE_M),
            "head_half_width_m": HEAD_HALF_WIDTH_M,
            "max_loudspeakers": MAX_LOUDSPEAKERS,
            "max_measured": MAX_MEASURED,
        },
        "cautions": list(PLACEMENT_CAUTIONS),
    }


def _position(value: Any, what: str) -> list[Any]:
    """Three entries, as the file has them; the numbers are checked by the layout's rules."""
    if not isinstance(value, list) or len(value) != 3:
        raise SettingsError(f"{what}: expected three numbers [x, y, z] in metres")
    return value


def save_plan(room: rooms.Room, data: dict[str, Any]) -> dict[str, Any]:
    """Save a layout edited on the page as the room's ``layout.toml``.

    Parameters
    ----------
    room : Room
    data : dict
        ``size_m`` [w, l, h], ``loudspeakers`` {name: [x, y, z]} (in channel order),
        ``seat`` [x, y, z] and optionally ``measured`` [[x, y, z], ...] (metres).

    Returns
    -------
    dict
        :func:`plan_view` of the room after saving, with ``saved`` (the file).

    Raises
    ------
    SettingsError
        The message ``roomcorr layout set`` gives for the same values.
    RoomBusyError
        While another command (or a thread of the app) holds the room.
    """
    if not isinstance(data, dict):
        raise SettingsError("plan: expected a JSON object")
    extra = sorted(set(data) - PLAN_KEYS)
    if extra:
        raise SettingsError(
            f"plan: unknown key {extra[0]!r} (expected {', '.join(sorted(PLAN_KEYS))})"
        )
    spk = data.get("loudspeakers")
    if not isinstance(spk, dict) or not spk:
        raise SettingsError("plan: loudspeakers: name at least one loudspeaker")
    if len(spk) > MAX_LOUDSPEAKERS:
        raise SettingsError(f"plan: loudspeakers: at most {MAX_LOUDSPEAKERS} loudspeakers")
    measured = data.get("measured")
    if measured is not None and (not isinstance(measured, list) or len(measured) > MAX_MEASURED):
        raise SettingsError(f"plan: measured: expected up to {MAX_MEASURED} positions")
    path, _ = set_layout(
        size_m=tuple(_position(data.get("size_m"), "plan: size_m")),
        speakers=[(str(n), tuple(_position(p, f"plan: loudspeakers.{n}"))) for n, p in spk.items()],
        seat=tuple(_position(data.get("seat"), "plan: seat")),
        measured=None if measured is None else [
            tuple(_position(p, f"plan: measured[{i + 1}]")) for i, p in enumerate(measured)],
        room=room,
    )
    out = plan_view(room)
    out["saved"] = path.name
    return out
