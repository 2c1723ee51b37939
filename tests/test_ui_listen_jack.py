"""Listening from the app's Files page, through a real JACK server (dummy driver).

The server plays music of the room's ``music/`` folder through a design on a test
JACK client (tests/jack_recorder.py) as the output device; sound only after the
room's cautions were acknowledged; the music is named, never given as a path.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

pytest.importorskip("starlette")

from jack_fixtures import jack_server  # noqa: E402,F401  (session fixture)
from music_synth import synth_music  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from roomcorr import cli, rooms  # noqa: E402
from roomcorr.ui.server import TOKEN_HEADER, create_app  # noqa: E402

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
TOKEN = "listen-token-0123456789"
PORT = 48322


def test_listen_from_the_app(jack_server, tmp_path):  # noqa: F811
    root = tmp_path / "den"
    room = rooms.init_room(root)
    rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
    assert cli.main(["design", "--room", str(root), "--rates", "48000", "--taps", "4096"]) == 0
    run_id = rooms.list_runs(room, "design", include_incomplete=False)[-1].run_id
    import json

    man = json.loads((room.designs_dir / run_id / "manifest.json").read_text())
    n_in = 1 + max(r["input"] for r in man["routes"])
    n_out = 1 + max(r["output"] for r in man["routes"])
    (root / "music").mkdir()
    x = synth_music(48000, 4.0)
    sf.write(root / "music" / "tune.wav", np.resize(x, (n_in, x.shape[1])).T, 48000)
    client = TestClient(create_app(room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")
    auth = {TOKEN_HEADER: TOKEN}
    assert client.get("/api/listen/music", headers=auth).json() == ["tune.wav"]
    start = {"run_id": run_id, "music": "tune.wav", "device": "rc_listen_ui"}
    r = client.post("/api/listen/start", json=start, headers=auth)
    assert r.status_code == 400 and "acknowledge" in r.json()["error"]  # no sound before
    r = client.post("/api/measure/acknowledge", json={"acknowledged": True}, headers=auth)
    assert r.status_code == 200
    bad = client.post("/api/listen/start", json=dict(start, music="../tune.wav"), headers=auth)
    assert bad.status_code == 404
    rec = subprocess.Popen(
        [sys.executable, str(HERE / "jack_recorder.py"), "rc_listen_ui", str(n_out),
         str(tmp_path / "rec.npy")],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )  # fmt: skip
    assert rec.stdout.readline().strip() == "READY"
    from roomcorr.measure.capture import rescan_devices

    rescan_devices()  # PortAudio lists JACK clients as devices when it starts (jack_fixtures.py)
    try:
        st = client.post("/api/listen/start", json=start, headers=auth).json()
        assert st["playing"] and st["corrected"] and st["level_db"] == -20.0, st
        assert st["figures"]["sample_rate"] == 48000 and st["error"] is None
        again = client.post("/api/listen/start", json=start, headers=auth)
        assert again.status_code == 409  # one piece at a time
        time.sleep(1.0)
        st = client.post("/api/listen/switch", json={}, headers=auth).json()
        assert st["corrected"] is False
        st = client.post("/api/listen/level", json={"delta_db": 3}, headers=auth).json()
        assert st["level_db"] == -17.0
        st = client.post("/api/listen/level", json={"delta_db": 30}, headers=auth)
        assert st.status_code == 400
        time.sleep(0.5)
        st = client.post("/api/listen/stop", json={}, headers=auth).json()
        assert not st["playing"] and st["error"] is None
    finally:
        rec.stdin.close()
        rec.wait(30)
    y = np.load(tmp_path / "rec.npy")
    assert y.shape[0] == n_out and np.abs(y).max() > 1e-4  # sound arrived, quietly
    assert np.abs(y).max() < 0.5
