"""Measuring as the application layer: devices, a wiring test tone, a whole run, Stop.

The command line (``roomcorr measure``, ``roomcorr devices``) and the browser
app call these functions; neither orchestrates a measurement on its own.

* :func:`devices_view` lists the audio devices and the pair the room's latest
  measurement used.
* :func:`play_test_tone` plays a short quiet tone on one loudspeaker output
  (:data:`TEST_TONE_DBFS`, never above the sweep level or its cap) and says
  whether the microphone heard it: a wiring check before the first sweep.
* :func:`measure_in_room` runs :func:`roomcorr.measure.session.run_measurement`
  into a new measurement run of a room (the room lock and run folder of
  ``roomcorr measure`` in a room), reporting each step to an ``events``
  callback (level meter about 20 times a second, position and loudspeaker,
  gates, prompts, finished / stopped / failed). A ``stop`` event silences the
  output at once; the unfinished run stays as Ctrl-C leaves it (resumable; a run
  stopped before anything was written is removed).
* :func:`measure_into` is the same for a plain output folder (``--out``).
* :func:`calibrate_microphone` reads an acoustic calibrator (``calibrate-mic``).
* Cautions: :func:`acknowledge_cautions` stores, once per room, that the user
  read them (``cautions-acknowledged.json`` in the room folder, written
  atomically); the browser app refuses sound without it.
* :class:`MeasureJob` runs one measurement in a thread for the browser app:
  prompts are answered with :meth:`MeasureJob.answer`, :meth:`MeasureJob.stop`
  stops it.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import queue
import threading
import weakref
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.through import load_through, through_summary
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.errors import (
    DeviceError,
    InputFileError,
    RoomcorrError,
    SafetyError,
    SettingsError,
)
from roomcorr.measure import capture
from roomcorr.measure.levels import rms_dbfs, sensitivity_from_calibrator
from roomcorr.measure.session import (
    CAUTIONS,
    RECORD_NAME,
    copy_unfinished,
    run_measurement,
    write_record,
)
from roomcorr.measure.settings import LEVEL_CAP_DBFS, SENSITIVITY_RANGE_DBFS, MeasureSettings

#: Peak level of the wiring test tone (dBFS): as quiet as the level check's range,
#: well below the sweep's default of -20 dBFS (common practice: a wiring check is
#: made quietly, the level is set later).
TEST_TONE_DBFS = -30.0
TEST_TONE_S = 1.0
#: A low-midrange tone reaches woofers, full-range loudspeakers and most
#: subwoofers' upper band alike.
TEST_TONE_HZ = 250.0
TEST_TONE_FADE_S = 0.05
#: Tone-bin level over the silence before it (dB) above which the tone counts as heard.
HEARD_TONE_DB = 10.0

CAUTIONS_FILE = "cautions-acknowledged.json"

#: Keys of ``[measure]`` the browser app may set for one run; the gate limits,
#: the quiet level-check level and the SPL warning stay as the room's settings
#: file gives them.
APP_MEASURE_KEYS = frozenset(
    {
        "device",
        "input_device",
        "output_device",
        "two_streams",
        "outputs",
        "names",
        "input",
        "positions",
        "level_dbfs",
        "allow_loud",
        "sweep_s",
        "repeats",
        "sample_rate",
        "reference",
        "mic_sensitivity_dbfs",
        "blocksize",
    }
)

Events = Callable[[dict[str, Any]], None]


# --------------------------------------------------------------------------- devices


def last_devices(room: rooms.Room | None) -> dict[str, Any] | None:
    """Devices of the room's latest measurement that recorded them (or None)."""
    if room is None:
        return None
    try:
        for run in reversed(rooms.list_runs(room, "measurement")):
            path = Path(run.path) / RECORD_NAME
            if path.is_file():
                record = read_json(path, RECORD_NAME)  # size and depth limits
                devs = record.get("devices") if isinstance(record, dict) else None
                if isinstance(devs, dict):
                    return devs
    except (RoomcorrError, OSError):
        return None
    return None


def devices_view(room: rooms.Room | None = None) -> dict[str, Any]:
    """Audio devices (``capture.list_devices`` entries) and the pair last used in the room.

    Raises
    ------
    DeviceError
        When PortAudio sees no device at all.
    """
    devs = capture.list_devices()
    if not devs:
        raise DeviceError(
            "no audio devices found: plug in the microphone and the output, close programs "
            "that hold them, then run 'roomcorr devices' again"
        )
    return {"devices": devs, "last": last_devices(room) or {}}


def calibrate_microphone(
    fs: int,
    input_channel: int,
    seconds: float,
    device: str | int | None = None,
    calibrator_level_db: float = 94.0,
    view: Any = None,
) -> dict[str, float]:
    """Record an acoustic calibrator on the microphone (nothing plays); its sensitivity.

    Returns ``{"sensitivity_dbfs", "fraction_at_1k"}`` (dBFS read for 94 dB SPL,
    and the share of the level near 1 kHz). Refuses a reading without a steady
    1 kHz tone or outside the plausible range, naming the input.
    """
    if calibrator_level_db not in (94.0, 114.0):
        raise SettingsError("--calibrator-level: acoustic calibrators give 94 or 114 dB SPL")
    if not 1.0 <= seconds <= 30.0:
        raise SettingsError("--seconds: use 1 to 30")
    if view is not None:
        view.start(f"recording the calibrator at input {input_channel}", seconds)
    try:
        x = capture.record(
            fs, input_channel, seconds, device, progress=None if view is None else view.update
        )
    finally:
        if view is not None:
            view.stop()
    x = x[int(0.5 * fs) :]  # the first half second may hold the stream's start
    sens, frac = sensitivity_from_calibrator(x, fs, calibrator_level_db)
    lo, hi = SENSITIVITY_RANGE_DBFS
    if frac < 0.9:
        raise InputFileError(
            f"input {input_channel}: no steady 1 kHz tone ({frac:.0%} of the level near 1 kHz, "
            f"input at {rms_dbfs(x):.1f} dBFS); is the calibrator on and seated on the "
            "microphone?"
        )
    if not lo <= sens <= hi:
        raise InputFileError(
            f"input {input_channel}: the reading gives {sens:.1f} dBFS for 94 dB SPL, outside "
            f"{lo:g} to {hi:g}; check the input gain (clipping or far too low)"
        )
    return {"sensitivity_dbfs": float(sens), "fraction_at_1k": float(frac)}


# --------------------------------------------------------------------------- cautions


def cautions_view(room: rooms.Room) -> dict[str, Any]:
    """The cautions shown before the first sweep and whether this room acknowledged them."""
    path = room.root / CAUTIONS_FILE
    ack = None
    try:
        data = read_json(path, CAUTIONS_FILE) if path.is_file() else None
        if isinstance(data, dict) and data.get("text") == CAUTIONS:
            ack = data.get("acknowledged_utc")
    except RoomcorrError:
        ack = None
    return {
        "text": CAUTIONS,
        "acknowledged": ack is not None,
        "acknowledged_utc": ack,
        "level_cap_dbfs": LEVEL_CAP_DBFS,
        "test_tone_dbfs": TEST_TONE_DBFS,
    }


def acknowledge_cautions(room: rooms.Room) -> dict[str, Any]:
    """Record in the room folder (atomically, under the room lock) that the cautions were read.

    The text itself is stored: a changed caution text needs a new acknowledgement.
    """
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    with rooms.room_lock(room, "storing the cautions' acknowledgement"):
        atomic_write_text(
            room.root / CAUTIONS_FILE,
            json.dumps({"text": CAUTIONS, "acknowledged_utc": now}, indent=2) + "\n",
        )
    return cautions_view(room)


def require_acknowledged(room: rooms.Room) -> None:
    """Raise :class:`SafetyError` unless the room's cautions were acknowledged."""
    if not cautions_view(room)["acknowledged"]:
        raise SafetyError(
            f"{room.root}: read and acknowledge the cautions before any sound is played "
            "(start quietly, protect your hearing, respect the loudspeakers' limits)"
        )


# --------------------------------------------------------------------------- settings


def settings_for_room(room: rooms.Room, changes: dict[str, Any] | None = None) -> MeasureSettings:
    """The room's ``[measure]`` settings with the app's changes (keys of :data:`APP_MEASURE_KEYS`).

    Every value is checked as the same key of a settings file would be, so the
    level cap holds: a sweep above it needs ``allow_loud`` set explicitly, as
    ``--allow-loud`` on the command line.
    """
    base = dict(rooms.load_room_settings(room).measure)
    changes = dict(changes or {})
    unknown = sorted(set(changes) - APP_MEASURE_KEYS)
    if unknown:
        raise SettingsError(f"measure settings: {unknown} cannot be set here")
    for key in ("outputs", "names"):
        if key in changes and changes[key] is not None and not isinstance(changes[key], list):
            raise SettingsError(f"measure settings: {key} must be a list")
    if "outputs" in changes and changes["outputs"] is not None:
        if not all(isinstance(c, int) and not isinstance(c, bool) for c in changes["outputs"]):
            raise SettingsError("measure settings: outputs must be whole channel numbers")
    if "allow_loud" in changes and not isinstance(changes["allow_loud"], bool):
        raise SettingsError("measure settings: allow_loud must be true or false")
    base.update({k: v for k, v in changes.items() if v is not None and v != ""})
    return MeasureSettings.from_dict(base, "measure settings")


# --------------------------------------------------------------------------- test tone


def tone_signal(fs: int, level_dbfs: float, freq_hz: float = TEST_TONE_HZ) -> np.ndarray:
    """The test tone: a sine of ``TEST_TONE_S`` with raised-cosine fades, peak ``level_dbfs``.

    Returns
    -------
    ndarray, shape (n_samples,)
    """
    n = int(round(TEST_TONE_S * fs))
    t = np.arange(n) / fs
    x = np.sin(2 * np.pi * freq_hz * t)
    n_fade = int(round(TEST_TONE_FADE_S * fs))
    fade = 0.5 - 0.5 * np.cos(np.pi * np.arange(n_fade) / n_fade)
    x[:n_fade] *= fade
    x[n - n_fade :] *= fade[::-1]
    return x * 10 ** (level_dbfs / 20) / max(float(np.max(np.abs(x))), 1e-12)


def _tone_level_db(x: np.ndarray, fs: int, freq_hz: float) -> float:
    """Level (dB, arbitrary reference) of ``x`` at ``freq_hz``: Hann-windowed DFT bin."""
    if x.size == 0:
        return -300.0
    w = np.hanning(x.size)
    k = np.exp(-2j * np.pi * freq_hz * np.arange(x.size) / fs)
    amp = 2 * abs(np.sum(x * w * k)) / max(float(np.sum(w)), 1e-12)
    return 20 * math.log10(max(amp, 1e-15))


def play_test_tone(
    ms: MeasureSettings,
    output: int,
    stop: threading.Event | None = None,
    meter: Callable[[float, float, float], None] | None = None,
) -> dict[str, Any]:
    """Play the quiet test tone on ``output`` and listen with the microphone.

    The tone's peak is ``TEST_TONE_DBFS``, and never above the sweep level or its
    cap. Returns ``{"output", "level_dbfs", "freq_hz", "input_peak_dbfs",
    "input_rms_dbfs", "heard_db", "heard", "advice"}`` (``heard_db``: the tone's
    level at the microphone over the same frequency in the silence before it).
    """
    ms.validate()
    if output not in ms.outputs and output != ms.reference_output:
        raise SettingsError(f"test tone: output {output} is not one of the loudspeakers")
    level = min(TEST_TONE_DBFS, ms.level_dbfs, LEVEL_CAP_DBFS)
    fs = ms.sample_rate
    n_lead = int(round(0.3 * fs))
    tone = tone_signal(fs, level)
    sig = np.concatenate([np.zeros(n_lead), tone, np.zeros(int(round(0.2 * fs)))])
    devices = capture.open_devices(
        fs,
        ms.input,
        max(ms.outputs),
        ms.device,
        ms.input_device,
        ms.output_device,
        ms.two_streams,
    )
    cap = capture.play_record(
        sig[None, :],
        fs,
        [output],
        [ms.input],
        blocksize=ms.blocksize,
        devices=devices,
        progress=meter,
        stop=stop,
        extra_s=0.3,
    )
    rec = cap.recording[0]
    lead = rec[: n_lead - int(0.05 * fs)] if cap.aligned else rec[: int(0.15 * fs)]
    body = rec[n_lead:] if cap.aligned else rec
    heard_db = _tone_level_db(body, fs, TEST_TONE_HZ) - _tone_level_db(lead, fs, TEST_TONE_HZ)
    heard = bool(heard_db >= HEARD_TONE_DB)
    peak = float(20 * np.log10(max(float(np.max(np.abs(rec))) if rec.size else 0.0, 1e-10)))
    advice = (
        f"output {output}: the microphone heard the tone ({heard_db:.0f} dB over the quiet)"
        if heard
        else f"output {output}: the microphone did not hear the tone; check the cable to this "
        "loudspeaker, its amplifier and volume, and the microphone input"
    )
    return {
        "output": output,
        "level_dbfs": level,
        "freq_hz": TEST_TONE_HZ,
        "input_peak_dbfs": peak,
        "input_rms_dbfs": rms_dbfs(rec),
        "heard_db": round(float(heard_db), 1),
        "heard": heard,
        "advice": advice,
    }


# --------------------------------------------------------------------------- measuring


class EventView:
    """The live view of :func:`run_measurement` turned into events for ``events``.

    ``meter`` events carry the input peak and RMS (dBFS, of the latest audio
    block) and the fraction done of the current capture, about 20 a second.
    """

    def __init__(self, events: Events, say: Callable[[str], None] | None = None) -> None:
        self.events = events
        self.sensitivity_dbfs: float | None = None
        self._say = say
        self._label = ""

    def __enter__(self) -> EventView:
        return self

    def __exit__(self, *exc: Any) -> None:
        return None

    def say(self, text: str) -> None:
        if self._say is not None:
            self._say(text)
        self.events({"type": "say", "text": text})

    def start(self, label: str, duration_s: float) -> None:
        self._label = label
        self.events({"type": "capture", "label": label, "duration_s": round(duration_s, 3)})

    def update(self, fraction: float, peak_dbfs: float, rms_dbfs: float) -> None:
        self.events(
            {
                "type": "meter",
                "label": self._label,
                "fraction": round(float(fraction), 4),
                "peak_dbfs": round(float(peak_dbfs), 2),
                "rms_dbfs": round(float(rms_dbfs), 2),
            }
        )

    def stop(self) -> None:
        self.events({"type": "capture_done", "label": self._label})


def _finish_through(ms: MeasureSettings, out: Path, record: dict, thru: dict | None, say) -> None:
    if thru is None:
        return
    record["through"]["check"] = through_summary(ms, out, record, thru, say)
    write_record(out / RECORD_NAME, record)


def measure_into(
    ms: MeasureSettings,
    out: str | Path,
    *,
    through: str | Path | None = None,
    **kw: Any,
) -> dict:
    """Measure into a plain output folder (``roomcorr measure --out``).

    ``through`` names a design folder whose filters the sweeps are played
    through; the comparison with its prediction is added to the record. Other
    keywords go to :func:`run_measurement`. Returns the record.
    """
    out = Path(out)
    thru = load_through(through, ms.sample_rate, len(ms.outputs)) if through else None
    record = run_measurement(ms, out, through=thru, **kw)
    _finish_through(ms, out, record, thru, kw.get("say", print))
    return record


def unfinished_measurement(room: rooms.Room) -> Path | None:
    """The room's latest measurement run when it is unfinished (for resuming), else None."""
    runs = rooms.list_runs(room, "measurement")
    return runs[-1].path if runs and not runs[-1].complete else None


def measure_in_room(
    room: rooms.Room,
    ms: MeasureSettings,
    *,
    events: Events | None = None,
    stop: threading.Event | None = None,
    answer: Callable[[str], str] | None = None,
    say: Callable[[str], None] | None = None,
    view: Any = None,
    resume: bool = False,
    yes: bool = False,
    force: bool = False,
    through: str | Path | None = None,
    need_acknowledged: bool = False,
) -> dict[str, Any]:
    """Measure into a new measurement run of ``room``.

    Parameters
    ----------
    room : Room
    ms : MeasureSettings
        Checked again here (the level cap included).
    events : callable, optional
        Receives every step as a dict (see the module docstring); ``meter``
        events come about 20 times a second while sound plays. The final
        ``finished``/``stopped``/``failed`` event is sent by the caller's
        :class:`MeasureJob`, or not at all here.
    stop : threading.Event, optional
        Set it to silence the output at once and end the run.
    answer : callable, optional
        Asked each prompt's text (place the microphone; repeat, skip or quit
        after a failed check); returns the reply (``""``, ``"r"``, ``"s"``,
        ``"q"``). Default: the terminal's ``input``.
    say : callable, optional
        Each line of text (default ``print``; with ``events`` they are also sent).
    view : LiveView, optional
        The terminal's live view (the command line); overrides the events view.
    resume : bool
        Continue the room's unfinished latest run: its finished positions are
        copied into the new run (the unfinished one is left as it is).
    yes, force, through
        As ``roomcorr measure --yes``, ``--force``, ``--through``.
    need_acknowledged : bool
        Refuse unless the cautions were acknowledged in this room (the app).

    Returns
    -------
    dict
        ``{"run_id", "run_dir", "positions_saved", "record"}``.
    """
    ms.validate()
    if need_acknowledged:
        require_acknowledged(room)
    unfinished = None
    if resume:
        unfinished = unfinished_measurement(room)
        if unfinished is None:
            raise SettingsError(
                f"{room.root}: the latest measurement is complete; nothing to resume"
            )
    thru = load_through(through, ms.sample_rate, len(ms.outputs)) if through else None
    say_fn = say if say is not None else print
    if view is None and events is not None:
        view = EventView(events, say)
        say_fn = view.say
    elif view is not None:
        say_fn = view.say
    tell = events if events is not None else None
    with rooms.new_run(room, "measurement") as run_dir:
        if tell is not None:
            tell(
                {
                    "type": "started",
                    "run_id": run_dir.name,
                    "positions": ms.positions,
                    "outputs": list(ms.outputs),
                    "names": list(ms.names) if ms.names else None,
                    "level_dbfs": ms.level_dbfs,
                }
            )
        if unfinished is not None:  # the unfinished run stays as it is; its work is copied
            copy_unfinished(unfinished, run_dir)
        record = run_measurement(
            ms,
            run_dir,
            yes=yes,
            force=force,
            replace=False,
            resume=unfinished is not None,
            say=say_fn,
            ask=answer if answer is not None else input,
            view=view,
            through=thru,
            stop=stop,
            notify=tell,
        )
        _finish_through(ms, run_dir, record, thru, say_fn)
    saved = sum(1 for p in record["positions"] if p.get("file"))
    return {
        "run_id": run_dir.name,
        "run_dir": run_dir,
        "positions_saved": saved,
        "record": record,
    }


# --------------------------------------------------------------------------- a job (app)

#: Replies a prompt accepts, by the page's button.
ANSWERS = {"continue": "", "repeat": "r", "skip": "s", "quit": "q"}

_JOBS: weakref.WeakSet[MeasureJob] = weakref.WeakSet()


def stop_all(timeout_s: float = 5.0) -> None:
    """Stop every running :class:`MeasureJob` of this process (the app is shutting down)."""
    jobs = [j for j in list(_JOBS) if j.running()]
    for job in jobs:
        job.stop()
    for job in jobs:
        job.wait(timeout_s)


class MeasureJob:
    """One measurement running in a thread (the browser app's Start, Stop and prompts).

    Parameters
    ----------
    room : Room
    ms : MeasureSettings
    events : callable
        Receives every event of :func:`measure_in_room` plus ``prompt``
        (``{"text", "choices"}``), then one of ``finished`` (``run_id``,
        ``positions_saved``), ``stopped`` or ``failed`` (``error``).
    resume : bool
    """

    def __init__(
        self, room: rooms.Room, ms: MeasureSettings, events: Events, resume: bool = False
    ) -> None:
        self.room = room
        self.ms = ms
        self.events = events
        self.resume = resume
        self.stop_event = threading.Event()
        self.replies: queue.Queue[str] = queue.Queue()
        self.thread: threading.Thread | None = None
        self.prompt: dict[str, Any] | None = None
        self.state = "idle"
        self.result: dict[str, Any] | None = None

    def running(self) -> bool:
        return self.thread is not None and self.thread.is_alive()

    def start(self) -> None:
        """Check the cautions' acknowledgement and the settings, then start the thread."""
        require_acknowledged(self.room)
        self.ms.validate()
        self.state = "running"
        self.thread = threading.Thread(target=self._run, name="roomcorr-measure", daemon=True)
        _JOBS.add(self)
        self.thread.start()

    def _ask(self, text: str) -> str:
        choices = ["repeat", "skip", "quit"] if "[r]epeat" in text else ["continue", "quit"]
        self.prompt = {"type": "prompt", "text": text.strip(), "choices": choices}
        self.events(self.prompt)
        try:
            while True:
                if self.stop_event.is_set():
                    raise capture.Stopped("stopped at a prompt")
                try:
                    reply = self.replies.get(timeout=0.1)
                except queue.Empty:
                    continue
                if reply == "quit":
                    raise capture.Stopped("quit at a prompt")
                if reply in choices:
                    return ANSWERS[reply]
        finally:
            self.prompt = None

    def answer(self, reply: str) -> None:
        """Answer the open prompt (``continue``, ``repeat``, ``skip`` or ``quit``)."""
        if reply not in ANSWERS:
            raise SettingsError(f"answer {reply!r}: use one of {sorted(ANSWERS)}")
        if not self.running() or self.prompt is None:
            raise SettingsError("no question is waiting for an answer")
        if reply not in self.prompt["choices"]:
            raise SettingsError(f"answer {reply!r}: this question takes {self.prompt['choices']}")
        self.replies.put(reply)

    def stop(self) -> None:
        """Silence the output at once and end the run (the thread finishes by itself)."""
        self.stop_event.set()

    def wait(self, timeout: float | None = None) -> None:
        if self.thread is not None:
            self.thread.join(timeout)

    def _run(self) -> None:
        try:
            res = measure_in_room(
                self.room,
                self.ms,
                events=self.events,
                stop=self.stop_event,
                answer=self._ask,
                say=lambda text: None,
                resume=self.resume,
                need_acknowledged=True,
            )
        except capture.Stopped:
            self.state = "stopped"
            self.events(
                {
                    "type": "stopped",
                    "resumable": unfinished_measurement(self.room) is not None,
                }
            )
        except RoomcorrError as exc:
            self.state = "failed"
            self.events({"type": "failed", "error": " ".join(str(exc).split())})
        except Exception as exc:  # noqa: BLE001 - the page must hear of any failure
            self.state = "failed"
            self.events({"type": "failed", "error": f"{type(exc).__name__}: {exc}"})
        else:
            self.state = "finished"
            self.result = {"run_id": res["run_id"], "positions_saved": res["positions_saved"]}
            self.events({"type": "finished", **self.result})
