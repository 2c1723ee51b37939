"""The only module of playback/ that opens an audio device (through sounddevice).

:func:`play` streams music through :class:`~roomcorr.playback.realtime.ListeningPaths`
in the PortAudio callback, block by block; the caller switches the paths and
changes the level from another thread while it plays.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from roomcorr.measure.capture import _sd, check_rate, resolve_role
from roomcorr.playback.realtime import ListeningPaths


@dataclass
class PlaybackStatus:
    """What happened while playing: blocks played and any buffer the device lost."""

    blocks: int = 0
    underflows: int = 0
    problems: list[str] = field(default_factory=list)


def play(
    paths: ListeningPaths,
    music: np.ndarray,
    device: str | int | None = None,
    stop: threading.Event | None = None,
    on_block: Callable[[int], None] | None = None,
    loop: bool = False,
) -> PlaybackStatus:
    """Play ``music`` (n_inputs, n_samples) through ``paths`` until it ends or ``stop`` is set.

    Raises
    ------
    DeviceError
        No such output device, too few channels, or the rate is not supported.
    """
    sd = _sd()
    fs = paths.plan.fs
    n_out = paths.plan.n_outputs
    idx, _info = resolve_role(device, "output", n_out)
    check_rate(idx, "output", fs, n_out)
    status = PlaybackStatus()
    stop = stop or threading.Event()
    done = threading.Event()
    b = paths.block
    n = music.shape[1]
    state = {"pos": 0}

    def callback(outdata, frames, _time, flags):  # PortAudio's thread
        if flags.output_underflow:
            status.underflows += 1
        pos = state["pos"]
        x = np.zeros((music.shape[0], frames))
        take = max(0, min(frames, n - pos))
        x[:, :take] = music[:, pos : pos + take]
        if loop and take < frames:
            x[:, take:] = music[:, : frames - take]
            state["pos"] = frames - take
        else:
            state["pos"] = pos + frames
        outdata[:] = paths.process(x).T
        status.blocks += 1
        if on_block is not None:
            on_block(status.blocks)
        if stop.is_set() or (not loop and pos >= n + paths.plan.filters.shape[1]):
            raise sd.CallbackStop

    with sd.OutputStream(
        samplerate=fs,
        blocksize=b,
        device=idx,
        channels=n_out,
        dtype="float32",
        callback=callback,
        finished_callback=done.set,
    ):
        while not done.wait(0.1):
            if stop.is_set():
                break
    return status
