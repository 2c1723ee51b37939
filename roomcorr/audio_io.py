"""WAV reading and writing, and the plain-text curve files (calibration, target).

Impulse-response sets are checked as they are loaded; every problem a user
can fix raises :class:`~roomcorr.errors.InputFileError` naming the file.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from roomcorr.atomic import atomic_write_with
from roomcorr.errors import InputFileError

#: Shortest impulse response accepted, in seconds (the bass window needs it).
MIN_IR_S = 0.1
#: Samples at or above this fraction of full scale count as clipped ...
CLIP_LEVEL = 0.999
#: ... when at least this many follow one another (a flat top).
CLIP_RUN = 3
#: A file whose peak is below this (about -120 dBFS) is treated as silent.
SILENCE_PEAK = 1e-6


def read_wav(path: str | Path) -> tuple[np.ndarray, int]:
    """Read a WAV (or any libsndfile format) as float64.

    Returns
    -------
    data : ndarray, shape (n_channels, n_samples)
    fs : int
    """
    import soundfile as sf

    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"{p}: file not found")
    try:
        data, fs = sf.read(str(p), dtype="float64", always_2d=True)
    except (RuntimeError, sf.LibsndfileError) as exc:
        raise InputFileError(f"{p}: not a readable audio file ({exc})") from None
    return np.ascontiguousarray(data.T), int(fs)


def write_wav(path: str | Path, data: np.ndarray, fs: int, subtype: str = "FLOAT") -> Path:
    """Write ``data`` (n_channels, n_samples) or (n_samples,) as WAV, atomically."""
    import soundfile as sf

    arr = np.asarray(data, dtype=np.float64)
    frames = arr[:, None] if arr.ndim == 1 else arr.T

    def _write(tmp: Path) -> None:
        sf.write(str(tmp), frames, int(fs), subtype=subtype, format="WAV")

    return atomic_write_with(path, _write)


def check_ir(data: np.ndarray, fs: int, name: str) -> None:
    """Raise :class:`InputFileError` if an impulse response is unusable.

    Checks, in order: NaN/Inf, silence, too short, clipping (flat tops at
    full scale, :data:`CLIP_RUN` samples or more).
    """
    if not np.all(np.isfinite(data)):
        raise InputFileError(f"{name}: contains NaN or infinite samples; re-export the file")
    for ch, x in enumerate(data):
        peak = float(np.max(np.abs(x))) if x.size else 0.0
        if peak < SILENCE_PEAK:
            raise InputFileError(
                f"{name}: channel {ch + 1} is silent; check the recording or the channel order"
            )
        hot = np.abs(x) >= CLIP_LEVEL
        if peak >= CLIP_LEVEL and hot.sum() >= CLIP_RUN:
            run = np.diff(np.concatenate(([0], hot.astype(np.int8), [0])))
            starts, ends = np.flatnonzero(run == 1), np.flatnonzero(run == -1)
            if np.max(ends - starts) >= CLIP_RUN:
                raise InputFileError(
                    f"{name}: channel {ch + 1} is clipped (flat tops at full scale); "
                    "measure again with less gain"
                )
    if data.shape[-1] < MIN_IR_S * fs:
        raise InputFileError(
            f"{name}: only {data.shape[-1] / fs * 1000:.0f} ms long; impulse responses of at "
            f"least {MIN_IR_S * 1000:.0f} ms are needed to judge the bass"
        )


def natural_key(name: str) -> list[int | str]:
    """Sort key comparing digit runs as numbers (``pos2.wav`` before ``pos10.wav``)."""
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", name)]


def expand_ir_paths(paths: list[str | Path]) -> list[Path]:
    """Turn files and folders into a list of WAV files.

    A folder stands for its top-level ``*.wav`` files in position order
    (numbers in names compared as numbers).
    """
    out: list[Path] = []
    for item in paths:
        p = Path(item)
        if p.is_dir():
            found = sorted(
                (q for q in p.glob("*.wav") if q.is_file()), key=lambda q: natural_key(q.name)
            )
            if not found:
                raise InputFileError(f"{p}: folder holds no .wav impulse responses")
            out.extend(found)
        else:
            out.append(p)
    if not out:
        raise InputFileError("no impulse-response files given")
    return out


def read_ir_set(paths: list[str | Path]) -> tuple[np.ndarray, int, list[Path]]:
    """Read one impulse-response WAV per microphone position and check them.

    Parameters
    ----------
    paths : list of path-like
        WAV files (channels = loudspeakers) or folders of them.

    Returns
    -------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
        Shorter files are padded with zeros to the longest.
    fs : int
    files : list of Path
    """
    files = expand_ir_paths(paths)
    datas: list[np.ndarray] = []
    fs0 = None
    n_ch0 = None
    for p in files:
        data, fs = read_wav(p)
        if fs0 is None:
            fs0, n_ch0 = fs, data.shape[0]
        elif fs != fs0:
            raise InputFileError(
                f"{p}: sample rate {fs} Hz differs from {fs0} Hz of {files[0]}; "
                "all positions must share one rate"
            )
        elif data.shape[0] != n_ch0:
            raise InputFileError(
                f"{p}: {data.shape[0]} channels, but {files[0]} has {n_ch0}; every file "
                "needs one channel per loudspeaker, in the same order"
            )
        check_ir(data, fs, str(p))
        datas.append(data)
    assert fs0 is not None
    n = max(d.shape[1] for d in datas)
    irs = np.zeros((len(datas), datas[0].shape[0], n))
    for i, d in enumerate(datas):
        irs[i, :, : d.shape[1]] = d
    return irs, fs0, files


def read_curve_file(path: str | Path, what: str = "curve") -> tuple[np.ndarray, np.ndarray]:
    """Read a text file of frequency (Hz) and dB pairs, one per line.

    Lines that do not start with a number (headers, comments) are skipped.
    Separators may be spaces, tabs, commas or semicolons; columns after the
    second are ignored.

    Returns
    -------
    freq_hz, gain_db : ndarray, shape (n_points,)
        Sorted by frequency.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8", errors="replace")
    except FileNotFoundError:
        raise InputFileError(f"{p}: {what} file not found") from None
    except OSError as exc:
        raise InputFileError(f"{p}: cannot read {what} file ({exc.strerror})") from None
    freqs, gains = [], []
    for lineno, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if not s or not (s[0].isdigit() or (s[0] in "+-." and len(s) > 1)):
            continue
        parts = s.replace(",", " ").replace(";", " ").split()
        try:
            f, g = float(parts[0]), float(parts[1])
        except (ValueError, IndexError):
            raise InputFileError(
                f"{p}, line {lineno}: expected 'frequency dB', got {s[:40]!r}"
            ) from None
        if not (np.isfinite(f) and np.isfinite(g)) or f <= 0:
            raise InputFileError(f"{p}, line {lineno}: frequency must be positive and finite")
        freqs.append(f)
        gains.append(g)
    if len(freqs) < 2:
        raise InputFileError(f"{p}: a {what} file needs at least two 'frequency dB' lines")
    f_arr, g_arr = np.asarray(freqs), np.asarray(gains)
    order = np.argsort(f_arr, kind="stable")
    f_arr, g_arr = f_arr[order], g_arr[order]
    if np.any(np.diff(f_arr) == 0):
        raise InputFileError(f"{p}: the same frequency appears twice")
    return f_arr, g_arr
