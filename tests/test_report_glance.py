"""The report's top: a short "At a glance", the header facts, the target explained."""

from __future__ import annotations

import re
from html import unescape
from pathlib import Path

import numpy as np
import pytest

from roomcorr import cli, rooms
from roomcorr.grid import log_grid
from roomcorr.report import glance
from roomcorr.report import html as rh

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    """The demo room (two channels, four positions), one design and its report page."""
    room = rooms.init_room(tmp_path_factory.mktemp("glance") / "den")
    rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
    assert cli.main(["design", "--room", str(room.root), "--rates", "48000"]) == 0
    design = rooms.list_runs(room, "design", include_incomplete=False)[-1]
    page = rh.write_report(room.designs_dir / design.run_id, dpi=30).read_text(encoding="utf-8")
    return room, design.run_id, page


def _section(page: str, sid: str) -> str:
    return page.split(f'<section id="{sid}">')[1].split("</section>")[0]


def test_at_a_glance_is_short_for_a_stereo_design(demo_report):
    # the figure: at most about 8 lines for a stereo design; the rest further down
    _, _, page = demo_report
    items = re.findall(r"<li>(.*?)</li>", _section(page, "overview"), re.S)
    assert 4 <= len(items) <= 8, items
    text = unescape(" ".join(items))
    assert "(left)" in text and "(right)" in text  # both channels on the same lines
    assert "Pre-gain -2.45 dB" in text  # the manifest's pre-gain, as the command line prints it
    details = unescape(_section(page, "changes"))
    # every sentence of the full summary is still on the page, below
    assert "Left: room peaks were cut" in details and "Right: room peaks were cut" in details
    assert page.index('<section id="overview">') < page.index('<section id="changes">')


def test_header_names_date_runs_positions_and_what_was_measured(demo_report):
    room, run_id, page = demo_report
    header = unescape(page.split("<header>")[1].split("</header>")[0])
    meas = rooms.latest_measurement(room).name
    assert f"Design {run_id}" in header and f"from measurement {meas}" in header
    # the run id's own time: YYYY-MM-DD_HHMMSSZ -> "YYYY-MM-DD HH:MM UTC"
    assert f"{run_id[:10]} {run_id[11:13]}:{run_id[13:15]} UTC" in header
    assert "4 microphone positions (pos1, pos2, pos3, pos4)" in header
    assert "2 loudspeaker channels (left, right)" in header


def test_the_target_step_is_explained_beside_the_figure(demo_report):
    _, _, page = demo_report
    for sid in ("room", "result"):
        body = unescape(_section(page, sid))
        assert "The dashed line is the flat target" in body
        assert "steps down" in body and "200 Hz and 350 Hz" in body


def test_target_step_size_is_the_design_rule_s():
    # a flat shape placed with the bass 4 dB lower: choose_level's raised-cosine blend
    # between 200 and 350 Hz (roomcorr.design.curve.area) gives exactly a 4.0 dB step
    from roomcorr.design.curve.area import choose_level

    f = log_grid()
    average = np.where(f < 200, -4.0, 0.0)
    target, _ = choose_level(f, average, np.zeros_like(f), (20.0, 300.0))
    note = glance.target_note(f, target, np.zeros_like(f), "flat")
    assert "steps down 4.0 dB" in note
    # no step when the bass is not lower: nothing to explain
    flat, _ = choose_level(f, np.zeros_like(f), np.zeros_like(f), (20.0, 300.0))
    assert "steps down" not in glance.target_note(f, flat, np.zeros_like(f), "flat")


def test_run_date_reads_only_run_ids():
    assert glance.run_date("2026-12-04_203110Z") == "2026-12-04 20:31 UTC"
    assert glance.run_date("my-folder") is None
    assert glance.run_date("2026-13-40_250000Z") is None  # not a date: no date shown


def test_the_decay_section_names_the_library(demo_report):
    # the issue: the report says which library computed the decay times
    import pyrato

    _, _, page = demo_report
    body = unescape(_section(page, "decay"))
    assert f"EDT, T20 and T30 computed with pyrato {pyrato.__version__}" in body
