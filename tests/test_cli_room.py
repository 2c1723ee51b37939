"""`roomcorr design` inside a room folder: latest measurement, new run, history."""

from __future__ import annotations

import json

from conftest import REPO
from test_cli import run

from roomcorr import rooms


def test_design_in_room_uses_latest_measurement(tmp_path):
    room_dir = tmp_path / "lounge"
    assert run("init", str(room_dir)).returncode == 0
    room = rooms.open_room(room_dir)
    meas = rooms.add_measurement(room, [REPO / "measurements_demo"])
    r = run("design", "--rates", "48000", cwd=room_dir)
    assert r.returncode == 0, r.stderr
    assert "latest measurement" in r.stdout
    designs = [d for d in (room_dir / "designs").iterdir() if d.is_dir()]
    assert len(designs) == 1
    d = designs[0]
    marker = json.loads((d / "complete.json").read_text())
    assert marker["info"]["measurement"] == meas.name
    manifest = json.loads((d / "manifest.json").read_text())
    assert manifest["measurement"] == meas.name
    assert all(len(e["sha256"]) == 64 for e in manifest["files"])
    # A second design never overwrites the first.
    r2 = run("design", "--rates", "48000", "--max-boost", "2", cwd=room_dir)
    assert r2.returncode == 0, r2.stderr
    designs2 = sorted(d for d in (room_dir / "designs").iterdir() if d.is_dir())
    assert len(designs2) == 2 and d in designs2
    assert json.loads((d / "manifest.json").read_text()) == manifest
    h = run("history", str(room_dir), "--json")
    assert h.returncode == 0, h.stderr
    assert h.stdout.count('"design"') >= 2


def test_design_outside_room_without_out_is_refused(tmp_path):
    r = run("design", cwd=tmp_path)
    assert r.returncode == 2
    assert "room folder" in r.stderr and "Traceback" not in r.stderr
