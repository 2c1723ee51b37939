"""Runs of a room folder: creating them, their ``complete.json`` markers, listing,
verifying on read, and finding the files of a measurement.

Runs are never overwritten or deleted, and finished runs are read-only to
roomcorr. A run folder without ``complete.json`` was interrupted (or is still
being written) and is never taken as a measurement or design by later
commands. A finished run's ``complete.json`` lists every file with its size and
SHA-256; on read, a file missing, changed or not listed (a report's files
excepted), or a record without those lists, makes the run damaged (sizes of
every file always, SHA-256 of the files a command uses); a damaged
run is shown as damaged by ``history`` and refused with one line elsewhere.
``measurements/`` and ``designs/`` must be plain folders inside the room. Every
file goes through :mod:`roomcorr.deliver.atomic`.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from roomcorr import __version__
from roomcorr.audio_io import natural_key, read_ir_set
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import (
    OLD_PREFIX,
    TMP_PREFIX,
    PathEscapeError,
    atomic_write_bytes,
    atomic_write_text,
    clean_stale,
    contained,
    fsync_dir,
    is_link_or_outside,
    sha256_of,
)
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.rooms.folder import (
    COMPLETE_MARKER,
    KINDS,
    SETTINGS_SNAPSHOT,
    Room,
    iso_utc,
    room_folder,
    utc_now,
)
from roomcorr.rooms.lock import command_line, room_lock

#: A run folder's name: its UTC time stamp, then ``_2``, ``_3``... for runs of the same second.
RUN_ID = re.compile(r"^(\d{4}-\d{2}-\d{2}_\d{6}Z)(?:_(\d+))?$")
#: What a run folder's name may be when it is named from outside (a request, a
#: command line): a plain folder name, short, without NUL, separators or a leading dot.
RUN_NAME = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.-]{0,99}$")


def _version() -> str:
    return str(__version__)


@dataclass
class RunInfo:
    """One run folder of a room."""

    kind: str
    run_id: str
    path: Path
    complete: bool
    marker: dict[str, Any]
    problem: str | None = None  # why the run is damaged (then ``complete`` is False)


#: Files a report adds beside a finished run (``roomcorr report RUN``): the run's record
#: does not list them (the run is sealed), and no command reads them as an input.
REPORT_FILES = re.compile(r"^(report\.html|report/[^/]+\.png)$")


def _staging(rel: Path) -> bool:
    return any(part.startswith((TMP_PREFIX, OLD_PREFIX)) for part in rel.parts)


def _run_files(run_dir: Path) -> list[Path]:
    """Every file and link of a run folder but its marker and staging leftovers."""
    return sorted(
        p
        for p in run_dir.rglob("*")
        if (p.is_file() or p.is_symlink())
        and p.name != COMPLETE_MARKER
        and not _staging(p.relative_to(run_dir))
    )


def _unlisted_files(run_dir: Path, marker: dict[str, Any]) -> list[str]:
    """Files in a finished run that its record does not list (a report's files excepted)."""
    listed = marker.get("files", {})
    return [
        rel
        for rel in (p.relative_to(run_dir).as_posix() for p in _run_files(run_dir))
        if rel not in listed and not REPORT_FILES.match(rel)
    ]


def _make_run_dir(room: Room, kind: str) -> Path:
    """A new run folder; the name is unique across both kinds so that runs started in the
    same second keep their order (``..._2``, ``..._3``)."""
    stamp = utc_now().strftime("%Y-%m-%d_%H%M%SZ")
    parent = room_folder(room, KINDS[kind], create=True)
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
    """Refuse a ``measurements/`` or ``designs/`` folder that is a link or leads outside
    (:func:`roomcorr.rooms.folder.room_folder`)."""
    room_folder(room, KINDS[kind])


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
        started = utc_now()
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
            snapshot_sha = sha256_of(run_dir / SETTINGS_SNAPSHOT)
        found = _run_files(run_dir)
        files = {p.relative_to(run_dir).as_posix(): sha256_of(p) for p in found}
        sizes = {p.relative_to(run_dir).as_posix(): p.stat().st_size for p in found}
        marker = {
            "kind": kind,
            "run_id": run_dir.name,
            "complete": True,
            "started_utc": iso_utc(started),
            "finished_utc": iso_utc(utc_now()),
            "roomcorr_version": _version(),
            "room_settings_sha256": snapshot_sha,
            "command": command_line(),
            "info": dict(info or {}),
            "files": files,
            "sizes": sizes,
        }
        fsync_dir(run_dir)
        atomic_write_text(run_dir / COMPLETE_MARKER, json.dumps(marker, indent=2) + "\n")
        fsync_dir(run_dir)


def run_sort_key(p: Path) -> tuple[str, int]:
    """Sort key of a run folder: its time stamp, then its same-second number."""
    m = RUN_ID.match(p.name)
    if m is None:
        return (p.name, 0)
    return (m.group(1), int(m.group(2) or 1))


def _marker_problem(data: Any, run_dir: Path) -> str | None:
    """Why a parsed ``complete.json`` is unusable (None when it is fine)."""
    if not isinstance(data, dict):
        return f"{COMPLETE_MARKER}: expected a JSON object"
    if data.get("complete") is not True:
        return None  # not a finished run (yet): nothing is promised about it
    # A finished run's record lists every file with its size and SHA-256; a record
    # missing either table (``{"complete": true}``) would switch every check off.
    for key in ("files", "sizes"):
        if key not in data:
            return f"{COMPLETE_MARKER}: '{key}' is missing (every file must be listed)"
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
    if set(files) != set(sizes):
        return f"{COMPLETE_MARKER}: 'files' and 'sizes' list different files"
    if not isinstance(data.get("info", {}), dict):
        return f"{COMPLETE_MARKER}: 'info' is not a table"
    kind = {v: k for k, v in KINDS.items()}.get(run_dir.parent.name)
    if kind is not None and data.get("kind") != kind:
        return f"{COMPLETE_MARKER}: 'kind' is not {kind!r}"
    if data.get("run_id") != run_dir.name:
        return f"{COMPLETE_MARKER}: 'run_id' is not the folder's name {run_dir.name!r}"
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
        data = read_json(p, COMPLETE_MARKER)  # size, depth and number limits
    except RoomcorrError as exc:
        return None, f"{COMPLETE_MARKER}: unreadable ({' '.join(str(exc).split())})"
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
    return sorted(out, key=lambda r: (run_sort_key(r.path), r.kind))


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
    out = [(rel, "not listed in the run's record") for rel in _unlisted_files(d, marker)]
    for rel, digest in marker.get("files", {}).items():
        p = d / rel
        if p.is_symlink() or not p.is_file():
            out.append((rel, "missing"))
        elif rel in sizes and p.stat().st_size != sizes[rel]:
            out.append((rel, "size changed"))
        elif (hash_files is None or rel in hash_files) and sha256_of(p) != digest:
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
    check_kind_folder(room, "measurement")  # a link leading out is refused, not skipped
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
    room: Room,
    paths: list[str | os.PathLike[str]],
    note: str | None = None,
    record: dict[str, Any] | None = None,
) -> Path:
    """Copy impulse-response WAVs measured elsewhere into a new measurement run.

    The files are checked (:func:`roomcorr.audio_io.read_ir_set`) before
    anything is written; they are renamed ``pos1.wav``, ``pos2.wav``, ... in
    the given order and the original names are kept in the marker. ``record``,
    when given, is written as the run's ``measurement.json`` (channel names and
    timing basis of imported responses).
    """
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
        if record is not None:
            atomic_write_text(run_dir / "measurement.json", json.dumps(record, indent=2) + "\n")
    return run_dir


def design_source(run: RunInfo) -> str | None:
    """Run id of the measurement a design run was made from, if recorded.

    Looks at ``info["measurement"]`` of the run's marker (a run id or path),
    then at the ``measurements`` file list of its ``manifest.json``.
    """
    ref = run.marker.get("info", {}).get("measurement")
    if ref:
        return Path(str(ref)).name
    try:
        man = read_json(run.path / "manifest.json", "manifest")
    except RoomcorrError:
        return None
    files = man.get("measurements") if isinstance(man, dict) else None
    if isinstance(files, list) and files:
        parents = {Path(str(f)).parent.name for f in files}
        if len(parents) == 1:
            return parents.pop()
    return None


#: The record ``roomcorr measure`` writes beside the impulse responses.
RECORD_NAME = "measurement.json"


def measurement_record(folder: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The ``measurement.json`` record of a measurement folder, checked, or None if absent.

    Every reader of the record (design: channel names; report and history: quality
    figures; app) goes through here, so a damaged record is one line everywhere.
    Only the shapes readers rely on are checked (a table; ``positions`` a list of
    tables, each with ``channels`` a list of tables; ``settings``, ``through``,
    ``sweep_settings`` and ``devices`` tables; ``channel_names`` a list of text);
    other keys (a timing basis, an import's source...) pass as they are.

    Raises
    ------
    InputFileError
        For a record that is not valid JSON (or too deep, too large) or wrongly shaped.
    """
    p = Path(folder) / RECORD_NAME
    if not p.exists() and not p.is_symlink():
        return None
    data = read_json(p, RECORD_NAME)
    problem = _record_problem(data)
    if problem:
        raise InputFileError(f"{p}: damaged record: {problem}; measure again")
    return data


def _record_problem(data: Any) -> str | None:
    if not isinstance(data, dict):
        return "expected a JSON object"
    for key in ("settings", "through", "sweep_settings", "devices"):
        if data.get(key) is not None and not isinstance(data[key], dict):
            return f"'{key}' is not a table"
    names = data.get("channel_names")
    if names is not None and not (
        isinstance(names, list) and all(isinstance(n, str) for n in names)
    ):
        return "'channel_names' is not a list of names"
    positions = data.get("positions", [])
    if not isinstance(positions, list) or not all(isinstance(p, dict) for p in positions):
        return "'positions' is not a list of tables"
    for pos in positions:
        chans = pos.get("channels", [])
        if not isinstance(chans, list) or not all(isinstance(c, dict) for c in chans):
            return "a position's 'channels' is not a list of tables"
        for ch in chans:
            if not isinstance(ch.get("figures", {}) or {}, dict):
                return "a channel's 'figures' is not a table"
            if not isinstance(ch.get("gates", []) or [], list):
                return "a channel's 'gates' is not a list"
        if pos.get("file") is not None and not isinstance(pos["file"], str):
            return "a position's 'file' is not a file name"
    return None
