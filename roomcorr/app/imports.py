"""Bringing impulse responses from elsewhere into a room: ``roomcorr import`` and the app's
Import page make a measurement run of existing impulse-response WAVs.

The files are checked as ``design`` checks them (one sample rate, the same channels,
finite samples, each channel a plausible impulse response) before anything is
written; then they are copied and hashed into a new measurement run through
:func:`roomcorr.rooms.add_measurement`, with a ``measurement.json`` that records the
channel names and the timing basis (``unknown`` unless stated).
"""

from __future__ import annotations

import base64
import binascii
import os
import re
from pathlib import Path
from typing import Any

from roomcorr.audio_io import expand_ir_paths, read_ir_set
from roomcorr.deliver.atomic import atomic_write_bytes, is_link_or_outside
from roomcorr.errors import InputFileError, SettingsError
from roomcorr.measure.session import RECORD_VERSION
from roomcorr.measure.timing import timing_basis
from roomcorr.pipeline import default_channel_names
from roomcorr.rooms import Room, add_measurement, check_kind_folder

#: A channel name: what ``measure --names`` accepts as well (letters, digits, - and _).
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,31}$")
#: ``--timing-basis`` values (the acoustic reference as ``reference:CHANNEL``).
BASIS_OPTIONS = ("unknown", "loopback", "single-device", "reference:CHANNEL")


def parse_names(text: str | list[str] | None, n_channels: int, where: str) -> list[str]:
    """Channel names from ``--names a,b,c`` (or a list), checked: count, form, no clash."""
    if text is None or text == "" or text == []:
        return default_channel_names(n_channels)
    names = [x.strip() for x in text.split(",")] if isinstance(text, str) else list(text)
    if len(names) != n_channels:
        raise SettingsError(
            f"--names {','.join(names)}: {len(names)} name(s) for {n_channels} channel(s) "
            f"in {where}; give one name per channel"
        )
    for nm in names:
        if not isinstance(nm, str) or not _NAME.match(nm):
            raise SettingsError(
                f"--names: {nm!r} is not a channel name (letters, digits, - and _, up to 32)"
            )
    clash = sorted({nm for nm in names if names.count(nm) > 1})
    if clash:
        raise SettingsError(f"--names: {', '.join(clash)} given twice; names must differ")
    return names


def parse_basis(text: str | None, names: list[str]) -> dict[str, Any]:
    """The stored ``timing_basis`` from ``--timing-basis`` (default ``unknown``).

    ``reference:CHANNEL`` (a channel name or its 1-based number) says the responses'
    time origin was one loudspeaker's arrival, as with the acoustic timing reference.
    """
    value = (text or "unknown").strip()
    if value in ("unknown", "loopback"):
        return {"kind": value}
    if value == "single-device":
        return {"kind": "single device", "device": "stated on import"}
    if value.startswith("reference:"):
        who = value.split(":", 1)[1]
        if who in names:
            return {"kind": "acoustic reference", "reference_output": names.index(who) + 1}
        if who.isdigit() and 1 <= int(who) <= len(names):
            return {"kind": "acoustic reference", "reference_output": int(who)}
        raise SettingsError(
            f"--timing-basis {value}: no channel {who!r}; give one of {', '.join(names)} "
            f"or 1 to {len(names)}"
        )
    raise SettingsError(f"--timing-basis {value}: expected one of {', '.join(BASIS_OPTIONS)}")


def _check_sources(room: Room, paths: list[str | os.PathLike[str]]) -> list[Path]:
    """The WAV files to import, refused when a name clashes or a link leads out of the room."""
    if not paths:
        raise InputFileError("import: name the impulse-response WAV files to bring in")
    files = expand_ir_paths([str(p) for p in paths])
    roots = {room.root.resolve(), Path(os.path.abspath(room.root))}
    seen: dict[str, Path] = {}
    for f in files:
        absolute = Path(os.path.abspath(f))
        inside = any(r in absolute.parents for r in roots)
        if inside and is_link_or_outside(absolute, room.root):
            raise InputFileError(
                f"{f}: a symbolic link, or a link leading out of the room folder; copy the "
                "file itself in"
            )
        if f.suffix.lower() != ".wav" or not f.is_file():
            raise InputFileError(f"{f}: not a .wav file; import takes impulse-response WAVs")
        key = f.name.lower()
        if key in seen:
            raise InputFileError(
                f"{f}: name clash with {seen[key]}; the positions would be ambiguous, so "
                "rename one of them"
            )
        seen[key] = f
    return files


def import_measurement(
    room: Room,
    paths: list[str | os.PathLike[str]],
    names: str | list[str] | None = None,
    basis: str | None = None,
    note: str | None = None,
) -> dict[str, Any]:
    """Make a measurement run of ``room`` from impulse-response WAVs (module docstring).

    Parameters
    ----------
    room : Room
    paths : list of path-like
        WAV files (one per microphone position, channels = loudspeakers) or folders
        of them, in position order.
    names : str or list of str, optional
        Channel names (``"left,right"``); default ``left, right`` / ``ch1``...
    basis : str, optional
        ``--timing-basis`` (:data:`BASIS_OPTIONS`); default ``unknown``.
    note : str, optional
        Kept in the run's marker and shown by ``history``.

    Returns
    -------
    dict
        ``run_id``, ``run`` (``measurements/ID``), ``positions``, ``channels``,
        ``sample_rate``, ``names``, ``timing_basis`` (as
        :func:`roomcorr.measure.timing.timing_basis` reads it back) and ``files``
        (the sources, in position order).

    Raises
    ------
    RoomcorrError
        Before anything is written: not impulse responses, mixed rates or channel
        counts, a link leading out of the room, a name clash, bad names or basis.
    """
    check_kind_folder(room, "measurement")
    files = _check_sources(room, paths)
    irs, fs, files = read_ir_set(files, require_impulse=True)  # as design checks them
    chan_names = parse_names(names, irs.shape[1], str(files[0]))
    stored = parse_basis(basis, chan_names)
    record = {
        "roomcorr_measurement": RECORD_VERSION,
        "imported": True,
        "imported_files": [f.name for f in files],
        "sample_rate": fs,
        "settings": {"names": chan_names, "outputs": list(range(1, len(chan_names) + 1))},
        "channel_names": chan_names,
        "timing_basis": stored,
        "positions": [{"position": i, "file": f"pos{i}.wav"} for i in range(1, len(files) + 1)],
    }
    run = add_measurement(room, files, note=note, record=record)
    return {
        "run_id": run.name,
        "run": run.relative_to(room.root).as_posix(),
        "positions": irs.shape[0],
        "channels": irs.shape[1],
        "sample_rate": fs,
        "names": chan_names,
        "timing_basis": timing_basis(record),
        "files": [str(f) for f in files],
    }


# --------------------------------------------------------------------------- the browser app
#: Largest import request the app accepts (bytes of JSON, base64 files included).
MAX_IMPORT_BYTES = 64 * 1024 * 1024
#: Most files one import may carry, and how many candidates the app lists.
MAX_IMPORT_FILES = 64
_UPLOAD_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}\.[wW][aA][vV]$")
_SKIP = {"measurements", "designs", "targets"}


def import_candidates(room: Room) -> list[str]:
    """WAV files inside the room folder (outside its runs) the app offers to import.

    Paths relative to the room, at most two folders deep, no links, sorted;
    at most :data:`MAX_IMPORT_FILES`.
    """
    out: list[str] = []
    for depth in ("*.wav", "*/*.wav", "*/*/*.wav"):
        for p in sorted(room.root.glob(depth)):
            rel = p.relative_to(room.root)
            if rel.parts[0] in _SKIP or any(x.startswith(".") for x in rel.parts):
                continue
            if is_link_or_outside(p, room.root) or not p.is_file():
                continue
            out.append(rel.as_posix())
    return sorted(out)[:MAX_IMPORT_FILES]


def _room_file(room: Room, rel: Any) -> Path:
    """A file chosen in the app: relative to the room, inside it, no links on the way."""
    if not isinstance(rel, str) or not rel or len(rel) > 300:
        raise InputFileError("import: each chosen file is a path inside the room folder")
    p = Path(rel)
    if p.is_absolute() or ".." in p.parts or p.parts[0] in _SKIP:
        raise InputFileError(f"{rel}: not a file of the room folder outside its runs")
    full = room.root / p
    if is_link_or_outside(full, room.root) or any(
        q.is_symlink() for q in [full, *full.parents] if room.root in q.parents
    ):
        raise InputFileError(f"{rel}: a link; links leading out of the room folder are refused")
    if not full.is_file():
        raise InputFileError(f"{rel}: no such file in the room folder")
    return full


def import_from_app(room: Room, request: dict[str, Any], workdir: Path) -> dict[str, Any]:
    """The app's import: chosen room files (``paths``) or uploaded ones (``files``:
    ``{name, data}`` with base64 data), plus ``names``, ``timing_basis`` and ``note``.

    Uploads are written (atomically) into ``workdir``, a fresh folder outside the
    room, then imported like files named on the command line.
    """
    paths = request.get("paths")
    uploads = request.get("files")
    if bool(paths) == bool(uploads):
        raise InputFileError("import: choose files of the room folder or upload files (one of)")
    items = paths if paths else uploads
    if not isinstance(items, list) or len(items) > MAX_IMPORT_FILES:
        raise InputFileError(f"import: give a list of at most {MAX_IMPORT_FILES} files")
    files: list[Path] = []
    if paths:
        files = [_room_file(room, rel) for rel in items]
    else:
        for up in items:
            name = up.get("name") if isinstance(up, dict) else None
            data = up.get("data") if isinstance(up, dict) else None
            if not isinstance(name, str) or not _UPLOAD_NAME.match(name):
                raise InputFileError(
                    f"import: {str(name)[:64]!r} is not a WAV file name (letters, digits, . _ -)"
                )
            if not isinstance(data, str):
                raise InputFileError(f"{name}: no file content")
            try:
                raw = base64.b64decode(data, validate=True)
            except (binascii.Error, ValueError):
                raise InputFileError(f"{name}: content is not base64") from None
            dest = workdir / name
            if dest.exists():
                raise InputFileError(f"{name}: name clash with another uploaded file")
            atomic_write_bytes(dest, raw)
            files.append(dest)
    text = {k: request.get(k) for k in ("names", "timing_basis", "note")}
    for k, v in text.items():
        if v is not None and (not isinstance(v, str) or len(v) > 200):
            raise InputFileError(f"import: {k} must be a short text")
    return import_measurement(room, files, text["names"], text["timing_basis"], text["note"])
