"""WAV reading and writing, and the plain-text curve files (calibration, target).

Impulse-response sets are checked as they are loaded; every problem a user
can fix raises :class:`~roomcorr.errors.InputFileError` naming the file.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from roomcorr.analysis.plausibility import impulse_response_problems
from roomcorr.checked import checked_number, read_regular_bytes, regular_file
from roomcorr.deliver.atomic import atomic_write_with
from roomcorr.errors import InputFileError

#: Shortest impulse response accepted, in seconds (the bass window needs it).
MIN_IR_S = 0.1
#: Samples at or above this fraction of full scale count as clipped ...
CLIP_LEVEL = 0.999
#: ... when at least this many follow one another (a flat top).
CLIP_RUN = 3
#: A file whose peak is below this (about -120 dBFS) is treated as silent.
SILENCE_PEAK = 1e-6
#: Sample rates and channel counts accepted from a WAV header.
MIN_FS, MAX_FS = 8000, 768000
MAX_CHANNELS = 64


def read_wav(path: str | Path) -> tuple[np.ndarray, int]:
    """Read a WAV (or any libsndfile format) as float64.

    Returns
    -------
    data : ndarray, shape (n_channels, n_samples)
    fs : int
    """

    p = regular_file(path, "audio file")  # a FIFO or device would block for ever
    try:
        data, fs = sf.read(str(p), dtype="float64", always_2d=True)
    except (RuntimeError, sf.LibsndfileError) as exc:
        raise InputFileError(f"{p}: not a readable audio file ({exc})") from None
    except OSError as exc:
        raise InputFileError(f"{p}: cannot read ({exc.strerror})") from None
    # the header's numbers are inputs too: a sane rate and at least one channel
    fs = checked_number(
        fs, f"{p}: sample rate", MIN_FS, MAX_FS, integer=True, error=InputFileError, unit="Hz"
    )
    if data.shape[1] < 1 or data.shape[1] > MAX_CHANNELS:
        raise InputFileError(
            f"{p}: {data.shape[1]} channels; expected 1 to {MAX_CHANNELS} (one per loudspeaker)"
        )
    return np.ascontiguousarray(data.T), int(fs)


def write_wav(path: str | Path, data: np.ndarray, fs: int, subtype: str = "FLOAT") -> Path:
    """Write ``data`` (n_channels, n_samples) or (n_samples,) as WAV, atomically."""

    arr = np.asarray(data, dtype=np.float64)
    frames = arr[:, None] if arr.ndim == 1 else arr.T

    def _write(tmp: Path) -> None:
        with sf.SoundFile(str(tmp), "w", int(fs), frames.shape[1], subtype, format="WAV") as f:
            _no_peak_chunk(f)
            f.write(frames)

    return atomic_write_with(path, _write)


#: libsndfile's SFC_SET_ADD_PEAK_CHUNK command (sndfile.h).
_SFC_SET_ADD_PEAK_CHUNK = 0x1050


def _no_peak_chunk(f: Any) -> None:
    """Leave out libsndfile's PEAK chunk, which stamps float WAVs with the time of writing.

    Without it the same filter gives the same bytes whenever it is written, so
    a design can be repeated and checked byte for byte (its SHA-256 too). The
    command exists only in libsndfile's C interface, which python-soundfile
    keeps as ``soundfile._snd``; where that is missing the chunk stays (harmless).
    """

    snd, ffi = getattr(sf, "_snd", None), getattr(sf, "_ffi", None)
    handle = getattr(f, "_file", None)
    if snd is not None and ffi is not None and handle is not None:
        snd.sf_command(handle, _SFC_SET_ADD_PEAK_CHUNK, ffi.NULL, 0)


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


def check_plausible(data: np.ndarray, fs: int, name: str) -> None:
    """Raise :class:`InputFileError` unless every channel looks like a room impulse response.

    The checks (a clear arrival, time after it, decaying energy, no build-up)
    are :func:`roomcorr.analysis.plausibility.impulse_response_problems`; the
    message names the file, the channel and what looks wrong.
    """

    for ch, x in enumerate(data):
        problems = impulse_response_problems(x, fs)
        if problems:
            raise InputFileError(
                f"{name}: channel {ch + 1} does not look like an impulse response: "
                + "; ".join(problems)
                + ". Check the file (design needs impulse responses, not recordings), "
                "or pass --force to design from it anyway"
            )


def read_ir_set(
    paths: list[str | Path], require_impulse: bool = False
) -> tuple[np.ndarray, int, list[Path]]:
    """Read one impulse-response WAV per microphone position and check them.

    Parameters
    ----------
    paths : list of path-like
        WAV files (channels = loudspeakers) or folders of them.
    require_impulse : bool
        Also refuse files that do not look like impulse responses
        (:func:`check_plausible`, run on each file as read, before padding).

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
        if require_impulse:
            check_plausible(data, fs, str(p))
        datas.append(data)
    assert fs0 is not None
    n = max(d.shape[1] for d in datas)
    irs = np.zeros((len(datas), datas[0].shape[0], n))
    for i, d in enumerate(datas):
        irs[i, :, : d.shape[1]] = d
    return irs, fs0, files


#: A data line starts with a number (or with a word that tries to be one: nan, inf).
_DATA_LINE = re.compile(r"[+-]?(\d|\.\d|nan|inf)", re.IGNORECASE)
#: One plain decimal number (dot decimal mark), optionally with an exponent.
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
#: Lines starting with one of these are comments.
_COMMENT = ("#", "*", "//", "%", "!")
#: Largest frequency (Hz) and level (dB) a curve file may hold.
CURVE_MAX_HZ = 1e6
CURVE_MAX_DB = 200.0

#: Column separators of the layouts read by :func:`read_curve_file`.
CURVE_LAYOUTS = {
    "tab": "tab or semicolon between columns; decimal point or decimal comma",
    "comma": "comma between columns (spaces allowed after it); decimal point",
    "space": "spaces between columns; decimal point or decimal comma",
}


def _curve_layout(line: str) -> str:
    """Column separator of a data line: ``tab`` (tab or semicolon), ``comma`` or ``space``."""
    if "\t" in line or ";" in line:
        return "tab"
    if "," in line:
        words = line.split()
        # "20,0 -1,2": commas inside space-separated words are decimal commas
        if len(words) >= 2 and not any(w.endswith(",") or w.startswith(",") for w in words):
            return "space"
        return "comma"
    return "space"


def _curve_fields(line: str, layout: str) -> list[str]:
    """The columns of a data line (separators of its layout, and spaces, split it)."""
    seps = {"tab": r"[\t;\s]+", "comma": r"[,\s]+", "space": r"\s+"}[layout]
    return [f for f in re.split(seps, line.strip()) if f]


def read_curve_file(path: str | Path, what: str = "curve") -> tuple[np.ndarray, np.ndarray]:
    """Read a text file of frequency (Hz) and dB pairs, one per line, exactly as written.

    Accepted layouts (:data:`CURVE_LAYOUTS`), recognised from the first data
    line and then required on every data line:

    * columns separated by a tab, a semicolon, a comma (optionally followed by
      spaces) or spaces, recognised line by line;
    * a decimal point, or a decimal comma when the columns are separated by a
      tab, a semicolon or spaces (``20,0<TAB>-1,2``; ``100;5,5``; ``20,0 -1,2``).
      A file that uses decimal commas may not also use dots (``1.000,5`` could
      hold a thousands separator) or comma-separated lines;
    * UTF-8 with or without a byte-order mark (Latin-1 also read), LF or CRLF
      line ends.

    Lines that start with text (headers) or a comment mark (``#``, ``*``,
    ``//``, ``%``, ``!``) and empty lines are skipped. Columns after the second
    (a phase, say) are ignored. Anything else is refused with the line number:
    a value that is not a finite number (``nan``, ``inf``), a line with a
    single value, a line whose commas could be read two ways (``20,0,-1,2``),
    a non-positive or duplicated frequency, a value out of range.

    Returns
    -------
    freq_hz, gain_db : ndarray, shape (n_points,)
        Sorted by frequency.

    Raises
    ------
    InputFileError
        Naming the file and, for a bad line, its number.
    """
    p = Path(path)
    raw = read_regular_bytes(p, f"{what} file")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
    lines = text.splitlines()
    data = [
        (n, s)
        for n, s in ((n, ln.strip()) for n, ln in enumerate(lines, start=1))
        if s and not s.startswith(_COMMENT) and _DATA_LINE.match(s)
    ]
    if not data:
        raise InputFileError(f"{p}: a {what} file needs at least two 'frequency dB' lines")
    rows = [(n, s, _curve_layout(s)) for n, s in data]
    rows = [(n, s, lay, _curve_fields(s, lay)) for n, s, lay in rows]
    # decimal commas: a comma inside a column of a tab, semicolon or space layout
    comma_line = next(
        (n for n, _, lay, fl in rows if lay != "comma" and any("," in f for f in fl[:2])), None
    )
    has_dot = any("." in f for *_, fl in rows for f in fl[:2])
    freqs, gains = [], []
    for n, s, lay, fl in rows:
        if lay == "comma" and len(fl) > 2 and not has_dot:
            # "20,0,-1,2" in a file without any decimal point: columns or decimal commas?
            raise InputFileError(
                f"{p}, line {n}: {s[:40]!r} is ambiguous (commas both between columns "
                "and as decimal marks?); use a tab or semicolon between columns, or a "
                "decimal point"
            )
        if len(fl) < 2:
            raise InputFileError(f"{p}, line {n}: expected 'frequency dB', got {s[:40]!r}")
        vals = []
        for f in fl[:2]:
            t = f
            if comma_line is not None:
                if "." in t or lay == "comma":
                    raise InputFileError(
                        f"{p}, line {n}: {s[:40]!r} mixes decimal points with the decimal "
                        f"commas of line {comma_line} (is '.' a thousands separator?); use "
                        "one decimal mark throughout"
                    )
                if t.count(",") > 1:
                    raise InputFileError(f"{p}, line {n}: {t!r} is not a number")
                t = t.replace(",", ".")
            if not _NUMBER.fullmatch(t):
                if t.lower().lstrip("+-").startswith(("nan", "inf")):
                    raise InputFileError(f"{p}, line {n}: {f!r} is not a finite number")
                raise InputFileError(
                    f"{p}, line {n}: {f!r} is not a number (layout: {CURVE_LAYOUTS[lay]})"
                )
            vals.append(checked_number(t, f"{p}, line {n}", error=InputFileError))
        f_hz, g_db = float(vals[0]), float(vals[1])
        if not 0.0 < f_hz <= CURVE_MAX_HZ:
            raise InputFileError(
                f"{p}, line {n}: frequency {fl[0]!r} must be positive and at most "
                f"{CURVE_MAX_HZ:g} Hz"
            )
        if not -CURVE_MAX_DB <= g_db <= CURVE_MAX_DB:
            raise InputFileError(f"{p}, line {n}: {fl[1]!r} dB is out of range")
        freqs.append(f_hz)
        gains.append(g_db)
    if len(freqs) < 2:
        raise InputFileError(f"{p}: a {what} file needs at least two 'frequency dB' lines")
    f_arr, g_arr = np.asarray(freqs), np.asarray(gains)
    order = np.argsort(f_arr, kind="stable")
    f_arr, g_arr = f_arr[order], g_arr[order]
    if np.any(np.diff(f_arr) == 0):
        raise InputFileError(f"{p}: the same frequency appears twice")
    return f_arr, g_arr
