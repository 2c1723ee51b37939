"""Play and record through sounddevice (PortAudio), imported only here and lazily.

Playback and recording run in one full-duplex stream so the offset between
what is played and what is recorded is the (fixed) system latency of that
stream. Ctrl-C aborts the stream at once (no fade, no further output), and so
does a ``stop`` event (the browser app's Stop button): the audio callback
writes silence from the next buffer on and aborts its stream, and the waiting
thread raises :class:`Stopped`.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from roomcorr.errors import DeviceError, SettingsError


class Stopped(Exception):
    """A capture was stopped on request (a set ``stop`` event); the sound stopped at once.

    Not a user error: it travels like Ctrl-C (files already complete are kept).
    """


def _sd():
    """Import sounddevice, turning a missing library into a DeviceError."""
    try:
        import sounddevice
    except ImportError as exc:  # package missing
        raise DeviceError(
            "the sounddevice package is missing; reinstall roomcorr from its source folder "
            "(pip install .), which installs it"
        ) from exc
    except OSError as exc:  # PortAudio shared library missing
        raise DeviceError(
            "the PortAudio library was not found; install it (Debian/Ubuntu: "
            "sudo apt-get install libportaudio2; macOS and Windows: it comes with "
            "sounddevice), then run 'roomcorr devices'"
        ) from exc
    return sounddevice


def rescan_devices() -> None:
    """Make PortAudio enumerate devices again (after an audio server or client appeared)."""
    sd = _sd()
    sd._terminate()
    sd._initialize()


def list_devices() -> list[dict]:
    """List devices as dicts.

    Keys: index, name, hostapi, max_input_channels, max_output_channels,
    default_samplerate, default_input, default_output (bools).
    """
    sd = _sd()
    apis = sd.query_hostapis()
    try:
        def_in, def_out = (int(i) if i is not None else -1 for i in sd.default.device)
    except (TypeError, ValueError):
        def_in = def_out = -1
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
                "default_input": i == def_in,
                "default_output": i == def_out,
            }
        )
    return out


_ROLE_OPTION = {"input": "--input-device", "output": "--output-device"}


def resolve_role(device: str | int | None, role: str, n_channels: int) -> tuple[int, dict]:
    """Find the ``role`` ("input" or "output") device and check its channel count.

    ``device`` is a name part, an index (also as a string) or None for the
    system default. Errors name the role, the device and what to do.
    """
    sd = _sd()
    opt = _ROLE_OPTION[role]
    key = f"max_{role}_channels"
    try:
        if device is None:
            pair = sd.default.device
            idx = pair[0] if role == "input" else pair[1]
            if idx is None or int(idx) < 0:
                raise DeviceError(
                    f"no default {role} device on this system; choose one with {opt} "
                    "(name part or number from 'roomcorr devices')"
                )
            info = sd.query_devices(int(idx))
        else:
            dev = int(device) if isinstance(device, str) and device.strip().isdigit() else device
            info = sd.query_devices(dev)
    except (ValueError, sd.PortAudioError) as exc:
        reason = " ".join(str(exc).split())
        raise DeviceError(
            f"{role} device {device!r} not found ({reason}); run 'roomcorr devices' "
            f"to list them and pass {opt}"
        ) from exc
    idx = int(info["index"])
    have = int(info[key])
    if have == 0:
        can = "only records" if role == "output" else "only plays"
        raise DeviceError(
            f"{role} device {info['name']!r} has no {role} channels (it {can}); choose "
            f"another with {opt} (see 'roomcorr devices')"
        )
    if have < n_channels:
        what = "--outputs/--reference/--loopback" if role == "output" else "--input/--loopback"
        raise SettingsError(
            f"{role} device {info['name']!r} has {have} {role} channel(s); the chosen {what} "
            f"need {n_channels}"
        )
    return idx, dict(info)


def check_rate(idx: int, role: str, fs: int, n_channels: int) -> None:
    """Raise DeviceError when device ``idx`` cannot run ``role`` at ``fs`` Hz."""
    sd = _sd()
    info = sd.query_devices(idx)
    check = sd.check_input_settings if role == "input" else sd.check_output_settings
    try:
        check(device=idx, channels=n_channels, samplerate=fs, dtype="float32")
    except (ValueError, sd.PortAudioError) as exc:
        raise DeviceError(
            f"{role} device {info['name']!r} cannot run at {fs} Hz ({' '.join(str(exc).split())});"
            f" try --rate {int(info['default_samplerate'])}"
        ) from exc


@dataclass
class Devices:
    """The devices of one measurement, resolved and checked."""

    input_index: int
    input_name: str
    output_index: int
    output_name: str
    two_streams: bool

    def to_dict(self) -> dict:
        return {
            "input": self.input_name,
            "output": self.output_name,
            "input_index": self.input_index,
            "output_index": self.output_index,
            "two_streams": self.two_streams,
        }


def open_devices(
    fs: int,
    n_in: int,
    n_out: int,
    device: str | int | None = None,
    input_device: str | int | None = None,
    output_device: str | int | None = None,
    two_streams: bool | None = None,
) -> Devices:
    """Resolve both devices and check they run at ``fs`` (before anything plays).

    ``input_device`` / ``output_device`` default to ``device``. Two streams are
    used when the devices differ, or when ``two_streams`` is True.
    """
    in_dev = input_device if input_device is not None else device
    out_dev = output_device if output_device is not None else device
    i_in, info_in = resolve_role(in_dev, "input", n_in)
    i_out, info_out = resolve_role(out_dev, "output", n_out)
    check_rate(i_in, "input", fs, n_in)
    check_rate(i_out, "output", fs, n_out)
    two = bool(two_streams) if two_streams is not None else i_in != i_out
    return Devices(i_in, str(info_in["name"]), i_out, str(info_out["name"]), two)


@contextlib.contextmanager
def sigint_deferred() -> Iterator[None]:
    """Hold Ctrl-C back (in this thread) while PortAudio talks to the audio server.

    A SIGINT landing inside such a call (opening, starting, closing a stream) makes
    the audio server's request fail half-way; with JACK, PortAudio then aborts the
    whole program at exit. Held back for those milliseconds, the interrupt arrives
    right after the call, and the stream is aborted as usual. Where signal masks do
    not exist (Windows) this does nothing.
    """
    if threading.current_thread() is not threading.main_thread() or not hasattr(
        signal, "pthread_sigmask"
    ):
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


_PROBLEM_FLAGS = ("input_overflow", "input_underflow", "output_overflow", "output_underflow")


@dataclass
class Capture:
    """Result of one play-and-record run.

    Attributes
    ----------
    recording : ndarray, shape (n_inputs, n_samples)
        Inputs in the order asked for. With one stream (``aligned``) sample 0 is
        aligned with output sample 0; with two streams the recording starts
        somewhat before the playback and runs on after it, and where the sweep
        landed is found from the recording itself (:mod:`roomcorr.measure.timing`).
    stream_problems : int
        Callbacks that reported dropped or repeated buffers (over/underflow).
    status_flags : list[str]
        Distinct flag names seen.
    aligned : bool
        True for one full-duplex stream.
    """

    recording: np.ndarray
    stream_problems: int
    status_flags: list[str]
    aligned: bool = True


#: Called about 20 times a second while a capture runs: (fraction done, input
#: peak dBFS, input RMS dBFS) of the latest block of the first input channel.
Progress = Callable[[float, float, float], None]


def _levels(block: np.ndarray) -> tuple[float, float]:
    x = block[:, 0] if block.ndim == 2 else block
    peak = float(np.max(np.abs(x))) if x.size else 0.0
    rms = float(np.sqrt(np.mean(x.astype(np.float64) ** 2))) if x.size else 0.0
    return (20 * np.log10(max(peak, 1e-10)), 20 * np.log10(max(rms, 1e-10)) + 3.0103)


def play_record(
    signal: np.ndarray,
    fs: int,
    out_channels: list[int],
    in_channels: list[int],
    device: str | int | None = None,
    blocksize: int = 0,
    preroll_s: float = 0.2,
    *,
    devices: Devices | None = None,
    extra_s: float = 1.0,
    progress: Progress | None = None,
    stop: threading.Event | None = None,
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
        PortAudio device for both directions (name substring or index); None =
        default. Ignored when ``devices`` is given.
    blocksize : int
        Frames per callback (0 = chosen by the audio system).
    preroll_s : float
        Silence played first so the device settles (one stream: its recording is
        discarded).
    devices : Devices, optional
        From :func:`open_devices`; decides between one and two streams.
    extra_s : float
        Two streams: recording kept running this long after the playback ends
        (room for the latency and for the second stream's later start).
    progress : callable, optional
        See :data:`Progress`.
    stop : threading.Event, optional
        When set, the output goes silent within one buffer, the stream is
        aborted and :class:`Stopped` is raised.

    Returns
    -------
    Capture
    """
    sd = _sd()
    if stop is not None and stop.is_set():
        raise Stopped("stopped before the capture started")
    signal = np.atleast_2d(np.asarray(signal, dtype=np.float32))
    n_out = max(out_channels)
    n_in = max(in_channels)
    if devices is None:
        devices = open_devices(fs, n_in, n_out, device)
    n_pre = int(round(preroll_s * fs))
    n_total = n_pre + signal.shape[1]
    out_buf = np.zeros((n_total, n_out), dtype=np.float32)
    for row, ch in enumerate(out_channels):
        out_buf[n_pre:, ch - 1] += signal[row]
    if devices.two_streams:
        rec, problems, flags = _two_streams(
            sd, out_buf, fs, n_in, devices, blocksize, int(round(extra_s * fs)), progress, stop
        )
        rec = rec[:, [c - 1 for c in in_channels]].T.astype(np.float64)
        return Capture(rec, problems, flags, aligned=False)
    in_buf = np.zeros((n_total, n_in), dtype=np.float32)
    state = {"pos": 0, "problems": 0, "flags": set(), "lv": (-200.0, -200.0)}
    done = threading.Event()

    def callback(indata, outdata, frames, _time, status):
        pos, n = _play_block(sd, outdata, frames, status, state, out_buf, stop)
        if n > 0:
            in_buf[pos : pos + n] = indata[:n]
        state["lv"] = _levels(indata)
        if state["pos"] >= n_total:
            raise sd.CallbackStop

    _run_stream(
        sd,
        lambda: sd.Stream(
            device=(devices.input_index, devices.output_index),
            samplerate=fs,
            channels=(n_in, n_out),
            dtype="float32",
            blocksize=blocksize,
            callback=callback,
            finished_callback=done.set,
        ),
        f"device {devices.output_name!r}",
        fs,
        done,
        state,
        n_total,
        progress,
        stop,
    )
    rec = in_buf[n_pre:, [c - 1 for c in in_channels]].T.astype(np.float64)
    return Capture(rec, int(state["problems"]), sorted(state["flags"]))


def _run_stream(
    sd,
    make: Callable,
    what: str,
    fs: int,
    done: threading.Event,
    state: dict,
    n_total: int,
    progress: Progress | None,
    stop: threading.Event | None = None,
) -> None:
    """Open one stream with ``make()``, run it to the end; Ctrl-C or ``stop`` aborts it."""
    try:
        with sigint_deferred():
            stream = make()
            stream.start()
    except sd.PortAudioError as exc:
        raise DeviceError(f"could not open {what} at {fs} Hz: {exc}") from exc
    try:
        _wait(done, state, n_total, progress, stop=stop)
    except (KeyboardInterrupt, Stopped):
        with sigint_deferred():
            stream.abort()  # stop sound output at once
        raise
    finally:
        with sigint_deferred(), contextlib.suppress(sd.PortAudioError):
            stream.stop()
            stream.close()
    if state["pos"] < n_total:
        raise DeviceError(
            f"{what} stopped after {state['pos'] / fs:.1f} s of {n_total / fs:.1f} s "
            "(disconnected?); this take was not kept"
        )


def _play_block(
    sd,
    outdata: np.ndarray,
    frames: int,
    status: Any,
    state: dict,
    out_buf: np.ndarray,
    stop: threading.Event | None,
) -> tuple[int, int]:
    """Fill one output block from ``out_buf`` at ``state["pos"]`` (silence after its end).

    Returns the block's start position and how many of its frames came from
    ``out_buf``; advances ``state["pos"]``. A set ``stop`` silences the block and
    aborts the stream (``sd.CallbackAbort``): the loudspeakers go quiet within
    one buffer.
    """
    if stop is not None and stop.is_set():
        outdata.fill(0)
        raise sd.CallbackAbort
    pos = state["pos"]
    _note_status(state, status)
    n = max(min(frames, out_buf.shape[0] - pos), 0)
    outdata[:n] = out_buf[pos : pos + n]
    outdata[n:] = 0
    state["pos"] = pos + n
    return pos, n


def _recorder(
    sd, buf: np.ndarray, state: dict, level_col: int, after_block: Callable | None = None
) -> Callable:
    """Input callback filling ``buf`` (n, channels) until full; meter from ``level_col``."""
    n_rec = buf.shape[0]

    def cb(indata, frames, _time, status):
        pos = state["pos"]
        _note_status(state, status)
        n = min(frames, n_rec - pos)
        if n > 0:
            buf[pos : pos + n] = indata[:n]
        state["pos"] = pos + max(n, 0)
        state["lv"] = _levels(indata[:, level_col:])
        if after_block is not None:
            after_block()
        if state["pos"] >= n_rec:
            raise sd.CallbackStop

    return cb


def _note_status(state: dict, status) -> None:
    if status:
        names = [n for n in _PROBLEM_FLAGS if getattr(status, n, False)]
        if names:
            state["problems"] += 1
            state["flags"].update(names)


def _wait(
    done: threading.Event,
    state: dict,
    n_total: int,
    progress: Progress | None,
    stall_s: float = 10.0,
    stop: threading.Event | None = None,
) -> None:
    """Wait for ``done``; report progress; give up when the position stops moving.

    Raises :class:`Stopped` as soon as ``stop`` is set (checked every 50 ms; the
    audio callback itself has already silenced the output).
    """
    last, still = -1, 0.0
    while not done.wait(0.05):
        if stop is not None and stop.is_set():
            raise Stopped("stopped on request")
        pos = state["pos"]
        if progress is not None:
            progress(min(pos / n_total, 1.0), *state["lv"])
        if pos == last:
            still += 0.05
            if still > stall_s:
                return  # the caller reports the short recording
        else:
            last, still = pos, 0.0
    if stop is not None and stop.is_set():  # the callback aborted its stream
        raise Stopped("stopped on request")


def _two_streams(
    sd,
    out_buf: np.ndarray,
    fs: int,
    n_in: int,
    devices: Devices,
    blocksize: int,
    n_extra: int,
    progress: Progress | None,
    stop: threading.Event | None = None,
) -> tuple[np.ndarray, int, list[str]]:
    """Record with one stream and play with another; the recording starts first."""
    n_play = out_buf.shape[0]
    n_rec = n_play + n_extra
    in_buf = np.zeros((n_rec, n_in), dtype=np.float32)
    st_in = {"pos": 0, "problems": 0, "flags": set(), "lv": (-200.0, -200.0)}
    st_out = {"pos": 0, "problems": 0, "flags": set(), "lv": (-200.0, -200.0)}
    in_started, in_done, out_done = threading.Event(), threading.Event(), threading.Event()

    def after_block() -> None:
        st_out["lv"] = st_in["lv"]  # the meter shows the microphone
        in_started.set()

    in_cb = _recorder(sd, in_buf, st_in, 0, after_block)

    def out_cb(outdata, frames, _time, status):
        _play_block(sd, outdata, frames, status, st_out, out_buf, stop)
        if st_out["pos"] >= n_play:
            raise sd.CallbackStop

    try:
        with sigint_deferred():
            s_in = sd.InputStream(
                device=devices.input_index,
                samplerate=fs,
                channels=n_in,
                dtype="float32",
                blocksize=blocksize,
                callback=in_cb,
                finished_callback=in_done.set,
            )
    except sd.PortAudioError as exc:
        raise DeviceError(
            f"could not open input device {devices.input_name!r} at {fs} Hz: {exc}"
        ) from exc
    try:
        with sigint_deferred():
            s_out = sd.OutputStream(
                device=devices.output_index,
                samplerate=fs,
                channels=out_buf.shape[1],
                dtype="float32",
                blocksize=blocksize,
                callback=out_cb,
                finished_callback=out_done.set,
            )
    except sd.PortAudioError as exc:
        with sigint_deferred():
            s_in.close()
        raise DeviceError(
            f"could not open output device {devices.output_name!r} at {fs} Hz: {exc}"
        ) from exc
    try:
        with sigint_deferred():
            s_in.start()
        if not in_started.wait(5.0):
            raise DeviceError(
                f"input device {devices.input_name!r} delivers no audio (is it in use by "
                "another program, or unplugged?)"
            )
        with sigint_deferred():
            s_out.start()
        _wait(out_done, st_out, n_play, progress, stop=stop)
        if st_out["pos"] < n_play:
            raise DeviceError(
                f"output device {devices.output_name!r} stopped after "
                f"{st_out['pos'] / fs:.1f} s of {n_play / fs:.1f} s (disconnected?); this "
                "sweep was not kept"
            )
        _wait(in_done, st_in, n_rec, None, stop=stop)
        if st_in["pos"] < n_rec:
            raise DeviceError(
                f"input device {devices.input_name!r} stopped after {st_in['pos'] / fs:.1f} s "
                "(disconnected?); this sweep was not kept"
            )
    except (KeyboardInterrupt, Stopped):
        with sigint_deferred():
            s_out.abort()  # stop sound output at once
            s_in.abort()
        raise
    finally:
        for st in (s_out, s_in):
            with sigint_deferred(), contextlib.suppress(sd.PortAudioError):
                st.abort()
                st.close()
    flags = sorted(st_in["flags"] | st_out["flags"])
    return in_buf, int(st_in["problems"] + st_out["problems"]), flags


def record(
    fs: int,
    in_channel: int,
    duration_s: float,
    device: str | int | None = None,
    blocksize: int = 0,
    progress: Progress | None = None,
) -> np.ndarray:
    """Record ``duration_s`` from one input channel (1-based) of ``device``; nothing plays.

    Returns
    -------
    ndarray, shape (n_samples,)
    """
    sd = _sd()
    idx, info = resolve_role(device, "input", in_channel)
    check_rate(idx, "input", fs, in_channel)
    n = int(round(duration_s * fs))
    buf = np.zeros((n, in_channel), dtype=np.float32)
    state = {"pos": 0, "problems": 0, "flags": set(), "lv": (-200.0, -200.0)}
    done = threading.Event()

    cb = _recorder(sd, buf, state, in_channel - 1)

    _run_stream(
        sd,
        lambda: sd.InputStream(
            device=idx,
            samplerate=fs,
            channels=in_channel,
            dtype="float32",
            blocksize=blocksize,
            callback=cb,
            finished_callback=done.set,
        ),
        f"input device {info['name']!r}",
        fs,
        done,
        state,
        n,
        progress,
    )
    return buf[:, in_channel - 1].astype(np.float64)
