"""Session flow without an audio device: capture replaced by an offline room."""

import json

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import fftconvolve

from roomcorr.errors import OutputError, SafetyError
from roomcorr.measure import capture
from roomcorr.measure.session import run_measurement
from roomcorr.measure.settings import MeasureSettings

FS = 48000


DEVICES = capture.Devices(0, "offline room", 0, "offline room", False)


@pytest.fixture
def offline_room(monkeypatch):
    """Replace play_record by a room: output 1 gives 0.5 at 200 samples, output 2 0.5 at
    240 samples, output 3 is the loopback cable; 512 samples of latency."""
    paths = {1: 200, 2: 240}
    rng = np.random.default_rng(0)

    def fake(signal, fs, outs, ins, device=None, blocksize=0, **kw):
        n = signal.shape[1]
        mic = 1e-5 * rng.standard_normal(n)
        sent_lb = np.zeros(n)
        for row, out in zip(signal, outs, strict=True):
            sent = np.r_[np.zeros(512), row][:n]
            if out in paths:
                h = np.zeros(paths[out] + 1)
                h[-1] = 0.5
                mic += fftconvolve(sent, h)[:n]
            else:
                sent_lb = sent
        rec = [mic] if len(ins) == 1 else [mic, sent_lb]
        return capture.Capture(np.array(rec), 0, [])

    monkeypatch.setattr(capture, "play_record", fake)
    monkeypatch.setattr(capture, "open_devices", lambda *a, **k: DEVICES)


MS = MeasureSettings(
    sweep_s=0.5,
    noise_s=0.2,
    tail_s=0.35,
    ir_s=0.2,
    test_s=0.2,
    repeats=1,
    outputs=(1, 2),
    loopback=(3, 2),
    positions=2,
)


def test_session_files_and_record(offline_room, tmp_path):
    lines = []
    rec = run_measurement(MS, tmp_path / "s", yes=True, say=lines.append)
    assert rec["loopback"] is True
    out = tmp_path / "s"
    assert sorted(p.name for p in out.glob("*.wav")) == ["pos1.wav", "pos2.wav"]
    ir, fs = sf.read(out / "pos2.wav", always_2d=True)
    assert fs == FS and ir.shape[1] == 2 and np.argmax(np.abs(ir[:, 1])) == 240
    stored = json.loads((out / "measurement.json").read_text())
    assert [p["file"] for p in stored["positions"]] == ["pos1.wav", "pos2.wav"]
    assert stored["playback_file"] == "raw/playback.wav"
    assert any("excursion" in s for s in lines)  # cautions printed before sound


def test_prompts_between_positions_unless_yes(offline_room, tmp_path):
    asked = []
    run_measurement(
        MS, tmp_path / "s", ask=lambda text: asked.append(text) or "", say=lambda s: None
    )
    assert len(asked) == 2 and "position 1" in asked[0] and "Enter" in asked[0]


def test_replace_removes_an_earlier_sessions_files(offline_room, tmp_path):
    out = tmp_path / "s"
    out.mkdir()
    (out / "pos3.wav").write_bytes(b"old")
    with pytest.raises(OutputError, match="--replace"):
        run_measurement(MS, out, yes=True, say=lambda s: None)
    run_measurement(MS, out, yes=True, replace=True, say=lambda s: None)
    assert not (out / "pos3.wav").exists() and (out / "pos2.wav").exists()


def test_loud_level_needs_permission_and_warns(offline_room, tmp_path):
    loud = MeasureSettings(
        **{**MS.to_dict(), "outputs": (1,), "loopback": None, "positions": 1, "level_dbfs": -3.0}
    )
    with pytest.raises(SafetyError):
        run_measurement(loud, tmp_path / "a", yes=True, say=lambda s: None)
    assert not (tmp_path / "a").exists()  # refused before anything was written or played
    loud.allow_loud = True
    lines = []
    run_measurement(loud, tmp_path / "b", yes=True, say=lines.append)
    assert lines[0].startswith("WARNING") and "-6" in lines[0]


#: Short sweeps, one loudspeaker, two positions, no prompts.
QUICK_TWO_POSITIONS = (
    "--outputs 1 --positions 2 --yes --plain --sweep-seconds 0.5 --repeats 1 --ir-seconds 0.2"
).split()


class FakeSoundDevice:
    """Stand-in for the sounddevice module: one full-duplex device whose input hears its
    output 300 samples later at half level. From capture number ``vanish_at`` on, the
    device disappears after ``vanish_after`` blocks (the stream just ends, as PortAudio's
    does when a USB device is pulled)."""

    class PortAudioError(Exception):
        pass

    class CallbackStop(Exception):
        pass

    def __init__(self, vanish_at: int, vanish_after: int = 5):
        self.default = type("D", (), {"device": [0, 0]})()
        self.vanish_at, self.vanish_after, self.captures = vanish_at, vanish_after, 0
        fake = self

        class Stream:
            def __init__(
                self, device, samplerate, channels, dtype, blocksize, callback, finished_callback
            ):
                self.cb, self.fin = callback, finished_callback
                self.n_in, self.n_out = channels
                fake.captures += 1
                self.vanish = fake.captures >= fake.vanish_at

            def start(self):
                import threading

                self.thread = threading.Thread(target=self.run)
                self.thread.start()

            def run(self):
                air = np.zeros(300)
                rng = np.random.default_rng(0)
                for block in range(100000):
                    if self.vanish and block >= fake.vanish_after:
                        break
                    out = np.zeros((512, self.n_out), dtype=np.float32)
                    sent = np.r_[air, np.zeros(512)]
                    ind = (0.5 * sent[:512] + 1e-5 * rng.standard_normal(512))[:, None]
                    try:
                        self.cb(
                            np.repeat(ind, self.n_in, 1).astype(np.float32), out, 512, None, None
                        )
                    except fake.CallbackStop:
                        break
                    air = np.r_[air, out[:, 0]][-300:]
                self.fin()

            def stop(self):
                self.thread.join()

            def close(self):
                pass

            def abort(self):
                pass

        self.Stream = Stream

    def query_devices(self, dev=None):
        info = {
            "name": "invented USB interface",
            "index": 0,
            "hostapi": 0,
            "max_input_channels": 2,
            "max_output_channels": 2,
            "default_samplerate": 48000.0,
        }
        if dev is None:
            return [info]
        if dev not in (0, "invented"):
            raise ValueError(f"no device {dev!r}")
        return info

    def query_hostapis(self):
        return [{"name": "fake"}]

    def check_input_settings(self, **kw):
        pass

    check_output_settings = check_input_settings


def test_device_disappearing_mid_sweep_keeps_earlier_positions(monkeypatch, tmp_path, capsys):
    from roomcorr import cli

    fake = FakeSoundDevice(vanish_at=3)  # level check, position 1, then position 2 vanishes
    monkeypatch.setattr(capture, "_sd", lambda: fake)
    out = tmp_path / "s"
    status = cli.main(["measure", "--device", "invented", *QUICK_TWO_POSITIONS, "--out", str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1
    assert "invented USB interface" in err[0] and "disconnected" in err[0]
    assert (out / "pos1.wav").is_file() and not (out / "pos2.wav").exists()
    stored = json.loads((out / "measurement.json").read_text())  # complete, valid JSON
    assert stored["positions"][0]["file"] == "pos1.wav"
    assert not [p for p in out.rglob("*") if p.name.startswith(".roomcorr-tmp-")]


def test_devices_without_any_device_says_so(monkeypatch, capsys):
    from roomcorr import cli

    fake = FakeSoundDevice(vanish_at=99)
    fake.query_devices = lambda dev=None: [] if dev is None else {}
    monkeypatch.setattr(capture, "_sd", lambda: fake)
    assert cli.main(["devices"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no audio devices found" in err[0] and "plug in" in err[0]


def test_no_default_device_names_the_option(monkeypatch):
    from roomcorr.errors import DeviceError

    fake = FakeSoundDevice(vanish_at=99)
    fake.default.device = [-1, -1]
    monkeypatch.setattr(capture, "_sd", lambda: fake)
    with pytest.raises(DeviceError, match="no default input device.*--input-device"):
        capture.open_devices(48000, 1, 1)


def test_resume_in_a_room_folder_continues_in_a_new_run(offline_room, monkeypatch, tmp_path):
    from roomcorr import cli, rooms

    room = rooms.init_room(tmp_path / "room")
    real = capture.play_record
    calls = {"n": 0}

    def interrupted(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:  # level check, position 1, then Ctrl-C during position 2
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(capture, "play_record", interrupted)
    args = ["measure", "--room", str(room.root), *QUICK_TWO_POSITIONS]
    assert cli.main(args) == 130
    first = rooms.list_runs(room, "measurement")
    assert len(first) == 1 and not first[0].complete
    assert (first[0].path / "pos1.wav").is_file()
    monkeypatch.setattr(capture, "play_record", real)
    assert cli.main([*args, "--resume"]) == 0
    runs = rooms.list_runs(room, "measurement")
    assert [r.complete for r in runs] == [False, True]  # the unfinished run is left as it was
    assert (runs[1].path / "pos1.wav").read_bytes() == (first[0].path / "pos1.wav").read_bytes()
    stored = json.loads((runs[1].path / "measurement.json").read_text())
    assert [p["file"] for p in stored["positions"]] == ["pos1.wav", "pos2.wav"]
    assert not (runs[0].path / "pos2.wav").exists()
    assert cli.main([*args, "--resume"]) == 2  # nothing left to resume


def test_two_streams_need_the_markers(offline_room, monkeypatch, tmp_path):
    from roomcorr.errors import SettingsError

    two = capture.Devices(0, "invented USB microphone", 1, "invented HDMI output", True)
    monkeypatch.setattr(capture, "open_devices", lambda *a, **k: two)
    ms = MeasureSettings(**{**MS.to_dict(), "loopback": None, "markers": False})
    with pytest.raises(SettingsError, match="no-markers"):
        run_measurement(ms, tmp_path / "s", yes=True, say=lambda s: None)
    assert not (tmp_path / "s").exists()
