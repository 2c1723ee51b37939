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


MS = MeasureSettings(sweep_s=0.5, noise_s=0.2, tail_s=0.35, ir_s=0.2, test_s=0.2,
                     repeats=1, outputs=(1, 2), loopback=(3, 2), positions=2)


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
    run_measurement(MS, tmp_path / "s", ask=lambda text: asked.append(text) or "",
                    say=lambda s: None)
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
    loud = MeasureSettings(**{**MS.to_dict(), "outputs": (1,), "loopback": None,
                              "positions": 1, "level_dbfs": -3.0})
    with pytest.raises(SafetyError):
        run_measurement(loud, tmp_path / "a", yes=True, say=lambda s: None)
    assert not (tmp_path / "a").exists()  # refused before anything was written or played
    loud.allow_loud = True
    lines = []
    run_measurement(loud, tmp_path / "b", yes=True, say=lines.append)
    assert lines[0].startswith("WARNING") and "-6" in lines[0]
