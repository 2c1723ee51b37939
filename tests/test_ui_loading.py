"""The app's Files page additions: where the design is, how to load it, one zip of it."""

from __future__ import annotations

import hashlib
import io
import os
import zipfile

import pytest

pytest.importorskip("starlette")

from starlette.testclient import TestClient  # noqa: E402
from test_ui_server import PORT, TOKEN, _auth, _design_id, demo_room  # noqa: E402,F401

from roomcorr.deliver.export import read_manifest  # noqa: E402
from roomcorr.ui.server import create_app  # noqa: E402


@pytest.fixture()
def client(demo_room) -> TestClient:  # noqa: F811
    return TestClient(create_app(demo_room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")


def test_loading_says_where_the_files_are_and_how_to_load_them(client, demo_room):  # noqa: F811
    run_id = _design_id(demo_room)
    doc = client.get(f"/api/loading/{run_id}", headers=_auth()).json()
    folder = demo_room.designs_dir / run_id
    assert doc["folder"] == str(folder.resolve())
    man = read_manifest(folder)
    wavs = [e for e in man["files"] if e["kind"] == "fir" and "format" not in e]
    rows = {r["path"]: r for r in doc["files"]}
    for e in wavs:  # taps and pre-gain per file, as the manifest records them
        assert rows[e["path"]]["taps"] == e["taps"]
        assert rows[e["path"]]["pre_gain_db"] == man["pre_gain_db"]
    assert any("already inside every filter" in line for line in doc["lines"])
    assert doc["commands"]["rates"][0]["ffmpeg"].startswith("ffmpeg ")
    assert any("roomcorr listen" in line for line in doc["next"])


def test_one_zip_holds_the_whole_design_byte_for_byte(client, demo_room):  # noqa: F811
    run_id = _design_id(demo_room)
    r = client.get(f"/api/zip/{run_id}", headers=_auth())
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    assert f'filename="{run_id}.zip"' in r.headers["content-disposition"]
    z = zipfile.ZipFile(io.BytesIO(r.content))
    folder = demo_room.designs_dir / run_id
    man = read_manifest(folder)
    names = set(z.namelist())
    assert f"{run_id}/manifest.json" in names
    for e in man["files"]:
        data = z.read(f"{run_id}/{e['path']}")
        assert hashlib.sha256(data).hexdigest() == e["sha256"]


def test_zip_refusals(client, demo_room, tmp_path):  # noqa: F811
    assert client.get("/api/zip/nope").status_code in (401, 403)  # no token
    assert client.get("/api/zip/..", headers=_auth()).status_code == 404
    assert client.get("/api/zip/no-such-run", headers=_auth()).status_code == 404
    run_id = _design_id(demo_room)
    folder = demo_room.designs_dir / run_id
    wav = next(p for p in (folder / "fir").rglob("*.wav"))
    saved = wav.read_bytes()
    secret = tmp_path / "secret.wav"
    secret.write_bytes(b"not yours" + saved[9:])
    wav.unlink()
    os.symlink(secret, wav)  # a listed file replaced by a link leading out
    try:
        r = client.get(f"/api/zip/{run_id}", headers=_auth())
        assert r.status_code == 404 and b"not yours" not in r.content
    finally:
        wav.unlink()
        wav.write_bytes(saved)
