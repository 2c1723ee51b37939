"""Measuring through the application layer (roomcorr.app.measure), without an audio device.

The capture is replaced by an offline room (as in tests/test_session.py); the Stop
path of the real capture code is driven through a stand-in for sounddevice that
calls the stream callbacks block by block, so what the loudspeakers would have
received after Stop is checked sample by sample.
"""

from __future__ import annotations

import json
import threading

import numpy as np
import pytest
from scipy.signal import fftconvolve

from roomcorr import rooms
from roomcorr.app import measure as am
from roomcorr.errors import InputFileError, SafetyError, SettingsError
from roomcorr.measure import capture
from roomcorr.measure.session import CAUTIONS
from roomcorr.measure.settings import LEVEL_CAP_DBFS, MeasureSettings

DEVICES = capture.Devices(0, "offline room", 0, "offline room", False)
QUICK = {
    "sweep_s": 0.5,
    "noise_s": 0.2,
    "tail_s": 0.35,
    "ir_s": 0.2,
    "test_s": 0.2,
    "repeats": 1,
    "outputs": [1, 2],
    "positions": 2,
}


class OfflineRoom:
    """play_record replaced: output 1 arrives at 200 samples, output 2 at 240 (gain 0.5)."""

    def __init__(self, stop_after: int | None = None, silent: bool = False) -> None:
        self.calls: list[np.ndarray] = []
        self.stop_after = stop_after
        self.silent = silent
        self.rng = np.random.default_rng(0)

    def __call__(self, signal, fs, outs, ins, device=None, blocksize=0, **kw):
        stop = kw.get("stop")
        progress = kw.get("progress")
        if stop is not None and stop.is_set():
            raise capture.Stopped("stopped")
        self.calls.append(np.array(signal))
        if self.stop_after is not None and len(self.calls) > self.stop_after and stop is not None:
            stop.set()  # the Stop button, pressed while this capture plays
            raise capture.Stopped("stopped")
        n = signal.shape[1]
        mic = 1e-5 * self.rng.standard_normal(n)
        if not self.silent:
            for row, out in zip(signal, outs, strict=True):
                h = np.zeros({1: 200, 2: 240}[out] + 1)
                h[-1] = 0.5
                mic += fftconvolve(row, h)[:n]
        if progress is not None:
            for k in range(4):
                progress((k + 1) / 4, -20.0 - k, -30.0 - k)
        return capture.Capture(np.array([mic]), 0, [])


@pytest.fixture
def room(tmp_path, monkeypatch):
    monkeypatch.setattr(capture, "open_devices", lambda *a, **k: DEVICES)
    r = rooms.init_room(tmp_path / "lounge")
    return r


def _settings(room, **over):
    return MeasureSettings.from_dict({**QUICK, **over})


def test_measure_in_room_makes_a_complete_run_and_reports_each_step(room, monkeypatch):
    monkeypatch.setattr(capture, "play_record", OfflineRoom())
    events: list[dict] = []
    asked: list[str] = []
    res = am.measure_in_room(
        room, _settings(room), events=events.append, answer=lambda t: asked.append(t) or ""
    )
    run = rooms.list_runs(room, "measurement")[-1]
    assert run.complete and run.run_id == res["run_id"] and res["positions_saved"] == 2
    assert sorted(p.name for p in run.path.glob("pos*.wav")) == ["pos1.wav", "pos2.wav"]
    kinds = [e["type"] for e in events]
    assert kinds[0] == "started" and "level_check" in kinds
    assert [e["position"] for e in events if e["type"] == "position"] == [1, 2]
    assert [(e["position"], e["output"]) for e in events if e["type"] == "speaker"] == [
        (1, 1),
        (1, 2),
        (2, 1),
        (2, 2),
    ]
    assert [e["file"] for e in events if e["type"] == "saved"] == ["pos1.wav", "pos2.wav"]
    meters = [e for e in events if e["type"] == "meter"]
    assert meters and all({"peak_dbfs", "rms_dbfs", "fraction"} <= set(e) for e in meters)
    # the cautions come before the first sound (the first capture event)
    first_capture = kinds.index("capture")
    said = [e["text"] for e in events[:first_capture] if e["type"] == "say"]
    assert CAUTIONS in said
    assert len(asked) == 2 and "position 1" in asked[0]


def test_stop_keeps_finished_positions_and_the_run_resumes(room, monkeypatch):
    # level check (1 capture) + position 1 (2 captures); stopped during position 2
    monkeypatch.setattr(capture, "play_record", OfflineRoom(stop_after=3))
    stop = threading.Event()
    with pytest.raises(capture.Stopped):
        am.measure_in_room(
            room, _settings(room), stop=stop, answer=lambda t: "", say=lambda t: None
        )
    run = rooms.list_runs(room, "measurement")[-1]
    assert not run.complete  # never taken for a finished measurement
    assert (run.path / "pos1.wav").is_file() and not (run.path / "pos2.wav").exists()
    assert am.unfinished_measurement(room) == run.path
    # resuming measures only what is missing, into a new run; the stopped one stays as it was
    player = OfflineRoom()
    monkeypatch.setattr(capture, "play_record", player)
    res = am.measure_in_room(
        room, _settings(room), resume=True, answer=lambda t: "", say=lambda t: None
    )
    assert res["positions_saved"] == 2 and len(player.calls) == 1 + 2  # level check + pos 2
    assert not (run.path / "complete.json").exists()


def test_stop_before_anything_was_written_leaves_no_run(room, monkeypatch):
    monkeypatch.setattr(capture, "play_record", OfflineRoom(stop_after=0))
    with pytest.raises(capture.Stopped):
        am.measure_in_room(room, _settings(room), stop=threading.Event(), say=lambda t: None)
    assert rooms.list_runs(room, "measurement") == []


def test_cautions_are_acknowledged_once_per_room_and_stored_atomically(room):
    assert am.cautions_view(room)["acknowledged"] is False
    with pytest.raises(SafetyError, match="acknowledge the cautions"):
        am.require_acknowledged(room)
    view = am.acknowledge_cautions(room)
    assert view["acknowledged"] and view["text"] == CAUTIONS
    stored = json.loads((room.root / am.CAUTIONS_FILE).read_text())
    assert stored["text"] == CAUTIONS
    assert not [p for p in room.root.iterdir() if p.name.startswith(".roomcorr-tmp")]
    am.require_acknowledged(room)
    # a changed caution text is a new caution: read it again
    stored["text"] = "older wording"
    (room.root / am.CAUTIONS_FILE).write_text(json.dumps(stored))
    assert am.cautions_view(room)["acknowledged"] is False


def test_a_job_refuses_to_start_without_the_acknowledgement(room, monkeypatch):
    player = OfflineRoom()
    monkeypatch.setattr(capture, "play_record", player)
    job = am.MeasureJob(room, _settings(room), events=lambda e: None)
    with pytest.raises(SafetyError):
        job.start()
    assert not player.calls and rooms.list_runs(room, "measurement") == []


def test_a_job_asks_waits_for_answers_and_finishes(room, monkeypatch):
    monkeypatch.setattr(capture, "play_record", OfflineRoom())
    am.acknowledge_cautions(room)
    events: list[dict] = []
    prompts = threading.Semaphore(0)

    def collect(e):
        events.append(e)
        if e["type"] == "prompt":
            prompts.release()

    job = am.MeasureJob(room, _settings(room), events=collect)
    job.start()
    for _ in range(2):
        assert prompts.acquire(timeout=60)
        with pytest.raises(SettingsError):
            job.answer("repeat")  # not a choice of "place the microphone"
        job.answer("continue")
    job.wait(60)
    assert events[-1]["type"] == "finished" and events[-1]["positions_saved"] == 2
    assert job.state == "finished" and rooms.list_runs(room, "measurement")[-1].complete


def test_a_job_stopped_at_a_prompt_stops_without_sound(room, monkeypatch):
    player = OfflineRoom()
    monkeypatch.setattr(capture, "play_record", player)
    am.acknowledge_cautions(room)
    events: list[dict] = []
    asked = threading.Event()
    job = am.MeasureJob(
        room,
        _settings(room),
        events=lambda e: (events.append(e), e["type"] == "prompt" and asked.set()),
    )
    job.start()
    assert asked.wait(60)
    n_played = len(player.calls)
    job.stop()
    job.wait(60)
    assert events[-1]["type"] == "stopped" and len(player.calls) == n_played


def test_settings_keep_the_level_cap_and_refuse_other_keys(room):
    with pytest.raises(SafetyError, match="cap"):
        am.settings_for_room(room, {"level_dbfs": -3.0})
    loud = am.settings_for_room(room, {"level_dbfs": -3.0, "allow_loud": True})
    assert loud.level_dbfs == -3.0
    with pytest.raises(SettingsError):
        am.settings_for_room(room, {"allow_loud": "yes"})
    for key, value in (("min_snr_db", 0.0), ("test_level_dbfs", -3.0), ("max_spl_db", 110.0)):
        with pytest.raises(SettingsError, match="cannot be set here"):
            am.settings_for_room(room, {key: value})
    with pytest.raises(SettingsError):
        am.settings_for_room(room, {"positions": float("nan")})
    with pytest.raises(SettingsError):
        am.settings_for_room(room, {"outputs": "1,2"})
    # names become file names of the filters: plain names only
    for bad in ("../../escape", "a/b", "", ".hidden", "x" * 40, "two words"):
        with pytest.raises(SettingsError, match="plain name"):
            am.settings_for_room(room, {"outputs": [1], "names": [bad]})
    assert am.settings_for_room(room, {"outputs": [1], "names": ["front-left_2"]}).names == (
        "front-left_2",
    )


@pytest.mark.parametrize("sweep_level", [-20.0, -36.0])
def test_test_tone_is_quiet_short_and_heard(room, monkeypatch, sweep_level):
    player = OfflineRoom()
    monkeypatch.setattr(capture, "play_record", player)
    ms = _settings(room, level_dbfs=sweep_level)
    res = am.play_test_tone(ms, 2)
    played = player.calls[0]
    # peak dBFS of a sine (AES17: full-scale sine = 0 dBFS): never above the tone level,
    # the sweep level or the sweep cap
    peak_dbfs = 20 * np.log10(np.max(np.abs(played)))
    assert peak_dbfs == pytest.approx(min(am.TEST_TONE_DBFS, sweep_level), abs=0.01)
    assert peak_dbfs <= LEVEL_CAP_DBFS
    assert res["level_dbfs"] == pytest.approx(peak_dbfs, abs=0.01)
    on = np.flatnonzero(played[0])
    assert (on[-1] - on[0] + 1) / ms.sample_rate == pytest.approx(am.TEST_TONE_S, abs=0.001)
    # the tone's frequency is where its spectrum peaks (numpy FFT)
    spec = np.abs(np.fft.rfft(played[0]))
    f_peak = np.fft.rfftfreq(played.shape[1], 1 / ms.sample_rate)[np.argmax(spec)]
    assert f_peak == pytest.approx(am.TEST_TONE_HZ, abs=2.0)
    assert res["heard"] is True and res["heard_db"] > 30


def test_test_tone_not_heard_says_what_to_check(room, monkeypatch):
    monkeypatch.setattr(capture, "play_record", OfflineRoom(silent=True))
    res = am.play_test_tone(_settings(room), 1)
    assert res["heard"] is False and "did not hear" in res["advice"]
    with pytest.raises(SettingsError, match="not one of the loudspeakers"):
        am.play_test_tone(_settings(room), 7)


# --------------------------------------------------------------------------- Stop in capture


class FakeSounddevice:
    """Enough of sounddevice for play_record: streams whose callbacks are called block by
    block in a thread; what an output callback writes is kept. The Stop button is pressed
    (``stop`` set) just before output block ``press_stop_at_block``."""

    class CallbackStop(Exception):
        pass

    class CallbackAbort(Exception):
        pass

    class PortAudioError(Exception):
        pass

    def __init__(self, press_stop_at_block: int, stop: threading.Event) -> None:
        self.press = press_stop_at_block
        self.stop = stop
        self.blocks: list[np.ndarray] = []
        self.aborted = False
        outer = self

        class Stream:
            """Full duplex (channels = (in, out)); subclasses play or record only."""

            def __init__(
                self, device, samplerate, channels, dtype, blocksize, callback, finished_callback
            ):
                self.cb, self.done, self.channels = callback, finished_callback, channels
                self.thread = threading.Thread(target=self._run, daemon=True)

            def call(self, outdata, indata):
                self.cb(indata, outdata, 256, None, None)

            def _run(self):
                k = 0
                while not outer.aborted:
                    n_in, n_out = self.shape()
                    outdata = np.full((256, n_out), np.nan, np.float32) if n_out else None
                    if n_out and k == outer.press:
                        outer.stop.set()  # the Stop button, between two audio blocks
                    try:
                        self.call(outdata, np.zeros((256, n_in), np.float32))
                    except (outer.CallbackStop, outer.CallbackAbort):
                        break
                    finally:
                        if n_out:
                            outer.blocks.append(outdata.copy())
                    k += 1
                self.done()

            def shape(self):
                return self.channels

            def start(self):
                self.thread.start()

            def abort(self):
                outer.aborted = True

            def stop(self):
                pass

            def close(self):
                self.thread.join(5)

        class OutputStream(Stream):
            def shape(self):
                return 0, self.channels

            def call(self, outdata, indata):
                self.cb(outdata, 256, None, None)

        class InputStream(Stream):
            def shape(self):
                return self.channels, 0

            def call(self, outdata, indata):
                self.cb(indata, 256, None, None)
                threading.Event().wait(0.001)

        self.Stream, self.OutputStream, self.InputStream = Stream, OutputStream, InputStream


def test_stop_silences_the_output_from_the_next_block_and_raises(monkeypatch):
    stop = threading.Event()
    fake = FakeSounddevice(press_stop_at_block=60, stop=stop)  # 0.2 s preroll = 37.5 blocks
    monkeypatch.setattr(capture, "_sd", lambda: fake)
    fs = 48000
    sig = 0.1 * np.ones((1, fs * 5))  # five seconds of sound, stopped after 60 blocks
    with pytest.raises(capture.Stopped):
        capture.play_record(sig, fs, [1], [1], devices=DEVICES, stop=stop)
    played = np.concatenate(fake.blocks)
    assert len(fake.blocks) == 61  # the block after Stop is the last one asked for
    assert np.all(fake.blocks[-1] == 0.0)  # ...and it is silence
    assert np.all(played[40 * 256 : 60 * 256] == np.float32(0.1))  # sound until Stop


def test_stop_silences_two_streams_too(monkeypatch):
    # two devices (a USB microphone beside another output): the output stream's callback
    # goes silent from the block after Stop; both streams are aborted
    stop = threading.Event()
    fake = FakeSounddevice(press_stop_at_block=60, stop=stop)
    monkeypatch.setattr(capture, "_sd", lambda: fake)
    two = capture.Devices(0, "usb mic", 1, "hdmi", True)
    sig = 0.1 * np.ones((1, 48000 * 5))
    with pytest.raises(capture.Stopped):
        capture.play_record(sig, 48000, [1], [1], devices=two, stop=stop)
    assert len(fake.blocks) == 61 and np.all(fake.blocks[-1] == 0.0)
    assert np.all(np.concatenate(fake.blocks[40:60]) == np.float32(0.1))
    assert fake.aborted


@pytest.mark.parametrize("calibrator_db", [94.0, 114.0])
def test_calibrate_microphone_reads_the_calibrators_level(monkeypatch, calibrator_db):
    # AES17: a sine of peak A reads 20 log10(A) dBFS; a 94 dB SPL calibrator at that level
    # means that sensitivity (114 dB SPL: 20 dB less per pascal)
    fs = 48000
    t = np.arange(3 * fs) / fs

    def record(rate, channel, seconds, device=None, progress=None):
        assert (rate, channel, seconds) == (fs, 2, 3.0)
        return 0.05 * np.sin(2 * np.pi * 1000.0 * t)

    monkeypatch.setattr(capture, "record", record)
    res = am.calibrate_microphone(fs, 2, 3.0, None, calibrator_db)
    expect = 20 * np.log10(0.05) - (calibrator_db - 94.0)
    assert res["sensitivity_dbfs"] == pytest.approx(expect, abs=0.05)
    assert res["fraction_at_1k"] > 0.99


def test_calibrate_microphone_refuses_noise_and_bad_options(monkeypatch):
    noise = np.random.default_rng(3).standard_normal(3 * 48000) * 0.01
    monkeypatch.setattr(capture, "record", lambda *a, **k: noise)
    with pytest.raises(InputFileError, match="no steady 1 kHz tone"):
        am.calibrate_microphone(48000, 1, 3.0)
    with pytest.raises(SettingsError, match="94 or 114"):
        am.calibrate_microphone(48000, 1, 3.0, None, 100.0)
    with pytest.raises(SettingsError, match="1 to 30"):
        am.calibrate_microphone(48000, 1, 0.2)
