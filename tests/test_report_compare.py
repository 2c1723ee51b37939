"""The report's comparison section: a room with two measurements, one loudspeaker moved."""

from __future__ import annotations

import html as _html
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from roomcorr import rooms
from roomcorr.app.report import report_comparison, write_folder_report
from roomcorr.report.earlier import comparison_section

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "measurements_demo"
FS = 48000
DELAY_SAMPLES = 14  # the right loudspeaker moved back by 14 samples of travel time
_ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def _expected_distance_m(temperature_c: float = 20.0) -> float:
    # ISO 9613-1, annex A: c = 343.2 * sqrt((t + 273.15) / 293.15) m/s; distance = delay * c
    c = 343.2 * np.sqrt((temperature_c + 273.15) / 293.15)
    return DELAY_SAMPLES / FS * c  # 0.1001 m at 20 °C


@pytest.fixture(scope="module")
def room_runs(tmp_path_factory):
    from roomcorr.audio_io import read_ir_set, write_wav
    from roomcorr.deliver.export import write_design
    from roomcorr.pipeline import run_design

    base = tmp_path_factory.mktemp("cmp")
    room = rooms.init_room(base / "room", name="test room")
    # the demo room was synthesised on one absolute time origin: stated as a loopback basis
    absolute = {"timing_basis": {"kind": "loopback"}}
    m1 = rooms.add_measurement(room, [DEMO], record=absolute)
    irs, fs, _ = read_ir_set(rooms.measurement_files(m1))
    assert fs == FS
    moved = irs.copy()
    moved[:, 1] = 0.0
    moved[:, 1, DELAY_SAMPLES:] = irs[:, 1, :-DELAY_SAMPLES]  # right channel arrives later
    src = base / "moved"
    src.mkdir()
    for p in range(moved.shape[0]):
        write_wav(src / f"pos{p + 1}.wav", moved[p], fs)
    m2 = rooms.add_measurement(room, [src], record=absolute)
    settings = rooms.load_room_settings(room)
    settings.design.sample_rates = (48000,)
    with rooms.new_run(room, "design", info={"measurement": m2.name}) as design:
        write_design(run_design(moved, fs, settings), design, extra={"measurement": m2.name})
    write_folder_report(design)
    return room, m1, m2, design


def _table_row(page: str, section: str, first_cell: str) -> list[str]:
    body = page.split(f'<section id="{section}">', 1)[1].split("</section>", 1)[0]
    for row in re.findall(r"<tr>(.*?)</tr>", body):
        cells = [_html.unescape(c) for c in re.findall(r"<td>(.*?)</td>", row)]
        if cells and cells[0] == first_cell:
            return cells
    raise AssertionError(f"no row {first_cell!r} in section {section}")


def test_design_run_report_compares_with_the_earlier_measurement(room_runs):
    room, m1, m2, design = room_runs
    page = (design / "report.html").read_text(encoding="utf-8")
    assert '<section id="compare">' in page
    # placed right after the overview, listed in the navigation
    assert page.index('<section id="overview">') < page.index('<section id="compare">')
    assert page.index('<section id="compare">') < page.index('<section id="room">')
    assert 'href="#compare"' in page
    assert 'data-figure="compare"' in page
    png = design / "report" / "compare.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    embedded = re.search(r'data-figure="compare"><img[^>]*src="data:image/png;base64,', page)
    assert embedded is not None
    # the before and after runs are named by their place in the room
    assert f"measurements/{m1.name}" in page and f"measurements/{m2.name}" in page
    right = _table_row(page, "compare", "right")
    left = _table_row(page, "compare", "left")
    assert float(right[2]) == pytest.approx(_expected_distance_m(), abs=0.02)
    assert float(right[1]) == pytest.approx(DELAY_SAMPLES / FS * 1e3, abs=0.06)
    assert float(left[2]) == pytest.approx(0.0, abs=0.02)
    # only a delay: the level is unchanged (issue check: within 0.5 dB)
    assert float(right[3]) == pytest.approx(0.0, abs=0.5)
    # the plain sentences of format_comparison sit in the last column
    assert "arrival" in right[4] and "distance" in right[4]
    # a finished room run stays sealed: the report is written beside it, and
    # every file its complete.json lists still has its recorded SHA-256
    manifest = json.loads((design / "manifest.json").read_text(encoding="utf-8"))
    assert "report/compare.png" not in {e["path"] for e in manifest["files"]}
    assert rooms.verify_run(design) == []
    assert "https://" not in page and "http://" not in page


def test_comparison_figures_match_compare(room_runs):
    room, m1, m2, _ = room_runs
    res = report_comparison(m2)
    assert res is not None
    assert res["before"] == f"measurements/{m1.name}"
    right = next(c for c in res["channels"] if c["name"] == "right")
    assert right["distance_change_m"] == pytest.approx(_expected_distance_m(), abs=0.02)
    sec = comparison_section(res)
    assert sec.table[0][:4] == [
        "channel", "arrival change (ms)", "distance change (m)", "level change (dB)"
    ]
    assert [r[0] for r in sec.table[1:]] == ["left", "right"]
    assert any("speed of sound" in p.lower() for p in sec.paragraphs)


def test_first_measurement_has_no_comparison(room_runs):
    _, m1, _, _ = room_runs
    assert report_comparison(m1) is None  # nothing earlier in the room
    write_folder_report(m1)
    page = (m1 / "report.html").read_text(encoding="utf-8")
    assert 'id="compare"' not in page and 'data-figure="compare"' not in page
    assert not (m1 / "report" / "compare.png").exists()


def test_cli_compare_with_an_explicit_measurement(room_runs):
    room, m1, m2, _ = room_runs
    # the first measurement against the second, named by run id: the right loudspeaker
    # is now 0.1 m nearer (negative change)
    run = subprocess.run(
        [sys.executable, "-m", "roomcorr", "report", str(m1), "--compare-with", m2.name],
        capture_output=True, text=True, timeout=300, env=_ENV, cwd=room.root,
    )
    assert run.returncode == 0, run.stderr
    page = (m1 / "report.html").read_text(encoding="utf-8")
    right = _table_row(page, "compare", "right")
    assert float(right[2]) == pytest.approx(-_expected_distance_m(), abs=0.02)
    assert (m1 / "report" / "compare.png").is_file()


def test_cli_compare_with_a_missing_run(room_runs):
    room, m1, _, _ = room_runs
    run = subprocess.run(
        [sys.executable, "-m", "roomcorr", "report", str(m1), "--compare-with", "1999-01"],
        capture_output=True, text=True, timeout=120, env=_ENV, cwd=room.root,
    )
    assert run.returncode == 2
    assert "1999-01" in run.stderr and len(run.stderr.strip().splitlines()) == 1
