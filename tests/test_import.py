"""``roomcorr import``: impulse responses from elsewhere become a measurement run of a room."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from roomcorr import rooms
from roomcorr.audio_io import write_wav

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "measurements_demo"
_ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args],
        cwd=cwd,
        env=_ENV,
        capture_output=True,
        text=True,
        timeout=300,
    )


def snapshot(folder: Path) -> dict[str, int]:
    return {
        p.relative_to(folder).as_posix(): (p.stat().st_size if p.is_file() else -1)
        for p in folder.rglob("*")
    }


@pytest.fixture
def room(tmp_path: Path) -> rooms.Room:
    return rooms.init_room(tmp_path / "room", name="import room")


def demo_files() -> list[str]:
    return [str(p) for p in sorted(DEMO.glob("pos*.wav"))]


def test_import_makes_a_run_that_history_design_and_compare_use(room: rooms.Room):
    r = cli("import", *demo_files(), "--names", "west,east", cwd=room.root)
    assert r.returncode == 0, r.stderr
    assert "4 position(s) x 2 channel(s) (west, east), 48000 Hz" in r.stdout
    assert "timing basis: unknown" in r.stdout
    runs = rooms.list_runs(room, "measurement", include_incomplete=False)
    assert len(runs) == 1
    run = runs[0]
    # copied byte for byte and hashed (SHA-256 in the run's complete.json)
    for i, src in enumerate(demo_files(), start=1):
        assert (run.path / f"pos{i}.wav").read_bytes() == Path(src).read_bytes()
    assert rooms.verify_run(run.path) == []
    assert {"pos1.wav", "measurement.json"} <= set(run.marker["files"])
    record = json.loads((run.path / "measurement.json").read_text())
    assert record["timing_basis"] == {"kind": "unknown"}
    assert record["settings"]["names"] == ["west", "east"]
    h = cli("history", "--json", cwd=room.root)
    assert h.returncode == 0, h.stderr
    fig = json.loads(h.stdout)["runs"][0]["figures"]
    assert fig["timing_basis"]["kind"] == "unknown" and fig["channels"] == 2
    d = cli("design", "--rates", "48000", cwd=room.root)
    assert d.returncode == 0, d.stderr
    assert "Timing basis of the measurement: unknown" in d.stdout  # summary = manifest = report
    design = rooms.list_runs(room, "design", include_incomplete=False)[0].path
    man = json.loads((design / "manifest.json").read_text())
    assert [o["name"] for o in man["outputs"]] == ["west", "east"]  # names from the import
    # the manifest records what the measurement's arrivals (and so its delays) rest on
    assert man["timing_basis"]["kind"] == "unknown"
    assert man["timing_basis"] == fig["timing_basis"]
    rep = cli("report", str(design), cwd=room.root)
    assert rep.returncode == 0, rep.stderr
    page = (design / "report.html").read_text(encoding="utf-8")
    assert "Timing basis of the measurement behind this design: unknown" in page
    # a second import stated as on the same loudspeaker reference; compare works on both
    r2 = cli(
        "import",
        str(DEMO),
        "--names",
        "west,east",
        "--timing-basis",
        "reference:west",
        cwd=room.root,
    )
    assert r2.returncode == 0, r2.stderr
    assert "acoustic reference: west (output 1)" in r2.stdout
    c = cli("compare", "--json", cwd=room.root)
    assert c.returncode == 0, c.stderr
    doc = json.loads(c.stdout)
    assert doc["timing"]["origin"] == "unknown"  # the first run's basis is unknown
    assert doc["filter_fit"]["available"] and doc["filter_fit"]["verdict"] == "keep"


@pytest.mark.parametrize(
    "case",
    [
        "not an impulse response",
        "mixed rates",
        "link out of the room",
        "name clash",
        "names clash",
        "bad basis",
    ],
)
def test_refusals_are_one_line_exit_2_and_write_nothing(room: rooms.Room, tmp_path, case):
    src = tmp_path / "src"
    src.mkdir()
    rng = np.random.default_rng(4)
    files = demo_files()[:2]
    extra: list[str] = []
    if case == "not an impulse response":
        # steady noise: no arrival, no decay (a recording, not an impulse response)
        write_wav(src / "noise.wav", 0.1 * rng.standard_normal((2, 48000)), 48000)
        files = [files[0], str(src / "noise.wav")]
        want = "does not look like an impulse response"
    elif case == "mixed rates":
        import soundfile as sf

        data, fs = sf.read(files[1], always_2d=True)
        sf.write(str(src / "pos2.wav"), data, 44100, subtype="FLOAT")
        files = [files[0], str(src / "pos2.wav")]
        want = "sample rate 44100 Hz differs"
    elif case == "link out of the room":
        inside = room.root / "incoming"
        inside.mkdir()
        (inside / "pos9.wav").symlink_to(files[1])
        files = [files[0], str(inside / "pos9.wav")]
        want = "link"
    elif case == "name clash":
        other = src / "pos1.wav"
        other.write_bytes(Path(files[1]).read_bytes())
        files = [files[0], str(other)]
        want = "name clash"
    elif case == "names clash":
        extra = ["--names", "left,left"]
        want = "given twice"
    else:
        extra = ["--timing-basis", "sideways"]
        want = "--timing-basis sideways"
    before = snapshot(room.root)
    r = cli("import", *files, *extra, cwd=room.root)
    assert r.returncode == 2, r.stdout + r.stderr
    assert r.stderr.count("\n") == 1 and want in r.stderr, r.stderr
    assert "Traceback" not in r.stderr
    assert snapshot(room.root) == before  # nothing written
    assert not (room.root / "measurements").exists() or not any(
        (room.root / "measurements").iterdir()
    )


def test_import_outside_a_room_folder_says_how_to_make_one(tmp_path: Path):
    r = cli("import", *demo_files(), cwd=tmp_path)
    assert r.returncode == 2 and "roomcorr init" in r.stderr and r.stderr.count("\n") == 1
