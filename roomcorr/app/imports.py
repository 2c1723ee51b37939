"""Bringing impulse responses from elsewhere into a room: ``roomcorr import`` and the app's
Import page make a measurement run of existing impulse-response WAVs.

The files are checked as ``design`` checks them (one sample rate, the same channels,
finite samples, each channel a plausible impulse response) before anything is
written; then they are copied and hashed into a new measurement run through
:func:`roomcorr.rooms.add_measurement`, with a ``measurement.json`` that records the
channel names and the timing basis (``unknown`` unless stated).
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Any

from roomcorr.audio_io import expand_ir_paths, read_ir_set
from roomcorr.deliver.atomic import is_link_or_outside
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
