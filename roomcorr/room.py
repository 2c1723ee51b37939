"""Room folders: one settings file, every measurement and design kept, history, compare.

Public functions (the signatures other commands rely on)::

    find_room(path=None) -> Room | None
        The room folder holding ``path`` (default: the working folder), or None.
    open_room(path) -> Room                      # raises SettingsError if not a room
    init_room(path, name=None) -> Room           # creates the folder and settings file
    load_room_settings(room) -> Settings         # reads (and upgrades) roomcorr-room.toml
    room_lock(room, purpose="") -> context manager (re-entrant in one process)
    new_run(room, kind, info=None) -> context manager yielding the run folder (Path)
        kind is "measurement" or "design". Takes the room lock, creates a new
        time-stamped folder, and writes its "complete" marker only when the
        block finishes without an exception. ``info`` (a dict the caller may
        keep filling inside the block) is stored in the marker, e.g.
        ``{"measurement": "<run id>"}`` for a design.
    latest_measurement(room) -> Path             # newest complete one; InputFileError if none
    list_runs(room, kind=None) -> list[RunInfo]  # oldest first, incomplete ones included
    history(room) -> list[dict]                  # runs with their key figures
    add_measurement(room, paths) -> Path         # copy IR WAVs from elsewhere into a new run
    measurement_files(folder) -> list[Path]      # the IR WAVs of a measurement folder
    compare_measurements(a, b, room=None, temperature_c=None) -> dict
    check_run(run, use=None) -> str | None       # what changed since the run finished
    verified(room, folder, use=None)             # InputFileError for a damaged run

Layout of a room folder::

    ROOM/roomcorr-room.toml                 settings (TOML, commented, settings_version)
    ROOM/.roomcorr-lock                     lock file (held by a running command)
    ROOM/measurements/2026-01-31_201502Z/   pos1.wav ... measurement.json, complete.json
    ROOM/designs/2026-01-31_203010Z/        manifest.json, design.npz, fir/..., complete.json

Runs are never overwritten or deleted, and finished runs are read-only to
roomcorr. A run folder without ``complete.json`` was interrupted (or is still
being written) and is never taken as a measurement or design by later
commands. A finished run is verified on read against its ``complete.json``
(sizes of every file always, SHA-256 of the files a command uses); a damaged
run is shown as damaged by ``history`` and refused with one line elsewhere.
``measurements/`` and ``designs/`` must be plain folders inside the room. Every file goes through
:mod:`roomcorr.deliver.atomic`; the one exception is the lock file, which must keep
its identity for ``flock`` and holds only a note of who holds it.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import json
import os
import re
import socket
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from roomcorr.audio_io import natural_key
from roomcorr.deliver.atomic import (
    PathEscapeError,
    atomic_write_bytes,
    atomic_write_text,
    clean_stale,
    contained,
    fsync_dir,
    is_link_or_outside,
)
from roomcorr.errors import InputFileError, OutputError, RoomcorrError, SettingsError

if TYPE_CHECKING:
    from roomcorr.settings import Settings

SETTINGS_FILE = "roomcorr-room.toml"
LOCK_FILE = ".roomcorr-lock"
COMPLETE_MARKER = "complete.json"
SETTINGS_SNAPSHOT = "room-settings.toml"
KINDS = {"measurement": "measurements", "design": "designs"}
_RUN_ID = re.compile(r"^(\d{4}-\d{2}-\d{2}_\d{6}Z)(?:_(\d+))?$")

#: Upgrades of older room settings files: ``version -> function(data) -> data``
#: turning a version-``v`` mapping into a version ``v + 1`` one. Version 1 is
#: the first layout; when a key is renamed or moved, add its step here.
MIGRATIONS: dict[int, Any] = {}


# --------------------------------------------------------------------------- room


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


def _utc_now() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


def _iso(t: _dt.datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def _version() -> str:
    try:
        from roomcorr import __version__

        return str(__version__)
    except ImportError:  # pragma: no cover - package metadata missing
        return "unknown"


# --------------------------------------------------------------------------- settings file

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
    try:
        from roomcorr.measure import settings as ms
    except ImportError:
        return {}, {}
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
        import inspect

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
    from roomcorr.settings import SETTINGS_VERSION, DesignSettings

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
        f"settings_version = {SETTINGS_VERSION}",
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
        atomic_write_text(room.settings_path, settings_text(name or root.name, _iso(_utc_now())))
    return room


def _read_room_toml(path: Path) -> dict[str, Any]:
    from roomcorr.settings import SETTINGS_VERSION, read_toml

    data = read_toml(path)
    version = data.get("settings_version", 1)
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise SettingsError(f"{path}: settings_version = {version!r}: expected a whole number >= 1")
    if version > SETTINGS_VERSION:
        raise SettingsError(
            f"{path}: settings_version = {version} was written by a newer roomcorr "
            f"(this one reads up to {SETTINGS_VERSION}); upgrade roomcorr"
        )
    while version < SETTINGS_VERSION:
        step = MIGRATIONS.get(version)
        if step is None:
            raise SettingsError(
                f"{path}: settings_version = {version} cannot be upgraded to {SETTINGS_VERSION}; "
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
    from roomcorr.settings import settings_from_dict

    data = _read_room_toml(room.settings_path)
    settings = settings_from_dict(
        data, source=str(room.settings_path), base_dir=room.settings_path.parent
    )
    try:
        from roomcorr.measure.settings import MeasureSettings
    except ImportError:
        return settings
    MeasureSettings.from_dict(settings.measure, source=f"{room.settings_path} [measure]")
    return settings


def room_name(room: Room) -> str:
    """The room's name from its settings file (the folder name if unset)."""
    try:
        table = _read_room_toml(room.settings_path).get("room", {})
    except SettingsError:
        return room.root.name
    return str(table.get("name", room.root.name))


# --------------------------------------------------------------------------- lock

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


def _command_line() -> str:
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
        raise OutputError(
            f"{room.root}: in use by {_holder_note(path)}; wait for it to finish and "
            "try again (two commands must not write one room folder at once)"
        ) from None
    note = {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "command": _command_line(),
        "purpose": purpose,
        "since": _iso(_utc_now()),
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


# --------------------------------------------------------------------------- runs


@dataclass
class RunInfo:
    """One run folder of a room."""

    kind: str
    run_id: str
    path: Path
    complete: bool
    marker: dict[str, Any]
    problem: str | None = None  # why the run is damaged (then ``complete`` is False)


def _sha256(path: Path) -> str:
    from roomcorr.deliver.export import sha256_of

    return sha256_of(path)


def _run_files(run_dir: Path) -> list[Path]:
    from roomcorr.deliver.atomic import TMP_PREFIX

    return sorted(
        p
        for p in run_dir.rglob("*")
        if p.is_file() and p.name != COMPLETE_MARKER and not p.name.startswith(TMP_PREFIX)
    )


def _make_run_dir(room: Room, kind: str) -> Path:
    """A new run folder; the name is unique across both kinds so that runs started in the
    same second keep their order (``..._2``, ``..._3``)."""
    stamp = _utc_now().strftime("%Y-%m-%d_%H%M%SZ")
    parent = room.root / KINDS[kind]
    check_kind_folder(room, kind)
    parent.mkdir(parents=True, exist_ok=True)
    check_kind_folder(room, kind)  # created by someone else in between: check again
    clean_stale(parent)
    for n in range(1, 1000):
        name = stamp if n == 1 else f"{stamp}_{n}"
        if any((room.root / sub / name).exists() for sub in KINDS.values()):
            continue
        cand = parent / name
        try:
            cand.mkdir()
        except FileExistsError:
            continue
        return cand
    raise OutputError(f"{parent}: cannot create a new run folder")  # pragma: no cover


def refuse_finished_run(path: str | os.PathLike[str], label: str = "--out") -> None:
    """Raise :class:`OutputError` if ``path`` is, or lies inside, a finished run of a room
    folder: finished runs are read-only to roomcorr (a new run is the way to change them)."""
    p = Path(os.path.abspath(path))
    for cand in (p, *p.parents):
        if (cand / COMPLETE_MARKER).is_file() and cand.parent.name in KINDS.values():
            raise OutputError(
                f"{label} {path}: inside the finished run {cand.name} of a room folder, which "
                "roomcorr never changes; choose another folder (in the room: a new run)"
            )


def check_kind_folder(room: Room, kind: str) -> None:
    """Refuse a ``measurements/`` or ``designs/`` folder that is a link or leads outside."""
    parent = room.root / KINDS[kind]
    if (parent.exists() or parent.is_symlink()) and (
        is_link_or_outside(parent, room.root) or not parent.is_dir()
    ):
        raise OutputError(
            f"{parent}: is a symbolic link or not a folder; runs must stay inside the room "
            "folder (make it a plain folder)"
        )


@contextlib.contextmanager
def new_run(room: Room, kind: str, info: dict[str, Any] | None = None) -> Iterator[Path]:
    """Create a new time-stamped run folder; mark it complete when the block succeeds.

    Parameters
    ----------
    room : Room
    kind : {"measurement", "design"}
    info : dict, optional
        Stored in the marker when the block ends; the caller may add keys to
        it inside the block (e.g. ``info["measurement"] = run_id``).

    Yields
    ------
    Path
        The new, empty run folder. When the block succeeds, the room's settings
        file as it was at the start is copied in as ``room-settings.toml`` (so
        each run records the settings it started with), then ``complete.json``.

    Notes
    -----
    The room lock is held for the whole block. If the block raises (including
    Ctrl-C), or the process is killed, the folder keeps whatever was written
    but gets no ``complete.json``, so :func:`latest_measurement` and
    :func:`list_runs` never take it for a finished run. Nothing written is
    deleted; a run folder still empty when the block raises is removed.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {sorted(KINDS)}, not {kind!r}")
    with room_lock(room, f"writing a {kind}"):
        started = _utc_now()
        run_dir = _make_run_dir(room, kind)
        snapshot = room.settings_path.read_bytes() if room.settings_path.is_file() else None
        try:
            yield run_dir
        except BaseException:
            with contextlib.suppress(OSError):
                run_dir.rmdir()  # a run that failed before writing anything leaves no trace
            raise
        snapshot_sha = None
        if snapshot is not None:  # written at the end: writers may want an empty folder
            atomic_write_bytes(run_dir / SETTINGS_SNAPSHOT, snapshot)
            snapshot_sha = _sha256(run_dir / SETTINGS_SNAPSHOT)
        found = _run_files(run_dir)
        files = {p.relative_to(run_dir).as_posix(): _sha256(p) for p in found}
        sizes = {p.relative_to(run_dir).as_posix(): p.stat().st_size for p in found}
        marker = {
            "kind": kind,
            "run_id": run_dir.name,
            "complete": True,
            "started_utc": _iso(started),
            "finished_utc": _iso(_utc_now()),
            "roomcorr_version": _version(),
            "room_settings_sha256": snapshot_sha,
            "command": _command_line(),
            "info": dict(info or {}),
            "files": files,
            "sizes": sizes,
        }
        fsync_dir(run_dir)
        atomic_write_text(run_dir / COMPLETE_MARKER, json.dumps(marker, indent=2) + "\n")
        fsync_dir(run_dir)


def _run_sort_key(p: Path) -> tuple[str, int]:
    m = _RUN_ID.match(p.name)
    if m is None:
        return (p.name, 0)
    return (m.group(1), int(m.group(2) or 1))


def _marker_problem(data: Any, run_dir: Path) -> str | None:
    """Why a parsed ``complete.json`` is unusable (None when it is fine)."""
    if not isinstance(data, dict):
        return f"{COMPLETE_MARKER}: expected a JSON object"
    files = data.get("files", {})
    sizes = data.get("sizes", {})
    if not isinstance(files, dict) or not all(
        isinstance(v, str) and len(v) == 64 for v in files.values()
    ):
        return f"{COMPLETE_MARKER}: 'files' is not a table of SHA-256 digests"
    if not isinstance(sizes, dict) or not all(
        isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in sizes.values()
    ):
        return f"{COMPLETE_MARKER}: 'sizes' is not a table of file sizes"
    if not isinstance(data.get("info", {}), dict):
        return f"{COMPLETE_MARKER}: 'info' is not a table"
    for rel in [*files, *sizes]:
        try:
            contained(run_dir, rel)
        except PathEscapeError as exc:
            return f"{COMPLETE_MARKER}: names a file outside the run ({exc})"
    return None


def _load_marker(run_dir: Path) -> tuple[dict[str, Any] | None, str | None]:
    """(marker, problem): (None, None) for a run without marker (interrupted),
    (None, problem) for a damaged one, (marker, None) for a sound one."""
    p = run_dir / COMPLETE_MARKER
    if not p.exists() and not p.is_symlink():
        return None, None
    if p.is_symlink() or not p.is_file():
        return None, f"{COMPLETE_MARKER}: not a plain file"
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        return None, f"{COMPLETE_MARKER}: unreadable ({exc})"
    problem = _marker_problem(data, run_dir)
    if problem:
        return None, problem
    if data.get("complete") is not True:
        return None, None
    return data, None


def _read_marker(run_dir: Path) -> dict[str, Any] | None:
    return _load_marker(run_dir)[0]


def list_runs(
    room: Room, kind: str | None = None, include_incomplete: bool = True
) -> list[RunInfo]:
    """Runs of a room, oldest first (by time stamp), measurements and designs mixed.

    Parameters
    ----------
    kind : {"measurement", "design"}, optional
        Only runs of this kind.
    include_incomplete : bool
        Also list folders without a ``complete.json`` marker.
    """
    out: list[RunInfo] = []
    for k, sub in KINDS.items():
        if kind is not None and k != kind:
            continue
        base = room.root / sub
        if not base.is_dir():
            continue
        if is_link_or_outside(base, room.root):
            continue  # never read runs from outside the room (check_kind_folder refuses it)
        for p in base.iterdir():
            if p.name.startswith(".") or not (p.is_dir() or p.is_symlink()):
                continue
            if is_link_or_outside(p, base):
                marker, problem = None, "a symbolic link to a folder outside the room"
            else:
                marker, problem = _load_marker(p)
            if marker is None and not include_incomplete:
                continue
            out.append(RunInfo(k, p.name, p, marker is not None, marker or {}, problem))
    return sorted(out, key=lambda r: (_run_sort_key(r.path), r.kind))


def verify_run(run_dir: str | os.PathLike[str]) -> list[str]:
    """Files of a complete run whose content no longer matches its marker.

    Returns an empty list when every recorded file is present and has the
    SHA-256 stored in ``complete.json``. Raises :class:`InputFileError` for a
    folder without a (sound) marker.
    """
    d = Path(run_dir)
    marker, problem = _load_marker(d)
    if marker is None:
        raise InputFileError(f"{d}: not a complete run ({problem or 'no ' + COMPLETE_MARKER})")
    return [rel for rel, why in _changed_files(d, marker, None) if why]


def _changed_files(
    d: Path, marker: dict[str, Any], hash_files: list[str] | None
) -> list[tuple[str, str]]:
    """(relative path, what changed) for the recorded files of a run: sizes always,
    SHA-256 for ``hash_files`` (all files when None)."""
    sizes = marker.get("sizes", {})
    out = []
    for rel, digest in marker.get("files", {}).items():
        p = d / rel
        if p.is_symlink() or not p.is_file():
            out.append((rel, "missing"))
        elif rel in sizes and p.stat().st_size != sizes[rel]:
            out.append((rel, "size changed"))
        elif (hash_files is None or rel in hash_files) and _sha256(p) != digest:
            out.append((rel, "content changed (SHA-256 differs)"))
    return out


def check_run(run: RunInfo, use: list[str] | None = None) -> str | None:
    """Verify a finished run on read; return what is wrong, or None.

    Sizes of every recorded file are compared always (cheap); SHA-256 only for
    the files in ``use`` (the ones a command is about to read; None: all).
    """
    if run.problem:
        return run.problem
    if not run.complete:
        return None
    bad = _changed_files(run.path, run.marker, use)
    if not bad:
        return None
    rel, why = bad[0]
    more = f" (and {len(bad) - 1} more)" if len(bad) > 1 else ""
    return f"{rel}: {why} since the run finished{more}"


def verified(room: Room | None, folder: Path, use: list[Path] | None = None) -> None:
    """Raise :class:`InputFileError` if ``folder`` is a damaged run of ``room``.

    ``use``: the files of the run a command reads (hashed); other files are
    checked by size only. Folders that are not runs of the room pass.
    """
    if room is None:
        return
    run = _run_for(room, folder)
    if run is None:
        return
    rels = None
    if use is not None:
        rels = []
        for f in use:
            with contextlib.suppress(ValueError):
                rels.append(Path(f).resolve().relative_to(run.path.resolve()).as_posix())
    problem = check_run(run, rels)
    if problem:
        raise InputFileError(f"{run.path}: damaged run: {problem}; measure or design again")


def _run_for(room: Room, folder: Path) -> RunInfo | None:
    try:
        target = Path(folder).resolve()
    except OSError:
        return None
    for k, sub in KINDS.items():
        if target.parent == (room.root / sub).resolve():
            return next((r for r in list_runs(room, k) if r.path.resolve() == target), None)
    return None


def latest_measurement(room: Room) -> Path:
    """The newest complete measurement run of the room.

    Raises
    ------
    InputFileError
        If the room has no complete measurement yet.
    """
    runs = list_runs(room, "measurement", include_incomplete=False)
    if not runs:
        raise InputFileError(
            f"{room.measurements_dir}: no complete measurement yet; run 'roomcorr measure' "
            "in the room folder, or give impulse-response files"
        )
    return runs[-1].path


def resolve_run(room: Room | None, ref: str | os.PathLike[str], kind: str = "measurement") -> Path:
    """A run id (``2026-01-31_201502Z``, or a unique prefix of one) or a path, as a Path.

    A bare name (no folder separator) is looked up among the room's runs
    first, so a run id always means a run inside the room folder; a run
    folder that is a link leading outside the room is refused. Anything else
    is taken as a path the user gave.
    """
    text = os.fspath(ref)
    bare = isinstance(text, str) and "/" not in text and os.sep not in text
    if room is not None and bare and text not in ("", ".", ".."):
        runs = list_runs(room, kind)
        matches = [r for r in runs if r.run_id == text] or [
            r for r in runs if r.run_id.startswith(text)
        ]
        if len(matches) > 1:
            raise InputFileError(
                f"{ref}: matches {len(matches)} {kind} runs; give more of the time stamp"
            )
        if len(matches) == 1:
            run = matches[0]
            if run.problem:
                raise InputFileError(f"{run.path}: damaged run: {run.problem}")
            return run.path
    p = Path(ref)
    if p.exists():
        return p
    raise InputFileError(f"{ref}: no such file, folder or {kind} run")


def measurement_files(folder: str | os.PathLike[str]) -> list[Path]:
    """The impulse-response WAVs of a measurement folder (or a single WAV), in position order.

    Top-level ``*.wav`` files, sorted with numbers compared as numbers
    (``pos2.wav`` before ``pos10.wav``).
    """
    p = Path(folder)
    if p.is_file():
        return [p]
    if not p.is_dir():
        raise InputFileError(f"{p}: no such measurement folder or file")
    files = [q for q in p.glob("*.wav") if q.is_file()]
    files.sort(key=lambda q: natural_key(q.name))
    if not files:
        raise InputFileError(f"{p}: holds no .wav impulse responses")
    return files


def add_measurement(
    room: Room, paths: list[str | os.PathLike[str]], note: str | None = None
) -> Path:
    """Copy impulse-response WAVs measured elsewhere into a new measurement run.

    The files are checked (:func:`roomcorr.audio_io.read_ir_set`) before
    anything is written; they are renamed ``pos1.wav``, ``pos2.wav``, ... in
    the given order and the original names are kept in the marker.
    """
    from roomcorr.audio_io import read_ir_set

    files: list[Path] = []
    for item in paths:
        files += measurement_files(item)
    read_ir_set(files)  # raises InputFileError naming a bad file
    info: dict[str, Any] = {"imported_from": [str(Path(f).resolve()) for f in files]}
    if note:
        info["note"] = note
    with new_run(room, "measurement", info) as run_dir:
        for i, f in enumerate(files, start=1):
            atomic_write_bytes(run_dir / f"pos{i}.wav", Path(f).read_bytes())
    return run_dir


# --------------------------------------------------------------------------- history


def _measurement_figures(run_dir: Path) -> dict[str, Any]:
    import numpy as np

    from roomcorr.analysis.compare import direct_arrival_s
    from roomcorr.audio_io import read_ir_set

    figs: dict[str, Any] = {}
    irs, fs, files = read_ir_set(measurement_files(run_dir))
    figs.update(
        positions=irs.shape[0],
        channels=irs.shape[1],
        sample_rate=fs,
        length_ms=round(irs.shape[2] / fs * 1e3, 1),
    )
    figs["arrival_ms"] = [
        round(
            float(np.mean([direct_arrival_s(irs[p, c], fs) for p in range(irs.shape[0])])) * 1e3, 3
        )
        for c in range(irs.shape[1])
    ]
    figs["peak_dbfs"] = round(float(20 * np.log10(np.max(np.abs(irs)) + 1e-30)), 1)
    record = run_dir / "measurement.json"
    if record.is_file():
        try:
            data = json.loads(record.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise InputFileError(f"{record}: damaged ({exc})") from None
        if not isinstance(data, dict):
            raise InputFileError(f"{record}: damaged (expected a JSON object)")
        figs.update(_record_figures(data))
    return figs


def _record_figures(data: dict[str, Any]) -> dict[str, Any]:
    """Quality figures from a ``measurement.json`` record (as ``roomcorr measure`` writes it)."""
    out: dict[str, Any] = {}
    if isinstance(data.get("loopback"), bool):
        out["loopback"] = data["loopback"]
    gates = []
    snr = []
    for pos in data.get("positions", []) or []:
        for ch in (pos or {}).get("channels", []) or []:
            gates += [g for g in ch.get("gates", []) if isinstance(g, dict)]
            v = (ch.get("figures") or {}).get("min_snr_db")
            if isinstance(v, int | float):
                snr.append(float(v))
    if gates:
        failed = sorted({str(g.get("name")) for g in gates if g.get("passed") is False})
        out["gates_passed"] = f"{len(gates) - sum(g.get('passed') is False for g in gates)}"
        out["gates_passed"] += f"/{len(gates)}"
        if failed:
            out["gates_failed"] = failed
    if snr:
        out["min_snr_db"] = round(min(snr), 1)
    return out


def _design_figures(run_dir: Path) -> dict[str, Any]:
    from roomcorr.deliver.export import read_manifest

    man = read_manifest(run_dir)  # OutputError for a damaged manifest
    files = man["files"]
    firs = [e for e in files if e.get("kind") == "fir"]
    figs: dict[str, Any] = {"pre_gain_db": _number(man.get("pre_gain_db")), "files": len(files)}
    if firs:
        figs["sample_rates"] = sorted({int(e["sample_rate"]) for e in firs if "sample_rate" in e})
        for key in ("peak_gain_db", "worst_case_gain_db", "max_boost_db"):
            vals = [_number(e[key]) for e in firs if key in e]
            if None in vals:
                raise OutputError(f"{run_dir / 'manifest.json'}: {key} is not a finite number")
            if vals:
                figs[key] = max(vals)
    bands = [c.get("band_hz") for c in man.get("channels", []) if isinstance(c, dict)]
    if bands and all(isinstance(b, list) and len(b) == 2 for b in bands):
        figs["band_hz"] = [min(float(b[0]) for b in bands), max(float(b[1]) for b in bands)]
    design = (man.get("settings") or {}).get("design")
    target = design.get("target") if isinstance(design, dict) else None
    if target:
        figs["target"] = str(target)
    return figs


def _number(v: Any) -> float | None:
    """A finite float from a JSON value, else None."""
    import math

    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def history(room: Room) -> list[dict[str, Any]]:
    """Every run of the room, oldest first, with its key figures.

    Returns
    -------
    list of dict
        ``kind, run_id, path, status ("complete", "incomplete" or "running"),
        started_utc, finished_utc, source`` (designs: the measurement used)
        and ``figures`` (measurements: positions, channels, sample_rate,
        length_ms, arrival_ms per channel, peak_dbfs; designs: pre_gain_db,
        peak/worst-case gain, boost, rates, band, target).
    """
    runs = list_runs(room)
    busy = is_locked(room)
    newest_incomplete = next((r for r in reversed(runs) if not r.complete), None)
    out = []
    for r in runs:
        status = "complete" if r.complete else "incomplete"
        if not r.complete and busy and r is newest_incomplete:
            status = "running"
        entry: dict[str, Any] = {
            "kind": r.kind,
            "run_id": r.run_id,
            "path": str(r.path),
            "status": status,
            "started_utc": r.marker.get("started_utc"),
            "finished_utc": r.marker.get("finished_utc"),
        }
        info = r.marker.get("info", {})
        if r.kind == "design":
            entry["source"] = design_source(r) if r.complete else info.get("measurement")
        if info.get("note"):
            entry["note"] = info["note"]
        problem = r.problem
        if r.complete:
            # Sizes of every file; SHA-256 of all but the raw recordings (large, and
            # read by no command after the run).
            use = [rel for rel in r.marker.get("files", {}) if not rel.startswith("raw/")]
            problem = check_run(r, use)
        if problem is None and r.complete:
            try:
                entry["figures"] = (
                    _measurement_figures(r.path)
                    if r.kind == "measurement"
                    else _design_figures(r.path)
                )
            except (RoomcorrError, OSError, ValueError, TypeError, KeyError, AttributeError) as e:
                problem = " ".join(str(e).split()) or type(e).__name__
        if problem is not None:
            entry["status"] = "damaged"
            entry["figures"] = {"problem": problem}
        out.append(entry)
    return out


# --------------------------------------------------------------------------- compare


def _channel_names(folder: Path, n: int) -> list[str]:
    record = folder / "measurement.json"
    if folder.is_dir() and record.is_file():
        with contextlib.suppress(OSError, json.JSONDecodeError, AttributeError):
            names = json.loads(record.read_text(encoding="utf-8")).get("channel_names")
            if isinstance(names, list) and len(names) == n:
                return [str(x) for x in names]
    from roomcorr.pipeline import default_channel_names

    return default_channel_names(n)


def _run_id_of(path: Path, room: Room | None) -> str | None:
    if room is None:
        return None
    with contextlib.suppress(ValueError):
        rel = path.resolve().relative_to(room.measurements_dir.resolve())
        return rel.parts[0] if rel.parts else None
    return None


def design_source(run: RunInfo) -> str | None:
    """Run id of the measurement a design run was made from, if recorded.

    Looks at ``info["measurement"]`` of the run's marker (a run id or path),
    then at the ``measurements`` file list of its ``manifest.json``.
    """
    ref = run.marker.get("info", {}).get("measurement")
    if ref:
        return Path(str(ref)).name
    try:
        man = json.loads((run.path / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None
    files = man.get("measurements") if isinstance(man, dict) else None
    if isinstance(files, list) and files:
        parents = {Path(str(f)).parent.name for f in files}
        if len(parents) == 1:
            return parents.pop()
    return None


def _design_for(room: Room, meas_id: str | None, before: Path) -> Path | None:
    """The newest complete design made from measurement ``meas_id`` (else the newest
    design finished before run folder ``before`` was started)."""
    designs = list_runs(room, "design", include_incomplete=False)
    if meas_id is not None:
        own = [d for d in designs if design_source(d) == meas_id]
        if own:
            return own[-1].path
    key = _run_sort_key(before)
    older = [d for d in designs if _run_sort_key(d.path) < key]
    return older[-1].path if older else None


def _contain_design_inputs(design_dir: Path, manifest: dict[str, Any], settings: Any) -> None:
    """Refuse to read a calibration or target file a design's manifest names unless it lies
    inside the design's room folder and matches the SHA-256 the manifest recorded for it."""
    from roomcorr.deliver.export import sha256_of
    from roomcorr.settings import find_preset

    room = find_room(design_dir)
    recorded = {
        str(e.get("role")): e
        for e in manifest.get("inputs", []) or []
        if isinstance(e, dict) and isinstance(e.get("sha256"), str)
    }
    for role in ("calibration", "target"):
        spec = getattr(settings.design, role)
        if not spec or (role == "target" and find_preset(str(spec)) is not None):
            continue
        p = Path(str(spec))
        where = f"{design_dir / 'manifest.json'}: {role} {spec}"
        if room is None or is_link_or_outside(p.resolve(), room.root):
            raise OutputError(f"{where}: lies outside the room folder; not read")
        entry = recorded.get(role)
        if entry is None or not p.is_file() or sha256_of(p) != entry["sha256"]:
            raise OutputError(f"{where}: missing or changed since the design (SHA-256)")


def _fit_check(design_dir: Path, irs_b, fs_b: int) -> dict[str, Any]:
    """Old filters (from ``design_dir``) vs a fresh design on the new measurement."""
    import numpy as np

    from roomcorr.analysis.compare import filter_fit, fir_response_db
    from roomcorr.deliver.export import load_design_curves, read_manifest
    from roomcorr.pipeline import run_design
    from roomcorr.settings import settings_from_dict

    room = find_room(design_dir)
    verified(room, design_dir, [design_dir / "manifest.json", design_dir / "design.npz"])
    old = load_design_curves(design_dir)
    manifest = read_manifest(design_dir)
    settings = settings_from_dict(manifest.get("settings", {}), source=str(design_dir))
    _contain_design_inputs(design_dir, manifest, settings)
    rates = sorted(old["firs"])
    if not rates:
        return {"available": False, "reason": f"{design_dir}: holds no FIR filters"}
    rate = fs_b if fs_b in old["firs"] else min(rates, key=lambda r: abs(r - fs_b))
    settings.design.sample_rates = (rate,)
    fresh = run_design(irs_b, fs_b, settings)
    old_firs = old["firs"][rate]
    if old_firs.shape[0] != len(fresh.channels):
        return {
            "available": False,
            "reason": f"{design_dir}: {old_firs.shape[0]} channels, new measurement has "
            f"{len(fresh.channels)}",
        }
    freq = fresh.freq_hz
    per_channel = []
    for ch in fresh.channels:
        old_db = fir_response_db(old_firs[ch.index], rate, freq)
        new_db = fir_response_db(fresh.firs[rate][ch.index], rate, freq)
        fit = filter_fit(freq, ch.average_db, old_db, new_db, ch.target_db, ch.band_hz)
        fit.update(index=ch.index, name=ch.name, band_hz=[round(x, 1) for x in ch.band_hz])
        per_channel.append(fit)
    return {
        "available": True,
        "design": str(design_dir),
        "sample_rate": rate,
        "still_fit": bool(np.all([c["still_fit"] for c in per_channel])),
        "channels": per_channel,
    }


def _resolve_set(room: Room | None, ref: Any) -> tuple[Path, list[Path]]:
    """(the measurement's folder or first file, its IR files) for a run id, folder, WAV
    file, comma-separated WAV files or a list of them."""
    if isinstance(ref, str) and "," in ref and not Path(ref).exists():
        ref = [x.strip() for x in ref.split(",") if x.strip()]
    if isinstance(ref, list | tuple):
        if not ref:
            raise InputFileError("compare: a measurement was given as commas only; name WAV files")
        files = [f for item in ref for f in measurement_files(item)]
        for f in files:
            verified(room, f.parent, [f])
        return Path(ref[0]), files
    p = resolve_run(room, ref)
    files = measurement_files(p)
    verified(room, p, files)
    return p, files


def compare_measurements(
    a: str | os.PathLike[str] | list | None = None,
    b: str | os.PathLike[str] | list | None = None,
    room: Room | None = None,
    temperature_c: float | None = None,
    fit_check: bool = True,
    with_curves: bool = False,
) -> dict[str, Any]:
    """Compare two measurements (folders, WAV files or run ids of ``room``).

    Parameters
    ----------
    a, b : path-like, str or list, optional
        Before and after: a run id, a measurement folder, a WAV file, several
        WAV files (a list, or one string with commas; one file per position).
        Default: the room's last two complete measurements.
    room : Room, optional
        Room for run ids, settings (temperature) and the old design.
    temperature_c : float, optional
        Overrides the settings' ``design.temperature_c`` (default 20 °C).
    fit_check : bool
        Also judge whether the design made from ``a`` still fits ``b``.

    Returns
    -------
    dict
        The result of :func:`roomcorr.analysis.compare.compare_sets` plus
        ``before``, ``after``, ``speed_of_sound_formula`` and ``filter_fit``.
    """
    from roomcorr.analysis.compare import compare_sets
    from roomcorr.audio_io import read_ir_set

    if a is None or b is None:
        if room is None:
            raise InputFileError("compare: give two measurements (folders or IR files)")
        runs = [
            r
            for r in list_runs(room, "measurement", include_incomplete=False)
            if check_run(r, []) is None  # damaged runs are skipped (history names them)
        ]
        if len(runs) < 2:
            raise InputFileError(
                f"{room.measurements_dir}: {len(runs)} complete measurement(s); compare needs "
                "two (or give two folders)"
            )
        (pa, files_a), (pb, files_b) = (
            _resolve_set(room, runs[-2].path),
            _resolve_set(room, runs[-1].path),
        )
    else:
        (pa, files_a), (pb, files_b) = _resolve_set(room, a), _resolve_set(room, b)
    if temperature_c is None:
        temperature_c = load_room_settings(room).design.temperature_c if room else 20.0
    irs_a, fs_a, _ = read_ir_set(files_a)
    irs_b, fs_b, _ = read_ir_set(files_b)
    if irs_a.shape[1] != irs_b.shape[1]:
        raise InputFileError(
            f"{pb}: {irs_b.shape[1]} loudspeaker channels, but {pa} has {irs_a.shape[1]}; "
            "compare measurements of the same loudspeakers"
        )
    names = _channel_names(pb if pb.is_dir() else pb.parent, irs_b.shape[1])
    res = compare_sets(irs_a, fs_a, irs_b, fs_b, temperature_c, names, with_curves=with_curves)
    res["before"] = str(pa)
    res["after"] = str(pb)
    res["before_files"] = [str(f) for f in files_a]
    res["after_files"] = [str(f) for f in files_b]
    res["speed_of_sound_formula"] = (
        "c = 343.2 * sqrt((t + 273.15) / 293.15) m/s (ISO 9613-1, annex A)"
    )
    fit: dict[str, Any] = {"available": False, "reason": "not asked for"}
    if fit_check:
        design = _design_for(room, _run_id_of(pa, room), pb) if room is not None else None
        if design is None:
            fit = {"available": False, "reason": "no earlier design found in the room folder"}
        else:
            try:
                fit = _fit_check(design, irs_b, fs_b)
            except RoomcorrError as exc:
                fit = {"available": False, "reason": " ".join(str(exc).split())}
    res["filter_fit"] = fit
    return res


# --------------------------------------------------------------------------- text


def _fmt(v: Any, spec: str = "+.2f", unit: str = "") -> str:
    return "-" if v is None else f"{v:{spec}}{unit}"


def format_history(entries: list[dict[str, Any]], name: str = "") -> list[str]:
    """Lines for ``roomcorr history`` (one block per run, oldest first)."""
    lines = [f"Room {name}: {len(entries)} run(s)" if name else f"{len(entries)} run(s)"]
    if not entries:
        lines.append("  nothing measured yet; run 'roomcorr measure' inside the room folder")
    for e in entries:
        head = f"  {e['run_id']}  {e['kind']:<11}  {e['status']}"
        if e.get("source"):
            head += f"  from measurement {Path(str(e['source'])).name}"
        if e.get("note"):
            head += f"  ({e['note']})"
        lines.append(head)
        f = e.get("figures") or {}
        if f.get("problem"):
            lines.append(f"      problem: {f['problem']}")
        elif e["kind"] == "measurement" and f:
            arr = ", ".join(f"{a:.2f}" for a in f.get("arrival_ms", []))
            text = (
                f"      {f.get('positions')} position(s) x {f.get('channels')} channel(s), "
                f"{f.get('sample_rate')} Hz, {f.get('length_ms')} ms; arrival {arr} ms; "
                f"peak {f.get('peak_dbfs')} dBFS"
            )
            lines.append(text)
            extra = []
            if "gates_passed" in f:
                extra.append(f"quality gates passed {f['gates_passed']}")
            if f.get("gates_failed"):
                extra.append("failed: " + ", ".join(f["gates_failed"]))
            if "min_snr_db" in f:
                extra.append(f"lowest SNR {f['min_snr_db']} dB")
            if f.get("loopback") is False:
                extra.append("no loopback (arrival includes system latency)")
            if extra:
                lines.append("      " + "; ".join(extra))
        elif e["kind"] == "design" and f:
            band = f.get("band_hz")
            band_txt = f"{band[0]:.0f}-{band[1]:.0f} Hz" if band else "-"
            lines.append(
                f"      target {f.get('target', '-')}, band {band_txt}, rates "
                + ",".join(str(r) for r in f.get("sample_rates", []))
            )
            lines.append(
                f"      pre-gain {_fmt(f.get('pre_gain_db'), unit=' dB')}, peak gain "
                f"{_fmt(f.get('peak_gain_db'), unit=' dB')}, worst case "
                f"{_fmt(f.get('worst_case_gain_db'), unit=' dB')}, boost up to "
                f"{_fmt(f.get('max_boost_db'), '.1f', ' dB')}"
            )
        elif e["status"] == "incomplete":
            lines.append("      interrupted before it finished; ignored by other commands")
    return lines


def format_comparison(res: dict[str, Any]) -> list[str]:
    """Lines for ``roomcorr compare`` from :func:`compare_measurements`' result."""
    from roomcorr.analysis.bands import nominal_label

    lines = [
        f"before: {res['before']}",
        f"after:  {res['after']}",
        f"speed of sound {res['speed_of_sound_m_s']:.1f} m/s at {res['temperature_c']:g} °C "
        f"({res['speed_of_sound_formula']})",
    ]
    if not res["paired_positions"]:
        lines.append("positions differ in number or sample rate: mean arrivals compared")
    for ch in res["channels"]:
        lines.append("")
        lines.append(f"{ch['name']}:")
        lines.append(
            f"  arrival {ch['arrival_before_ms']:.3f} ms -> {ch['arrival_after_ms']:.3f} ms: "
            f"{ch['arrival_change_ms']:+.3f} ms, distance {ch['distance_change_m']:+.3f} m"
            + (
                " (per position "
                + ", ".join(f"{d:+.3f}" for d in ch["position_distance_change_m"])
                + " m)"
                if len(ch["position_distance_change_m"]) > 1
                else ""
            )
        )
        lines.append(
            f"  level {ch['level_change_db']:+.2f} dB (100 Hz-10 kHz), direct sound "
            f"{ch['direct_level_change_db']:+.2f} dB"
        )
        if ch["polarity_inverted"]:
            lines.append("  POLARITY INVERTED: check the loudspeaker's wiring (+/- swapped)")
        bands = ch["lf_band_change_db"]
        if bands:
            lines.append("  low-frequency change per 1/3 octave (Hz: dB):")
            cells = [f"{nominal_label(b['centre_hz'])}: {b['change_db']:+.1f}" for b in bands]
            for i in range(0, len(cells), 7):
                lines.append("    " + "  ".join(f"{c:<12}" for c in cells[i : i + 7]).rstrip())
        changed = [e for e in ch["extrema"] if e["status"] != "unchanged"]
        same = len(ch["extrema"]) - len(changed)
        if changed:
            lines.append("  peaks and dips (relative to the 1-octave trend):")
        for e in changed:
            if e["status"] == "appeared":
                lines.append(
                    f"    {e['kind']} appeared at {e['freq_after_hz']:.0f} Hz "
                    f"({e['height_after_db']:+.1f} dB)"
                )
            elif e["status"] == "vanished":
                lines.append(
                    f"    {e['kind']} at {e['freq_before_hz']:.0f} Hz vanished "
                    f"(was {e['height_before_db']:+.1f} dB)"
                )
            else:
                lines.append(
                    f"    {e['kind']} {e['status']}: {e['freq_before_hz']:.0f} Hz "
                    f"{e['height_before_db']:+.1f} dB -> {e['freq_after_hz']:.0f} Hz "
                    f"{e['height_after_db']:+.1f} dB"
                )
        lines.append(f"  {same} peak(s)/dip(s) unchanged" if same else "  no peak or dip unchanged")
    fit = res.get("filter_fit", {})
    lines.append("")
    if not fit.get("available"):
        lines.append(f"filter check: not done ({fit.get('reason', 'no design')})")
        return lines
    verdict = (
        "the existing filters are still fit for use"
        if fit["still_fit"]
        else "design new filters: the existing ones no longer fit"
    )
    lines.append(f"filter check against {fit['design']} ({fit['sample_rate']} Hz): {verdict}")
    for c in fit["channels"]:
        lines.append(
            f"  {c['name']}: deviation from target with the old filters {c['old_rms_db']:.2f} dB "
            f"RMS (max {c['old_max_db']:.1f}), with a fresh design {c['fresh_rms_db']:.2f} dB "
            f"RMS (max {c['fresh_max_db']:.1f}) -> {'fit' if c['still_fit'] else 'refit'}"
        )
    return lines


def comparison_png(res: dict[str, Any]) -> bytes:
    """PNG of both responses overlaid per channel, for ``roomcorr compare --plot``.

    ``res`` must come from :func:`compare_measurements` with ``with_curves=True``.
    Each channel gets a full-range panel (1/24-octave, 20 Hz to 20 kHz) and a
    low-frequency panel (20 to 500 Hz) with the peaks and dips that appeared,
    moved or vanished marked.
    """
    import numpy as np

    from roomcorr.report.figures import FREQ_LABELS, FREQ_TICKS, new_figure, png_bytes

    chans = res["channels"]
    if not chans or "curves" not in chans[0]:
        raise ValueError("comparison_png needs compare_measurements(..., with_curves=True)")
    fig = new_figure(10.0, 3.2 * len(chans), hspace=0.45, wspace=0.2, bottom=0.08, top=0.93)
    marks = {
        "appeared": ("v", "#c0392b"),
        "vanished": ("x", "#7f8c8d"),
        "moved": ("o", "#d35400"),
        "changed": ("s", "#8e44ad"),
    }
    for i, ch in enumerate(chans):
        c = ch["curves"]
        f, before, after = np.asarray(c["freq_hz"]), c["before_db"], c["after_db"]
        ref = float(np.mean(before[(f >= 100) & (f <= 10000)]))
        for j, (lo, hi) in enumerate(((20.0, 20000.0), (20.0, 500.0))):
            ax = fig.add_subplot(len(chans), 2, 2 * i + j + 1)
            m = (f >= lo) & (f <= hi)
            ax.semilogx(f[m], before[m] - ref, color="#2c6fbb", lw=1.1, label="before")
            ax.semilogx(f[m], after[m] - ref, color="#e67e22", lw=1.1, label="after")
            ticks = [t for t in FREQ_TICKS if lo <= t <= hi]
            ax.set_xticks(ticks, [FREQ_LABELS[FREQ_TICKS.index(t)] for t in ticks])
            ax.minorticks_off()
            ax.set_xlim(lo, hi)
            ax.grid(True, color="#dde3ea", lw=0.7)
            ax.set_ylabel("dB")
            if j == 1:
                for e in ch["extrema"]:
                    if e["status"] in marks:
                        fx = e["freq_after_hz"] or e["freq_before_hz"]
                        curve = after if e["freq_after_hz"] else before
                        y = float(np.interp(np.log2(fx), np.log2(f), curve)) - ref
                        sym, col = marks[e["status"]]
                        ax.plot([fx], [y], sym, color=col, ms=6, label=e["status"])
                handles, labels = ax.get_legend_handles_labels()
                seen = dict(zip(labels, handles, strict=True))
                ax.legend(seen.values(), seen.keys(), fontsize=7, loc="best", ncol=3)
                ax.set_title(f"{ch['name']}: below 500 Hz", fontsize=9)
            else:
                ax.legend(fontsize=7, loc="lower left")
                ax.set_title(
                    f"{ch['name']}: distance {ch['distance_change_m']:+.3f} m, "
                    f"level {ch['level_change_db']:+.1f} dB",
                    fontsize=9,
                )
    return png_bytes(fig)


def write_comparison_plot(res: dict[str, Any], path: str | os.PathLike[str]) -> Path:
    """Write :func:`comparison_png` to ``path`` atomically; return the path."""
    p = Path(path)
    if p.suffix.lower() != ".png":
        raise OutputError(f"--plot {path}: give a file name ending in .png")
    if not p.parent.is_dir():
        raise OutputError(f"--plot {path}: folder {p.parent} does not exist")
    return atomic_write_bytes(p, comparison_png(res))
