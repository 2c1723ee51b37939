"""Filter files a playback chain can load as they are.

Formats (``--formats``, the ``design.formats`` setting); the per-channel WAV
is always written, the others on request:

==========  ==============================  ==========================================
key         file                            content
==========  ==============================  ==========================================
wav         ``fir/<rate>/<name>.wav``       one channel, 32-bit float WAV
multiwav    ``fir/<rate>/all.wav``          every output, channels in output order
f32         ``fir/<rate>/<name>.f32``       raw little-endian 32-bit float, no header
f64         ``fir/<rate>/<name>.f64``       raw little-endian 64-bit float, no header
txt         ``fir/<rate>/<name>.txt``       one coefficient per line (plain text)
==========  ==============================  ==========================================

The text file holds the 32-bit float coefficients (the same as the WAV) with
9 significant digits, enough to give each value back exactly. All files go through
:mod:`roomcorr.deliver.atomic`.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from roomcorr.audio_io import write_wav
from roomcorr.deliver.atomic import atomic_write_bytes, atomic_write_text

#: Name of the multichannel file in each rate folder.
MULTI_NAME = "all"

#: Suffix of each single-channel format.
SUFFIX = {"wav": ".wav", "f32": ".f32", "f64": ".f64", "txt": ".txt"}


def coefficients_text(h: np.ndarray) -> str:
    """The 32-bit float coefficients, one per line, 9 significant digits (exact round trip)."""
    h32 = np.asarray(h, dtype=np.float32).astype(np.float64)
    return "".join(f"{x:.9g}\n" for x in h32)


def _writer(fmt: str) -> Callable[[Path, np.ndarray, int], object]:
    if fmt == "wav":
        return lambda p, h, fs: write_wav(p, h.astype(np.float32), fs, subtype="FLOAT")
    if fmt == "f32":
        return lambda p, h, fs: atomic_write_bytes(p, np.asarray(h, dtype="<f4").tobytes())
    if fmt == "f64":
        return lambda p, h, fs: atomic_write_bytes(p, np.asarray(h, dtype="<f8").tobytes())
    if fmt == "txt":
        return lambda p, h, fs: atomic_write_text(p, coefficients_text(h))
    raise ValueError(f"unknown single-channel format {fmt!r}")


def filter_files(
    firs: dict[int, np.ndarray], names: list[str], formats: tuple[str, ...]
) -> list[tuple[str, str, int, int | None, Callable[[Path], object]]]:
    """Every extra filter file of a design (not the per-channel WAV).

    Parameters
    ----------
    firs : dict of int to ndarray, shape (n_channels, n_taps)
    names : list of str
        Channel (output) names, in output order.
    formats : tuple of str

    Returns
    -------
    list of (relative path, format, rate, channel index or None, write function)
        The write function takes the destination path.
    """
    out = []
    for fs, h in firs.items():
        for fmt in formats:
            if fmt == "wav":
                continue
            if fmt == "multiwav":
                rel = f"fir/{fs}/{MULTI_NAME}.wav"
                data = h.astype(np.float32)
                out.append(
                    (
                        rel,
                        fmt,
                        fs,
                        None,
                        lambda p, d=data, r=fs: write_wav(p, d, r, subtype="FLOAT"),
                    )
                )
                continue
            write = _writer(fmt)
            for c, name in enumerate(names):
                rel = f"fir/{fs}/{name}{SUFFIX[fmt]}"
                out.append((rel, fmt, fs, c, lambda p, x=h[c], r=fs, w=write: w(p, x, r)))
    return out


def read_filter_file(path: str | Path, fmt: str) -> np.ndarray:
    """Read back a raw or text filter file (the test of the writers uses it)."""
    p = Path(path)
    if fmt == "f32":
        return np.frombuffer(p.read_bytes(), dtype="<f4").astype(np.float64)
    if fmt == "f64":
        return np.frombuffer(p.read_bytes(), dtype="<f8").copy()
    if fmt == "txt":
        return np.array([float(x) for x in p.read_text(encoding="utf-8").split()])
    raise ValueError(f"read_filter_file reads f32, f64 and txt, not {fmt!r}")
