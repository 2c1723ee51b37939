"""Rendering audio through a design's routes (:class:`~roomcorr.deliver.plan.RoutePlan`)::

    y_o = trim_o * delay_{d_o}( h_o * sum_i mix[o, i] x_i )

A whole file is convolved through it in blocks (uniformly partitioned
overlap-save, so memory does not grow with the file's length).

References
----------
.. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
       3rd ed., sec. 8.7.3 (block convolution, overlap-save).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.fft
import soundfile as sf

from roomcorr.checked import regular_file
from roomcorr.deliver.atomic import atomic_write_with
from roomcorr.deliver.plan import RoutePlan, load_route_plan
from roomcorr.errors import InputFileError, OutputError, SafetyError, SettingsError
from roomcorr.playback.limits import LOWERED_PEAK_DBFS, SUBTYPES

#: Above this size a WAV header cannot count the bytes (32-bit fields); RF64 is written.
_WAV_LIMIT_BYTES = 4_000_000_000


class BlockConvolver:
    """Uniformly partitioned overlap-save convolution of several outputs, block by block.

    Each call of :meth:`process` takes ``block`` samples of every input and
    returns ``block`` samples of every output: the exact linear convolution
    ``y_o = h_o * sum_i mix[o, i] x_i``, delayed by nothing (the first output
    sample belongs to the first input sample).

    Parameters
    ----------
    h : ndarray, shape (n_outputs, n_taps)
    mix : ndarray, shape (n_outputs, n_inputs)
    block : int
        Block (and partition) length; the FFT is twice as long.
    workers : int
        Threads for scipy.fft (one per output channel at most helps).

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
           3rd ed., sec. 8.7.3 (overlap-save); the filter split into partitions
           of one block each, their spectra summed over a delay line of past
           input spectra (uniformly partitioned convolution).
    """

    def __init__(self, h: np.ndarray, mix: np.ndarray, block: int, workers: int = 1) -> None:
        self.block = int(block)
        self.mix = np.asarray(mix, dtype=np.float64)
        n_out, n_taps = h.shape
        self.n_parts = max(1, -(-n_taps // self.block))
        padded = np.zeros((n_out, self.n_parts * self.block))
        padded[:, :n_taps] = h
        parts = padded.reshape(n_out, self.n_parts, self.block)
        self.workers = workers
        spectra = scipy.fft.rfft(parts, n=2 * self.block, axis=-1)
        # partitions in reverse order: with the input spectra in a ring buffer, the sum
        # over partitions is then two contiguous products, and nothing is shifted per block
        self.spectra_rev = np.ascontiguousarray(spectra[:, ::-1])
        self.fdl = np.zeros_like(spectra)  # ring of past input spectra
        self.pos = -1  # slot of the newest input spectrum
        self.prev = np.zeros((n_out, self.block))

    def process(self, x: np.ndarray) -> np.ndarray:
        """Convolve one block, shape (n_inputs, block) -> (n_outputs, block)."""
        m = self.mix @ x
        buf = np.concatenate((self.prev, m), axis=1)
        self.prev = m
        P = self.n_parts
        pos = self.pos = (self.pos + 1) % P
        self.fdl[:, pos] = scipy.fft.rfft(buf, axis=-1, workers=self.workers)
        # slot j holds the input of (pos - j) mod P blocks ago: it meets partition
        # (pos - j) mod P, stored at P - 1 - pos + j (j <= pos) or j - pos - 1 (j > pos)
        acc = np.einsum("opk,opk->ok", self.fdl[:, : pos + 1], self.spectra_rev[:, P - 1 - pos :])
        if pos + 1 < P:
            acc += np.einsum(
                "opk,opk->ok", self.fdl[:, pos + 1 :], self.spectra_rev[:, : P - 1 - pos]
            )
        y = scipy.fft.irfft(acc, n=2 * self.block, axis=-1, workers=self.workers)
        return y[:, self.block :]


def offline_block(n_taps: int) -> int:
    """Block length for file rendering: a power of two near the filter length (at least 4096)."""
    return int(min(max(4096, 1 << max(0, (n_taps - 1).bit_length())), 1 << 17))


@dataclass(frozen=True)
class ApplyResult:
    """What ``apply`` did: where it wrote, how long, the peak and any lowering."""

    out_path: Path
    fs: int
    n_frames: int
    n_inputs: int
    n_outputs: int
    peak_dbfs: float
    lowered_db: float
    subtype: str
    latency_samples: int
    pre_gain_db: float


def _render_pass(
    src: Any,
    plan: RoutePlan,
    total: int,
    gain: float,
    write: Callable[[np.ndarray], None] | None,
    on_progress: Callable[[int, int], None] | None,
) -> float:
    """One streaming pass over ``src``: convolve, scale by ``gain``, hand to ``write``.

    Returns the sample peak of the (scaled) output.
    """
    h = plan.combined_filters()
    block = offline_block(h.shape[1])
    conv = BlockConvolver(h, plan.mix, block, workers=min(2, plan.n_outputs))
    src.seek(0)
    peak = 0.0
    done = 0
    while done < total:
        x = src.read(block, dtype="float64", always_2d=True)
        n = x.shape[0]
        frame = np.zeros((plan.n_inputs, block))
        frame[:, :n] = x.T
        if not np.all(np.isfinite(frame)):
            raise InputFileError(f"{src.name}: holds NaN or infinite samples")
        y = conv.process(frame)
        keep = min(block, total - done)
        y = gain * y[:, :keep]
        peak = max(peak, float(np.max(np.abs(y))) if y.size else 0.0)
        if write is not None:
            write(y.T)
        done += keep
        if on_progress is not None:
            on_progress(done, total)
    return peak


def apply_file(
    in_path: str | Path,
    design_dir: str | Path,
    out_path: str | Path,
    subtype: str = "FLOAT",
    lower: bool = True,
    on_progress: Callable[[int, int], None] | None = None,
) -> ApplyResult:
    """Convolve an audio file through a design's routes and write the result.

    The output holds every output channel of the design (in output order) and
    the whole convolution: ``n_frames + n_taps - 1`` (plus any trim delay)
    samples. Rendering streams in blocks; memory does not depend on the file's
    length. Nothing is ever clipped: if the sample peak exceeds full scale the
    whole file is rendered again, lowered to :data:`LOWERED_PEAK_DBFS`, and the
    amount returned (``lower``), or the call is refused (``lower=False``) and
    nothing is written (the file appears only when complete).

    Raises
    ------
    InputFileError
        Unreadable input, or channels that do not match the design's inputs.
    SettingsError
        No filters at the file's rate, an unknown subtype, output equal to input.
    SafetyError
        The output would exceed full scale and ``lower`` is false.
    """
    src_path = regular_file(in_path, "audio file")
    dst = Path(out_path)
    if subtype not in SUBTYPES:
        raise SettingsError(f"--subtype {subtype}: choose one of {', '.join(SUBTYPES)}")
    if dst.resolve() == src_path.resolve() or (dst.exists() and dst.samefile(src_path)):
        raise SettingsError(f"--out {dst}: is the input file; choose another output file")
    if dst.suffix.lower() != ".wav":
        raise SettingsError(f"--out {dst}: write a .wav file")
    if not dst.parent.is_dir():
        raise OutputError(f"--out {dst}: {dst.parent} is not an existing folder")
    if dst.is_dir():
        raise OutputError(f"--out {dst}: is a folder; name a .wav file")
    try:
        src = sf.SoundFile(str(src_path))
    except (RuntimeError, sf.LibsndfileError) as exc:
        raise InputFileError(f"{src_path}: not a readable audio file ({exc})") from None
    with src:
        fs = int(src.samplerate)
        plan = load_route_plan(design_dir, fs)
        if src.channels != plan.n_inputs:
            raise InputFileError(
                f"{src_path}: {src.channels} channel(s), but the design has {plan.n_inputs} "
                f"input(s) ({', '.join(plan.input_names)}); give a file with one channel "
                "per input"
            )
        n_frames = int(src.frames)
        total = n_frames + plan.combined_filters().shape[1] - 1
        size = total * plan.n_outputs * {"FLOAT": 4, "DOUBLE": 8, "PCM_24": 3}[subtype]
        container = "RF64" if size > _WAV_LIMIT_BYTES else "WAV"
        state = {"peak": 0.0, "gain": 1.0}

        def _pass(tmp: Path, gain: float, offset: int, of: int) -> float:
            with sf.SoundFile(str(tmp), "w", fs, plan.n_outputs, subtype, format=container) as f:
                progress = _scaled(on_progress, offset, total, of)
                return _render_pass(src, plan, total, gain, f.write, progress)

        def _write(tmp: Path) -> None:
            # one pass at unit gain; only a result above full scale is rendered again,
            # lowered (what the first pass wrote, clipped or not, is overwritten)
            peak = _pass(tmp, 1.0, 0, total)
            state["peak"] = peak
            if peak <= 1.0:
                return
            if not lower:
                raise SafetyError(
                    f"--out {dst}: the output would peak at {20 * math.log10(peak):+.2f} dBFS "
                    "and clip; leave out --no-lower to lower it, or lower the input"
                )
            state["gain"] = 10.0 ** (LOWERED_PEAK_DBFS / 20.0) / peak
            _pass(tmp, state["gain"], total, 2 * total)

        atomic_write_with(dst, _write)
    peak, gain = state["peak"], state["gain"]
    lowered_db = -20.0 * math.log10(gain)
    out_peak = peak * gain
    return ApplyResult(
        out_path=dst,
        fs=fs,
        n_frames=n_frames,
        n_inputs=plan.n_inputs,
        n_outputs=plan.n_outputs,
        peak_dbfs=20.0 * math.log10(out_peak) if out_peak > 0 else -math.inf,
        lowered_db=lowered_db,
        subtype=subtype,
        latency_samples=plan.latency_samples,
        pre_gain_db=plan.pre_gain_db,
    )


def _scaled(
    cb: Callable[[int, int], None] | None, offset: int, total: int, of: int
) -> Callable[[int, int], None] | None:
    """Progress of one pass, reported on a scale of ``of`` samples starting at ``offset``."""
    if cb is None:
        return None
    return lambda done, _t: cb(offset + done, max(of, offset + total))
