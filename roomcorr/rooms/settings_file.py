"""The room's settings file: the commented text :func:`init_room` writes, reading it
(with upgrades of older layouts) and the room's name."""

from __future__ import annotations

import contextlib
import dataclasses
import inspect
import json
import os
import re
from pathlib import Path
from typing import Any

from roomcorr import settings as st
from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.errors import OutputError, SettingsError
from roomcorr.measure import settings as ms
from roomcorr.measure.settings import MeasureSettings
from roomcorr.rooms.folder import KINDS, SETTINGS_FILE, Room, iso_utc, utc_now
from roomcorr.rooms.lock import room_lock
from roomcorr.settings import (
    DesignSettings,
    Settings,
    read_toml,
    settings_from_dict,
)

#: Upgrades of older room settings files: ``version -> function(data) -> data``
#: turning a version-``v`` mapping into a version ``v + 1`` one. Version 1 is
#: the first layout; when a key is renamed or moved, add its step here.
MIGRATIONS: dict[int, Any] = {}


_DESIGN_NOTES = {
    "target": "target curve: a preset (flat, gentle-tilt, warm-seat) or a text file "
    "of 'frequency dB' lines",
    "band_lo_hz": "lowest corrected frequency in Hz (leave out: found from the measured roll-off)",
    "band_hi_hz": "highest corrected frequency in Hz (leave out: found from the measured roll-off)",
    "max_boost_db": "largest boost any filter may apply, dB (boost costs headroom and "
    "driver excursion)",
    "max_cut_db": "largest cut, dB",
    "taps": "FIR length at 48 kHz; other rates keep the same duration (leave out: automatic)",
    "sample_rates": "sample rates to write filters for",
    "ceiling_db": "highest peak gain of any exported filter, dB (above 0 only with allow_gain)",
    "allow_gain": "permit a ceiling above 0 dB (filters with gain can clip)",
    "calibration": "microphone calibration file, 'frequency dB' per line (leave out: none)",
    "position_weights": "weight of each microphone position in the average (leave out: equal)",
    "iir": "also write biquad (IIR) sets",
    "iir_sections": "most biquad sections per channel",
    "iir_freq_range_hz": "frequency range the biquads may use, Hz",
    "iir_gain_range_db": "gain range of a biquad section, dB (upper end never above max_boost_db)",
    "iir_q_range": "Q range of a biquad section",
    "temperature_c": "air temperature in °C, for the speed of sound (arrival -> distance)",
    "phase": "minimum (no delay) or mixed: also undo the loudspeakers' crossover phase where "
    "every position agrees, at the cost of a delay",
    "latency_ms": "delay of a mixed-phase design, ms (5-250): delay video pictures as much for "
    "lip-sync; keep minimum phase for live monitoring",
    "align": "put arrival delays and level trims into the filters: true, false (listed as "
    "trims in manifest.json instead) or leave out (on with more than one loudspeaker)",
    "channel_names": "names of the loudspeaker channels, in file order (leave out: left, right)",
    "subwoofer": "name of the channel that is a subwoofer (leave out: none)",
    "crossover_range_hz": "frequencies the subwoofer crossover may be chosen from, Hz",
    "crossover_slope_db_oct": "Linkwitz-Riley slope of the subwoofer crossover: 12, 24 or 48 "
    "dB/octave",
    "level_band_hz": "band over which the main loudspeakers' levels are matched, Hz",
    "sub_level_band_hz": "band of the subwoofer's level match, Hz (leave out: its own band "
    "below the crossover range)",
    "formats": "filter files to write: wav (always), multiwav, f32, f64, txt",
}


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} as TOML")


def _table_lines(values: dict[str, Any], notes: dict[str, str], example: dict[str, Any]) -> list:
    lines: list[str] = []
    for key, value in values.items():
        note = notes.get(key)
        if note:
            if lines and lines[-1] != "":
                lines.append("")
            lines.append(f"# {note}")
        if value is None:
            lines.append(f"# {key} = {_toml_value(example.get(key, ''))}")
        else:
            lines.append(f"{key} = {_toml_value(value)}")
        if note:
            lines.append("")
    if lines and lines[-1] != "":
        lines.append("")
    return lines


_MEASURE_NOTES = {
    "device": "audio device number or name from 'roomcorr devices' (leave out: system default)",
    "outputs": "output channels of the loudspeakers, in order (1 = first)",
    "input": "input channel of the measurement microphone",
    "loopback": "output and input channel joined by a cable, to remove the system latency "
    "(leave out: none)",
    "positions": "number of microphone positions to measure",
    "clip_dbfs": "quality gates: a recording failing one stops the run unless --force",
}
_MEASURE_EXAMPLES = {
    "device": 2,
    "loopback": [3, 2],
    "names": ["left", "right"],
    "input_device": "USB mic",
    "output_device": "HDMI",
    "two_streams": True,
    "reference": 1,
    "mic_sensitivity_dbfs": -31.5,
}
_INLINE_NOTE = re.compile(r"^\s+(\w+)\s*:[^#]*#\s*(.+)$")


def _measure_defaults() -> tuple[dict[str, Any], dict[str, str]]:
    """Default measurement settings and notes (their source comments, or ours)."""
    cls = getattr(ms, "MeasureSettings", None)
    if cls is None or not dataclasses.is_dataclass(cls):
        return {}, {}
    values = {}
    for f in dataclasses.fields(cls):
        v = getattr(cls(), f.name)
        if isinstance(v, str | int | float | bool | list | tuple) or v is None:
            values[f.name] = list(v) if isinstance(v, tuple) else v
    notes: dict[str, str] = {}
    with contextlib.suppress(OSError, TypeError):
        for line in inspect.getsource(cls).splitlines():
            m = _INLINE_NOTE.match(line)
            if m and m.group(1) in values:
                notes[m.group(1)] = m.group(2).strip()
    notes.update({k: v for k, v in _MEASURE_NOTES.items() if k in values})
    cap = getattr(ms, "LEVEL_CAP_DBFS", None)
    if "allow_loud" in values and cap is not None:
        notes["allow_loud"] = (
            f"needed for level_dbfs above {cap:g} dBFS (start low; protect "
            "your hearing and the loudspeakers)"
        )
    return values, notes


def settings_text(name: str, created: str) -> str:
    """The commented settings file written by :func:`init_room` (current layout)."""
    design = {
        k: (list(v) if isinstance(v, tuple) else v)
        for k, v in dataclasses.asdict(DesignSettings()).items()
    }
    examples = {
        "band_lo_hz": 30.0,
        "band_hi_hz": 500.0,
        "taps": 16384,
        "calibration": "mic-calibration.txt",
        "position_weights": [1.0, 1.0, 1.0],
        "align": True,
        "channel_names": ["left", "right", "sub"],
        "subwoofer": "sub",
        "sub_level_band_hz": [25.0, 50.0],
    }
    measure, measure_notes = _measure_defaults()
    lines = [
        "# roomcorr room settings. Every command run inside this folder reads this file;",
        "# options given on the command line override it for that run.",
        "# Lines starting with '#' are comments; remove the '#' before a key to set it.",
        "",
        "# Layout version of this file (roomcorr upgrades older layouts when it reads them).",
        f"settings_version = {st.SETTINGS_VERSION}",
        "",
        "[room]",
        "# A name for this room, shown by 'roomcorr history'.",
        f"name = {_toml_value(name)}",
        "# When this folder was created (UTC).",
        f"created_utc = {_toml_value(created)}",
        "",
        "[design]",
        *_table_lines(design, _DESIGN_NOTES, examples),
        "[measure]",
        "# Sweep and capture settings for 'roomcorr measure' (see 'roomcorr measure --help').",
        "# Safety: start with a low level and raise it slowly; protect your hearing and",
        "# respect your loudspeakers' excursion limits and local noise regulations.",
        *_table_lines(measure, measure_notes, _MEASURE_EXAMPLES),
    ]
    while lines and lines[-1] == "":
        lines.pop()
    return "\n".join(lines) + "\n"


def init_room(path: str | os.PathLike[str], name: str | None = None) -> Room:
    """Create a room folder with a commented settings file and empty run folders.

    Refuses a folder that is already a room (nothing is overwritten).

    Parameters
    ----------
    path : path-like
        Folder to create (may exist and hold other files).
    name : str, optional
        Room name (default: the folder's name).
    """
    root = Path(path).resolve()
    if root.exists() and not root.is_dir():
        raise OutputError(f"{path}: exists and is not a folder")
    if (root / SETTINGS_FILE).exists():
        raise OutputError(f"{root}: already a room folder ({SETTINGS_FILE} exists); left as it is")
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{path}: cannot create the folder ({exc.strerror})") from None
    room = Room(root)
    with room_lock(room, "creating the room folder"):
        if room.settings_path.exists():  # another init won the race
            raise OutputError(f"{root}: already a room folder ({SETTINGS_FILE} exists)")
        for sub in KINDS.values():
            (root / sub).mkdir(exist_ok=True)
        atomic_write_text(room.settings_path, settings_text(name or root.name, iso_utc(utc_now())))
    return room


def _read_room_toml(path: Path) -> dict[str, Any]:
    current = st.SETTINGS_VERSION  # read at call time (tests change it)
    data = read_toml(path)
    version = data.get("settings_version", 1)
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise SettingsError(f"{path}: settings_version = {version!r}: expected a whole number >= 1")
    if version > current:
        raise SettingsError(
            f"{path}: settings_version = {version} was written by a newer roomcorr "
            f"(this one reads up to {current}); upgrade roomcorr"
        )
    while version < current:
        step = MIGRATIONS.get(version)
        if step is None:
            raise SettingsError(
                f"{path}: settings_version = {version} cannot be upgraded to {current}; "
                f"create a new room with 'roomcorr init' and copy your choices over"
            )
        data = step(dict(data))
        version += 1
        data["settings_version"] = version
    room_table = data.get("room", {})
    if not isinstance(room_table, dict):
        raise SettingsError(f"{path}: [room] must be a table")
    for key in room_table:
        if key not in ("name", "created_utc"):
            raise SettingsError(
                f"{path}: room.{key}: unknown key; known keys are name, created_utc"
            )
    return data


def load_room_settings(room: Room) -> Settings:
    """Read the room's settings file (upgrading older layouts) into :class:`Settings`.

    Raises :class:`SettingsError` naming the file and key on any problem.
    """
    data = _read_room_toml(room.settings_path)
    settings = settings_from_dict(
        data, source=str(room.settings_path), base_dir=room.settings_path.parent
    )
    MeasureSettings.from_dict(settings.measure, source=f"{room.settings_path} [measure]")
    return settings


def room_name(room: Room) -> str:
    """The room's name from its settings file (the folder name if unset)."""
    try:
        table = _read_room_toml(room.settings_path).get("room", {})
    except SettingsError:
        return room.root.name
    return str(table.get("name", room.root.name))
