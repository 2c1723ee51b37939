"""Sound through a design: render a file, print commands for other tools, list the files.

Plain functions returning JSON-ready data; the command line and the browser
app call them (no printing here).
"""

from __future__ import annotations

import io
import math
import threading
import zipfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.explore import run_folder
from roomcorr.app.measure import require_acknowledged
from roomcorr.audio_io import read_wav
from roomcorr.deliver.atomic import is_link_or_outside
from roomcorr.deliver.commands import (
    command_text,
    ffmpeg_command,
    ffmpeg_version,
    sox_commands,
)
from roomcorr.deliver.export import MANIFEST, read_manifest
from roomcorr.deliver.loading import file_groups, files_lines, next_steps
from roomcorr.deliver.pipewire import (
    SINK_NAME,
    filter_chain_config,
    write_filter_chain_config,
)
from roomcorr.deliver.plan import design_rates, load_route_plan
from roomcorr.errors import InputFileError, OutputError, RoomBusyError, SettingsError
from roomcorr.playback.device import play
from roomcorr.playback.loudness import MIN_SECONDS, integrated_lufs
from roomcorr.playback.realtime import LISTEN_BLOCK, ListeningPaths
from roomcorr.playback.render import LOWERED_PEAK_DBFS, BlockConvolver, apply_file

#: Seconds of the music rendered both ways to match their loudness.
LOUDNESS_SECONDS = 60.0
#: Level listening starts at (dB below the file's own level): start quietly.
START_LEVEL_DB = -20.0


def apply_command(
    in_path: str,
    design_dir: str,
    out_path: str,
    subtype: str = "FLOAT",
    lower: bool = True,
    on_progress: Callable[[int, int], None] | None = None,
) -> dict[str, Any]:
    """Render ``in_path`` through the design into ``out_path`` (see
    :func:`roomcorr.playback.render.apply_file`); returns what was done."""
    r = apply_file(in_path, design_dir, out_path, subtype, lower, on_progress)
    return {
        "out": str(r.out_path),
        "sample_rate": r.fs,
        "seconds": r.n_frames / r.fs,
        "inputs": r.n_inputs,
        "outputs": r.n_outputs,
        "peak_dbfs": None if math.isinf(r.peak_dbfs) else round(r.peak_dbfs, 2),
        "lowered_db": round(r.lowered_db, 2),
        "lowered_to_dbfs": LOWERED_PEAK_DBFS if r.lowered_db > 0 else None,
        "subtype": r.subtype,
        "latency_ms": round(1000.0 * r.latency_samples / r.fs, 3),
        "pre_gain_db": r.pre_gain_db,
    }


def design_commands(
    design_dir: str,
    rate: int | None = None,
    in_path: str = "music.wav",
    out_path: str = "corrected.wav",
) -> dict[str, Any]:
    """ffmpeg and sox command lines rendering a file through the design, per rate.

    Returns
    -------
    dict
        ``{"ffmpeg_version": [major, minor] or None, "rates": [{"sample_rate",
        "ffmpeg": line, "sox": [lines] or None, "sox_note": str or None}]}``.
    """
    manifest = read_manifest(design_dir)
    rates = design_rates(manifest)
    if rate is not None:
        if rate not in rates:
            raise SettingsError(
                f"--rate {rate}: the design has filters for {', '.join(map(str, rates))} Hz"
            )
        rates = [rate]
    version = ffmpeg_version()
    out = []
    for fs in rates:
        plan = load_route_plan(design_dir, fs)
        sox = sox_commands(plan, design_dir, in_path, out_path)
        ffmpeg = ffmpeg_command(plan, design_dir, in_path, out_path, version)
        out.append(
            {
                "sample_rate": fs,
                "ffmpeg": command_text(ffmpeg),
                "sox": None if sox is None else [command_text(c) for c in sox],
                "sox_note": None
                if sox is not None
                else "sox reads coefficients as text: design again with --formats wav,txt",
            }
        )
    return {"ffmpeg_version": list(version) if version else None, "rates": out}


def pipewire_config(design_dir: str, path: str, rate: int | None = None) -> dict[str, Any]:
    """Write a PipeWire filter-chain drop-in for the design (:mod:`roomcorr.deliver.pipewire`).

    ``rate`` defaults to 48000 Hz when the design has it (PipeWire's usual
    rate), else the design's highest rate.
    """
    manifest = read_manifest(design_dir)
    rates = design_rates(manifest)
    if rate is None:
        rate = 48000 if 48000 in rates else max(rates)
    elif rate not in rates:
        raise SettingsError(
            f"--rate {rate}: the design has filters for {', '.join(map(str, rates))} Hz"
        )
    plan = load_route_plan(design_dir, rate)
    subs = {int(o["output"]) for o in manifest.get("outputs") or [] if o.get("role") == "sub"}
    written = write_filter_chain_config(path, filter_chain_config(plan, design_dir, subs))
    return {
        "path": str(written.resolve()),
        "sample_rate": rate,
        "sink": SINK_NAME,
        "where": "~/.config/pipewire/pipewire.conf.d/ (then: systemctl --user restart pipewire)",
    }


def design_files(design_dir: str) -> dict[str, Any]:
    """Where a design's files are and how to load them (the Files page and ``commands``)."""
    folder = Path(design_dir).resolve()
    manifest = read_manifest(folder)
    return {
        "folder": str(folder),
        "pre_gain_db": manifest.get("pre_gain_db"),
        "groups": file_groups(manifest),
        "lines": files_lines(manifest),
        "next": next_steps(str(design_dir)),
    }


def prepare_listening(
    music_path: str,
    design_dir: str,
    level_db: float = START_LEVEL_DB,
    block: int = LISTEN_BLOCK,
) -> tuple[ListeningPaths, Any, dict[str, Any]]:
    """Read the music, the design at its rate, and match the two paths' loudness.

    The first :data:`LOUDNESS_SECONDS` of the music are rendered through the
    design and through the routes alone; the uncorrected path is lowered by
    the difference of their integrated loudness (ITU-R BS.1770, pyloudnorm),
    which holds the design's pre-gain and the correction's own effect.

    Returns
    -------
    paths : ListeningPaths
    music : ndarray, shape (n_inputs, n_samples)
    figures : dict
        ``sample_rate``, ``seconds``, ``pre_gain_db``, ``uncorrected_gain_db``
        (total), ``loudness_corrected_lufs``, ``loudness_uncorrected_lufs``
        (before matching), ``latency_ms``, ``block``, ``block_ms``, ``level_db``.
    """
    x, fs = read_wav(music_path)
    plan = load_route_plan(design_dir, fs)
    if x.shape[0] != plan.n_inputs:
        raise InputFileError(
            f"{music_path}: {x.shape[0]} channel(s), but the design has {plan.n_inputs} "
            f"input(s) ({', '.join(plan.input_names)})"
        )
    if not np.all(np.isfinite(x)):
        raise InputFileError(f"{music_path}: holds NaN or infinite samples")
    if x.shape[1] < MIN_SECONDS * fs:
        raise InputFileError(f"{music_path}: shorter than {MIN_SECONDS} s; choose some music")
    part = x[:, : int(LOUDNESS_SECONDS * fs)]
    h = plan.combined_filters()
    conv = BlockConvolver(h, plan.mix, 8192)
    nb = -(-part.shape[1] // 8192)
    padded = np.zeros((part.shape[0], nb * 8192))
    padded[:, : part.shape[1]] = part
    corr = np.concatenate(
        [conv.process(padded[:, k * 8192 : (k + 1) * 8192]) for k in range(nb)], axis=1
    )
    lat = plan.latency_samples
    corr = corr[:, lat : lat + part.shape[1]]
    unc = (plan.mix * plan.trim[:, None]) @ part
    l_corr = integrated_lufs(corr, fs)
    l_unc = integrated_lufs(unc, fs)
    gain_db = l_corr - l_unc if np.isfinite(l_corr) and np.isfinite(l_unc) else 0.0
    paths = ListeningPaths(plan, gain_db, block=block, level_db=level_db)
    figures = {
        "sample_rate": fs,
        "seconds": x.shape[1] / fs,
        "inputs": plan.input_names,
        "outputs": plan.output_names,
        "pre_gain_db": plan.pre_gain_db,
        "uncorrected_gain_db": round(gain_db, 2),
        "loudness_corrected_lufs": round(l_corr, 2),
        "loudness_uncorrected_lufs": round(l_unc, 2),
        "loudness_seconds": part.shape[1] / fs,
        "latency_ms": round(1000.0 * lat / fs, 3),
        "block": block,
        "block_ms": round(1000.0 * block / fs, 2),
        "level_db": min(level_db, 0.0),
    }
    return paths, x, figures


def design_loading(room: rooms.Room, run_id: str) -> dict[str, Any]:
    """The app's Files page: where a design run is on disk, its files, how to load them.

    Returns :func:`design_files` plus ``files`` (path, kind, format, rate, taps
    and pre-gain per file) and ``commands`` (:func:`design_commands`).
    """
    folder = run_folder(room, "design", run_id)
    rooms.verified(room, folder, use=[folder / MANIFEST])
    doc = design_files(str(folder))
    manifest = read_manifest(folder)
    pre = manifest.get("pre_gain_db")
    rows = []
    for e in manifest.get("files", []):
        if e.get("kind") not in ("fir", "iir"):
            continue
        rows.append(
            {
                "path": e["path"],
                "kind": e["kind"],
                "format": e.get("format", "wav"),
                "sample_rate": e.get("sample_rate"),
                "taps": e.get("taps"),
                # the biquads carry their own pre-gain; every FIR file the design's
                "pre_gain_db": e.get("pre_gain_db", pre if e["kind"] == "fir" else None),
            }
        )
    doc["files"] = rows
    doc["commands"] = design_commands(str(folder))
    doc["zip"] = f"{run_id}.zip"
    return doc


#: Largest design folder zipped for download (bytes of its files).
MAX_ZIP_BYTES = 1 << 30


def design_zip(room: rooms.Room, run_id: str) -> tuple[str, bytes]:
    """One zip of a whole design run: its manifest and every file the manifest lists.

    Every file is checked first (the run's SHA-256 record); a file that is a
    link or leads out of the run folder is refused, as for single files.

    Returns
    -------
    name : str
        ``<run_id>.zip``
    data : bytes
    """

    folder = run_folder(room, "design", run_id)
    manifest = read_manifest(folder)
    paths = [folder / MANIFEST] + [folder / e["path"] for e in manifest["files"]]
    rooms.verified(room, folder, use=paths)
    total = 0
    for p in paths:
        if is_link_or_outside(p, folder) or not p.is_file():
            raise InputFileError(f"{p.name}: not a file of run {run_id}")
        total += p.stat().st_size
    if total > MAX_ZIP_BYTES:
        raise OutputError(f"design {run_id}: {total} bytes, too large for one download")
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        for p in paths:
            z.write(p, f"{run_id}/{p.relative_to(folder).as_posix()}")
    return f"{run_id}.zip", buf.getvalue()


def default_design(design_dir: str | None) -> str:
    """``design_dir``, or in a room folder its latest complete design run.

    Raises
    ------
    SettingsError
        Without ``--design`` outside a room folder, or in a room with no design yet.
    """
    if design_dir:
        return design_dir
    room = rooms.find_room()
    if room is None:
        raise SettingsError("--design: give the design folder (or run this inside a room folder)")
    runs = rooms.list_runs(room, "design", include_incomplete=False)
    if not runs:
        raise SettingsError(f"{room.root}: no design yet; run 'roomcorr design' first")
    return str(runs[-1].path)


#: The room's folder of music for listening from the app (WAV or FLAC files).
MUSIC_DIR = "music"
_MUSIC_SUFFIXES = (".wav", ".flac")


def listen_music(room: rooms.Room) -> list[str]:
    """Names of the music files in the room's ``music/`` folder (links and folders left out)."""
    folder = room.root / MUSIC_DIR
    if folder.is_symlink() or not folder.is_dir():
        return []
    return sorted(
        p.name
        for p in folder.iterdir()
        if p.suffix.lower() in _MUSIC_SUFFIXES and p.is_file() and not p.is_symlink()
    )


class ListenSession:
    """Listening from the app: one piece of music through one design at a time.

    Sound starts only after the room's cautions were acknowledged (as for
    measuring), at :data:`START_LEVEL_DB`; the music must be a file of the
    room's ``music/`` folder (a name, never a path).
    """

    def __init__(self, room: rooms.Room) -> None:
        self.room = room
        self.lock = threading.Lock()
        self.thread: threading.Thread | None = None
        self.paths: ListeningPaths | None = None
        self.stop_event = threading.Event()
        self.figures: dict[str, Any] = {}
        self.error: str | None = None
        self.level_db = START_LEVEL_DB

    def running(self) -> bool:
        return self.thread is not None and self.thread.is_alive()

    def start(self, run_id: str, music: str, device: str | int | None = None) -> dict[str, Any]:
        """Start playing ``music`` through design ``run_id`` (corrected first)."""
        require_acknowledged(self.room)
        with self.lock:
            if self.running():
                raise RoomBusyError("listen: already playing; stop first")
            folder = run_folder(self.room, "design", run_id)
            rooms.verified(self.room, folder, use=[folder / MANIFEST])
            if music not in listen_music(self.room):
                raise InputFileError(
                    f"{music!r}: not a music file of the room (put WAV or FLAC files in "
                    f"{self.room.root / MUSIC_DIR})"
                )
            paths, x, fig = prepare_listening(
                str(self.room.root / MUSIC_DIR / music), str(folder), START_LEVEL_DB
            )
            self.paths, self.figures, self.error = paths, fig, None
            self.level_db = START_LEVEL_DB
            self.stop_event = threading.Event()

            def run() -> None:
                try:
                    play(paths, x, device, self.stop_event)
                except Exception as exc:  # noqa: BLE001 - reported in the state, not raised
                    self.error = " ".join(str(exc).split())

            self.thread = threading.Thread(target=run, name="roomcorr-listen", daemon=True)
            self.thread.start()
        return self.state()

    def switch(self) -> dict[str, Any]:
        if self.paths is not None and self.running():
            self.paths.toggle()
        return self.state()

    def level(self, delta_db: float) -> dict[str, Any]:
        """Change the level by ``delta_db`` (finite, at most 12 dB a step; capped at 0 dB)."""
        if not isinstance(delta_db, int | float) or not math.isfinite(delta_db):
            raise SettingsError("level: delta_db must be a finite number")
        if abs(delta_db) > 12:
            raise SettingsError("level: change by at most 12 dB at a time")
        self.level_db = min(0.0, self.level_db + float(delta_db))
        if self.paths is not None:
            self.paths.set_level_db(self.level_db)
        return self.state()

    def stop(self) -> dict[str, Any]:
        self.stop_event.set()
        if self.thread is not None:
            self.thread.join(5)
        return self.state()

    def state(self) -> dict[str, Any]:
        return {
            "playing": self.running(),
            "corrected": bool(self.paths.state.target) if self.paths is not None else None,
            "level_db": self.level_db,
            "figures": self.figures,
            "error": self.error,
        }
