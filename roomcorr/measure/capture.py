"""Play and record through sounddevice (PortAudio), imported only here and lazily.

Playback and recording run in one full-duplex stream so the offset between
what is played and what is recorded is the (fixed) system latency of that
stream. Ctrl-C aborts the stream at once (no fade, no further output).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from roomcorr.errors import DeviceError, SettingsError


def _sd():
    """Import sounddevice, turning a missing library into a DeviceError."""
    try:
        import sounddevice
    except ImportError as exc:  # package missing
        raise DeviceError(
            "the sounddevice package is missing; install roomcorr with the 'measure' extra "
            "(pip install 'roomcorr[measure]')"
        ) from exc
    except OSError as exc:  # PortAudio shared library missing
        raise DeviceError(
            "the PortAudio library was not found; install it (Debian/Ubuntu: "
            "sudo apt-get install libportaudio2) and the 'measure' extra"
        ) from exc
    return sounddevice


def rescan_devices() -> None:
    """Make PortAudio enumerate devices again (after an audio server or client appeared)."""
    sd = _sd()
    sd._terminate()
    sd._initialize()


def list_devices() -> list[dict]:
    """List devices as dicts.

    Keys: index, name, hostapi, max_input_channels, max_output_channels, default_samplerate.
    """
    sd = _sd()
    apis = sd.query_hostapis()
    out = []
    for i, d in enumerate(sd.query_devices()):
        out.append(
            {
                "index": i,
                "name": d["name"],
                "hostapi": apis[d["hostapi"]]["name"],
                "max_input_channels": int(d["max_input_channels"]),
                "max_output_channels": int(d["max_output_channels"]),
                "default_samplerate": float(d["default_samplerate"]),
            }
        )
    return out


def resolve_device(device: str | int | None, n_in: int, n_out: int) -> tuple[int, dict]:
    """Find ``device`` (name substring, index or default) and check its channel counts."""
    sd = _sd()
    try:
        if device is None:
            idx_in, idx_out = sd.default.device
            idx = idx_out if idx_out is not None and idx_out >= 0 else idx_in
            info = sd.query_devices(idx)
        else:
            dev = int(device) if isinstance(device, str) and device.isdigit() else device
            info = sd.query_devices(dev)
            idx = int(info["index"])
    except (ValueError, sd.PortAudioError) as exc:
        raise DeviceError(
            f"audio device {device!r} not found ({exc}); run 'roomcorr devices' to list them"
        ) from exc
    if info["max_output_channels"] < n_out or info["max_input_channels"] < n_in:
        raise SettingsError(
            f"device {info['name']!r} has {info['max_output_channels']} outputs and "
            f"{info['max_input_channels']} inputs; the chosen --outputs/--input/--loopback "
            f"need {n_out} and {n_in}"
        )
    return int(idx), dict(info)


_PROBLEM_FLAGS = ("input_overflow", "input_underflow", "output_overflow", "output_underflow")


@dataclass
class Capture:
    """Result of one play-and-record run.

    Attributes
    ----------
    recording : ndarray, shape (n_inputs, n_samples)
        Inputs in the order asked for; sample 0 is aligned with output sample 0.
    stream_problems : int
        Callbacks that reported dropped or repeated buffers (over/underflow).
    status_flags : list[str]
        Distinct flag names seen.
    """

    recording: np.ndarray
    stream_problems: int
    status_flags: list[str]


def play_record(
    signal: np.ndarray,
    fs: int,
    out_channels: list[int],
    in_channels: list[int],
    device: str | int | None = None,
    blocksize: int = 0,
    preroll_s: float = 0.2,
) -> Capture:
    """Play ``signal`` on ``out_channels`` while recording ``in_channels``.

    Parameters
    ----------
    signal : ndarray, shape (len(out_channels), n_samples)
        Float samples, full scale 1.0.
    fs : int
        Sample rate.
    out_channels, in_channels : list[int]
        1-based device channels.
    device : str | int | None
        PortAudio device (name substring or index); None = default.
    blocksize : int
        Frames per callback (0 = chosen by the audio system).
    preroll_s : float
        Silence played (and recording discarded) first so the device settles.

    Returns
    -------
    Capture
    """
    sd = _sd()
    signal = np.atleast_2d(np.asarray(signal, dtype=np.float32))
    n_out = max(out_channels)
    n_in = max(in_channels)
    idx, _ = resolve_device(device, n_in, n_out)
    n_pre = int(round(preroll_s * fs))
    n_total = n_pre + signal.shape[1]
    out_buf = np.zeros((n_total, n_out), dtype=np.float32)
    for row, ch in enumerate(out_channels):
        out_buf[n_pre:, ch - 1] = signal[row]
    in_buf = np.zeros((n_total, n_in), dtype=np.float32)
    state = {"pos": 0, "problems": 0, "flags": set()}
    done = threading.Event()

    def callback(indata, outdata, frames, _time, status):
        pos = state["pos"]
        if status:
            names = [n for n in _PROBLEM_FLAGS if getattr(status, n)]
            if names:
                state["problems"] += 1
                state["flags"].update(names)
        n = min(frames, n_total - pos)
        if n > 0:
            outdata[:n] = out_buf[pos : pos + n]
            in_buf[pos : pos + n] = indata[:n]
        outdata[max(n, 0) :] = 0
        state["pos"] = pos + max(n, 0)
        if state["pos"] >= n_total:
            raise sd.CallbackStop

    try:
        stream = sd.Stream(
            device=(idx, idx),
            samplerate=fs,
            channels=(n_in, n_out),
            dtype="float32",
            blocksize=blocksize,
            callback=callback,
            finished_callback=done.set,
        )
    except sd.PortAudioError as exc:
        raise DeviceError(f"could not open the audio device at {fs} Hz: {exc}") from exc
    with stream:
        try:
            while not done.wait(0.05):
                pass
        except KeyboardInterrupt:
            stream.abort()  # stop sound output at once
            raise
    rec = in_buf[n_pre:, [c - 1 for c in in_channels]].T.astype(np.float64)
    return Capture(rec, int(state["problems"]), sorted(state["flags"]))
