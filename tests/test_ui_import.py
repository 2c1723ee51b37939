"""The browser app's import: uploaded or chosen impulse responses become a measurement run,
under the same token, Host/Origin, size and containment rules as the rest of the app."""

from __future__ import annotations

import base64
import json
from pathlib import Path

import pytest

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from starlette.testclient import TestClient  # noqa: E402

from roomcorr import rooms  # noqa: E402
from roomcorr.app import imports  # noqa: E402
from roomcorr.app.history import history  # noqa: E402
from roomcorr.ui.server import TOKEN_HEADER, create_app  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
DEMO = sorted((REPO / "measurements_demo").glob("pos*.wav"))
TOKEN = "test-token-import-0123456789"
PORT = 48322


@pytest.fixture()
def room(tmp_path) -> rooms.Room:
    return rooms.init_room(tmp_path / "den")


@pytest.fixture()
def client(room) -> TestClient:
    return TestClient(create_app(room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")


def _auth() -> dict[str, str]:
    return {TOKEN_HEADER: TOKEN}


def _upload(paths) -> list[dict[str, str]]:
    return [{"name": p.name, "data": base64.b64encode(p.read_bytes()).decode()} for p in paths]


def _runs(room) -> list[str]:
    return [r.run_id for r in rooms.list_runs(room, "measurement")]


def test_upload_makes_the_same_run_as_the_command_line(client, room):
    r = client.post(
        "/api/import",
        headers=_auth(),
        json={"files": _upload(DEMO), "names": "west,east", "timing_basis": "reference:east"},
    )
    assert r.status_code == 200, r.text
    doc = r.json()
    assert doc["positions"] == 4 and doc["names"] == ["west", "east"]
    assert doc["timing_basis"]["label"] == "acoustic reference: east (output 2)"
    run = rooms.list_runs(room, "measurement", include_incomplete=False)[0]
    assert rooms.verify_run(run.path) == []
    for i, src in enumerate(DEMO, start=1):
        assert (run.path / f"pos{i}.wav").read_bytes() == src.read_bytes()
    # the Room tab shows the timing basis from the same history entries as the CLI
    overview = client.get("/api/room", headers=_auth()).json()
    assert (
        overview["runs"][0]["figures"]["timing_basis"]
        == history(room)[0]["figures"]["timing_basis"]
    )


def test_choose_files_inside_the_room(client, room):
    incoming = room.root / "incoming"
    incoming.mkdir()
    for p in DEMO[:2]:
        (incoming / p.name).write_bytes(p.read_bytes())
    listed = client.get("/api/import/candidates", headers=_auth()).json()
    assert listed == ["incoming/pos1.wav", "incoming/pos2.wav"]
    r = client.post("/api/import", headers=_auth(), json={"paths": listed})
    assert r.status_code == 200, r.text
    assert r.json()["timing_basis"]["kind"] == "unknown"


@pytest.mark.parametrize(
    "body, want",
    [
        ({"paths": ["../outside.wav"]}, "not a file of the room"),
        ({"paths": ["/etc/passwd"]}, "not a file of the room"),
        ({"paths": ["incoming/link.wav"]}, "a link"),
        ({"files": [{"name": "../x.wav", "data": ""}]}, "not a WAV file name"),
        ({"files": [{"name": "a.wav", "data": "@@@"}]}, "not base64"),
        ({"files": [{"name": "a.wav", "data": base64.b64encode(b"RIFF....").decode()}]}, "a.wav"),
        ({}, "one of"),
    ],
)
def test_refusals_are_400_and_write_nothing(client, room, tmp_path, body, want):
    outside = tmp_path / "outside.wav"
    outside.write_bytes(DEMO[0].read_bytes())
    (room.root / "incoming").mkdir(exist_ok=True)
    link = room.root / "incoming" / "link.wav"
    if not link.is_symlink():
        link.symlink_to(outside)
    r = client.post("/api/import", headers=_auth(), json=body)
    assert r.status_code == 400, r.text
    assert want in r.json()["error"]
    assert _runs(room) == []


def test_token_host_and_size_are_checked(room):
    app = create_app(room, TOKEN, PORT)
    good = TestClient(app, base_url=f"http://127.0.0.1:{PORT}")
    assert good.post("/api/import", json={"paths": []}).status_code == 403  # no token
    evil = TestClient(app, base_url=f"http://evil.example:{PORT}")
    assert evil.post("/api/import", headers=_auth(), json={}).status_code == 403
    foreign = {**_auth(), "origin": "http://evil.example"}
    assert good.post("/api/import", headers=foreign, json={}).status_code == 403
    big = b'{"files": "' + b"A" * (imports.MAX_IMPORT_BYTES + 1) + b'"}'
    r = good.post(
        "/api/import", headers={**_auth(), "content-type": "application/json"}, content=big
    )
    assert r.status_code == 413
    assert _runs(room) == []
    assert json.loads(r.text)["error"].startswith("request: larger than")


def test_browser_uploads_impulse_responses_and_shows_the_timing_basis(room, tmp_path):
    """A real browser: the Room tab's import form uploads WAVs, the new run appears with its
    timing basis (headless Chromium through Selenium, as tests/test_ui_server.py)."""
    from test_ui_server import _chrome, _no_console_errors

    from roomcorr.ui.server import background_server

    driver = _chrome(tmp_path)
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import Select, WebDriverWait

    try:
        with background_server(room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "runs in"))
            upload = driver.find_element(By.ID, "i-upload")
            upload.send_keys("\n".join(str(p) for p in DEMO))
            driver.find_element(By.ID, "i-names").send_keys("west,east")
            Select(driver.find_element(By.ID, "i-basis")).select_by_value("reference:1")
            driver.find_element(By.ID, "i-go").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "imported 4 position"))
            row = wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))[0]
            assert "timing: acoustic reference: west (output 1)" in row.text
            _no_console_errors(driver)
    finally:
        driver.quit()
    assert len(rooms.list_runs(room, "measurement", include_incomplete=False)) == 1
