"""The browser app's Measure routes: guarded like the rest, sound only after the cautions.

The capture is replaced by an offline room (no audio device); the whole job on a
real audio server is tests/test_ui_measure_jack.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import fftconvolve

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from room_holder import room_held_elsewhere  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from roomcorr import rooms  # noqa: E402
from roomcorr.app import measure as am  # noqa: E402
from roomcorr.measure import capture  # noqa: E402
from roomcorr.ui.server import TOKEN_HEADER, create_app  # noqa: E402

TOKEN = "test-token-measure-42"
PORT = 48322
QUICK = {"sweep_s": 0.5, "repeats": 1, "outputs": [1, 2], "positions": 2}
#: Short silences and responses for the tests, set in the room's settings file.
ROOM_MEASURE = {"noise_s": 0.2, "tail_s": 0.35, "ir_s": 0.2, "test_s": 0.2}


def set_room_measure(room: rooms.Room, values: dict) -> None:
    """Change ``key = value`` lines of the room settings file's [measure] table."""
    import re

    text = room.settings_path.read_text(encoding="utf-8")
    head, sep, measure = text.partition("[measure]")
    for key, value in values.items():
        measure, n = re.subn(rf"(?m)^{key} = .*$", f"{key} = {value!r}", measure, count=1)
        assert n == 1, key
    room.settings_path.write_text(head + sep + measure, encoding="utf-8")


ROUTES = [
    ("get", "/api/measure/devices", None),
    ("get", "/api/measure/cautions", None),
    ("get", "/api/measure/state", None),
    ("post", "/api/measure/acknowledge", {"acknowledged": True}),
    ("post", "/api/measure/tone", {"output": 1, "settings": QUICK}),
    ("post", "/api/measure/start", {"settings": QUICK}),
    ("post", "/api/measure/answer", {"answer": "continue"}),
    ("post", "/api/measure/stop", {}),
]


def fake_play_record(signal, fs, outs, ins, device=None, blocksize=0, **kw):
    """Output 1 arrives at 200 samples, output 2 at 240 (gain 0.5), plus a little noise."""
    if kw.get("stop") is not None and kw["stop"].is_set():
        raise capture.Stopped("stopped")
    n = signal.shape[1]
    mic = 1e-5 * np.random.default_rng(n).standard_normal(n)
    for row, out in zip(signal, outs, strict=True):
        h = np.zeros({1: 200, 2: 240}[out] + 1)
        h[-1] = 0.5
        mic += fftconvolve(row, h)[:n]
    if kw.get("progress") is not None:
        for k in range(3):
            kw["progress"]((k + 1) / 3, -18.0, -24.0)
    return capture.Capture(np.array([mic]), 0, [])


@pytest.fixture
def room(tmp_path, monkeypatch):
    devs = capture.Devices(0, "offline room", 0, "offline room", False)
    monkeypatch.setattr(capture, "open_devices", lambda *a, **k: devs)
    monkeypatch.setattr(capture, "play_record", fake_play_record)
    listed = [
        {
            "index": 0,
            "name": "offline room",
            "hostapi": "none",
            "max_input_channels": 2,
            "max_output_channels": 2,
            "default_samplerate": 48000.0,
            "default_input": True,
            "default_output": True,
        }
    ]
    monkeypatch.setattr(capture, "list_devices", lambda: listed)
    r = rooms.init_room(tmp_path / "studio")
    set_room_measure(r, ROOM_MEASURE)
    return r


@pytest.fixture
def client(room) -> TestClient:
    return TestClient(create_app(room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")


def _auth() -> dict[str, str]:
    return {TOKEN_HEADER: TOKEN}


def _call(client, method, path, body, headers):
    if method == "get":
        return client.get(path, headers=headers)
    return client.post(path, headers=headers, json=body)


@pytest.mark.parametrize(("method", "path", "body"), ROUTES)
def test_every_measure_route_needs_the_token_the_host_and_the_origin(room, method, path, body):
    app = create_app(room, TOKEN, PORT)
    good = TestClient(app, base_url=f"http://127.0.0.1:{PORT}")
    assert _call(good, method, path, body, {}).status_code == 403
    assert _call(good, method, path, body, {TOKEN_HEADER: "wrong"}).status_code == 403
    evil_host = TestClient(app, base_url=f"http://evil.example:{PORT}")
    assert _call(evil_host, method, path, body, _auth()).status_code == 403
    hdr = {**_auth(), "origin": "http://evil.example"}
    assert _call(good, method, path, body, hdr).status_code == 403
    # none of the refused requests acknowledged anything or made a run
    assert not am.cautions_view(room)["acknowledged"]
    assert rooms.list_runs(room, "measurement") == []


def test_no_sound_before_the_cautions_are_acknowledged(client, room, monkeypatch):
    played = []
    monkeypatch.setattr(capture, "play_record", lambda *a, **k: played.append(1))
    view = client.get("/api/measure/cautions", headers=_auth()).json()
    assert view["acknowledged"] is False and "protect your hearing" in view["text"]
    for path, body in (
        ("/api/measure/tone", {"output": 1, "settings": QUICK}),
        ("/api/measure/start", {"settings": QUICK}),
    ):
        r = client.post(path, headers=_auth(), json=body)
        assert r.status_code == 400 and "acknowledge the cautions" in r.json()["error"]
    assert not played and rooms.list_runs(room, "measurement") == []
    r = client.post("/api/measure/acknowledge", headers=_auth(), json={"acknowledged": "yes"})
    assert r.status_code == 400 and not am.cautions_view(room)["acknowledged"]
    r = client.post("/api/measure/acknowledge", headers=_auth(), json={"acknowledged": True})
    assert r.status_code == 200 and r.json()["acknowledged"] is True
    assert (room.root / am.CAUTIONS_FILE).is_file()


def test_the_level_cap_and_the_settings_are_checked_like_the_command_line(client, room):
    am.acknowledge_cautions(room)
    bad = [
        ({**QUICK, "level_dbfs": -3.0}, "cap"),  # above -6 dBFS without allow_loud
        ({**QUICK, "level_dbfs": 3.0, "allow_loud": True}, "0 dBFS"),  # never above 0 dBFS
        ({**QUICK, "min_snr_db": 0.0}, "cannot be set here"),  # no loosening of the gates
        ({**QUICK, "test_level_dbfs": -3.0}, "cannot be set here"),
        ({**QUICK, "positions": 0}, "at least 1"),
        ({**QUICK, "outputs": "1;2"}, "list"),
    ]
    for settings, words in bad:
        r = client.post("/api/measure/start", headers=_auth(), json={"settings": settings})
        assert r.status_code == 400 and words in r.json()["error"], (settings, r.text)
        r = client.post(
            "/api/measure/tone", headers=_auth(), json={"output": 1, "settings": settings}
        )
        assert r.status_code == 400, settings
    r = client.post("/api/measure/start", headers=_auth(), content=b"[1, 2]")
    assert r.status_code == 400
    r = client.post(
        "/api/measure/tone", headers=_auth(), json={"output": "../1", "settings": QUICK}
    )
    assert r.status_code == 400
    assert rooms.list_runs(room, "measurement") == []


def test_a_tone_is_quiet_and_reported(client, room):
    am.acknowledge_cautions(room)
    r = client.post("/api/measure/tone", headers=_auth(), json={"output": 2, "settings": QUICK})
    assert r.status_code == 200, r.text
    res = r.json()
    assert res["heard"] is True and res["level_dbfs"] <= am.TEST_TONE_DBFS


def test_answer_without_a_measurement_and_stop_when_idle(client):
    r = client.post("/api/measure/answer", headers=_auth(), json={"answer": "continue"})
    assert r.status_code == 409
    r = client.post("/api/measure/stop", headers=_auth(), json={})
    assert r.status_code == 200 and r.json() == {"stopping": False}


def test_devices_are_listed(client):
    data = client.get("/api/measure/devices", headers=_auth()).json()
    assert data["devices"][0]["name"] == "offline room" and data["last"] == {}


def test_start_refused_while_a_command_holds_the_room(client, room):
    am.acknowledge_cautions(room)
    with room_held_elsewhere(room):
        r = client.post("/api/measure/start", headers=_auth(), json={"settings": QUICK})
        assert r.status_code == 409 and "in use" in r.json()["error"]
        assert rooms.list_runs(room, "measurement") == []


def test_a_measurement_over_the_live_channel_with_prompts(client, room):
    am.acknowledge_cautions(room)
    with client.websocket_connect(f"ws://127.0.0.1:{PORT}/api/live?token={TOKEN}") as ws:
        assert ws.receive_json() == {"type": "hello"}
        r = client.post("/api/measure/start", headers=_auth(), json={"settings": QUICK})
        assert r.status_code == 200, r.text
        again = client.post("/api/measure/start", headers=_auth(), json={"settings": QUICK})
        assert again.status_code == 409  # one measurement at a time
        saving = client.post("/api/save", headers=_auth(), json={"target": "flat"})
        assert saving.status_code == 409  # no design while the room is being measured
        seen: list[dict] = []
        while True:
            ev = ws.receive_json()
            seen.append(ev)
            if ev["type"] == "prompt":
                assert ev["choices"] == ["continue", "quit"]
                a = client.post("/api/measure/answer", headers=_auth(), json={"answer": "continue"})
                assert a.status_code == 200, a.text
            if ev["type"] in ("finished", "failed", "stopped"):
                break
    assert seen[-1]["type"] == "finished", seen[-1]
    kinds = [e["type"] for e in seen]
    assert kinds.count("prompt") == 2 and "meter" in kinds and "level_check" in kinds
    assert [e["file"] for e in seen if e["type"] == "saved"] == ["pos1.wav", "pos2.wav"]
    run = rooms.list_runs(room, "measurement")[-1]
    assert run.complete and run.run_id == seen[-1]["run_id"]
    state = client.get("/api/measure/state", headers=_auth()).json()
    assert state["state"] == "finished" and state["result"]["positions_saved"] == 2


def test_stop_at_a_prompt_leaves_no_finished_run(client, room):
    am.acknowledge_cautions(room)
    with client.websocket_connect(f"ws://127.0.0.1:{PORT}/api/live?token={TOKEN}") as ws:
        ws.receive_json()
        client.post("/api/measure/start", headers=_auth(), json={"settings": QUICK})
        while True:
            ev = ws.receive_json()
            if ev["type"] == "prompt":
                r = client.post("/api/measure/stop", headers=_auth(), json={})
                assert r.status_code == 200 and r.json()["stopping"] is True
            if ev["type"] in ("finished", "failed", "stopped"):
                break
    assert ev["type"] == "stopped"
    assert rooms.list_runs(room, "measurement", include_incomplete=False) == []
