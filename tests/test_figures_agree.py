"""One place per figure: the summary, the report, history and the app say the same numbers.

Issue 22, item 9: the same design said "largest boost 3.3 dB" in the summary (the
correction curve's maximum) and "boost up to 2.5 dB" in history (the filters'
realised gain). The one definition kept is the realised one (what the boost cap
limits); every reader takes it from the manifest's figures block.
"""

from __future__ import annotations

import html
import json
import re

import numpy as np
import pytest
import soundfile as sf
from conftest import REPO
from scipy.signal import freqz
from test_cli import run

from roomcorr import rooms
from roomcorr.app.explore import room_overview
from roomcorr.deliver.figures import design_figures, fmt_db

NEG_ZERO = re.compile(r"-0\.0+(?!\d)")


def test_fmt_db_never_writes_negative_zero():
    assert fmt_db(-0.0001, 2) == "0.00 dB"
    assert fmt_db(-0.004, 2, signed=True) == "+0.00 dB"
    assert fmt_db(-0.0) == "0.0 dB"
    assert fmt_db(-0.05, 1) == "-0.1 dB"  # round half to even of -0.05 -> -0.1 (Python round)
    assert fmt_db(2.448) == "2.4 dB" and fmt_db(2.448, 2, True) == "+2.45 dB"
    assert fmt_db(None) == "-" and fmt_db(float("nan")) == "-"
    assert fmt_db(3.0, unit=False) == "3.0"


def test_design_figures_take_the_largest_over_rates():
    entries = [
        {"kind": "fir", "channel_name": "left", "max_boost_db": 1.0, "peak_gain_db": -1.5,
         "worst_case_gain_db": 3.0},
        {"kind": "fir", "channel_name": "left", "max_boost_db": 1.2, "peak_gain_db": -1.3,
         "worst_case_gain_db": 2.9},
        {"kind": "fir", "channel_name": "right", "max_boost_db": -0.0, "peak_gain_db": -0.0004,
         "worst_case_gain_db": 4.0},
        {"kind": "curves"},
    ]
    f = design_figures(entries, -2.5, {"latency_ms": 0.0})
    assert f["channels"][0] == {"name": "left", "largest_boost_db": 1.2, "peak_gain_db": -1.3,
                                "worst_case_gain_db": 3.0}
    assert f["largest_boost_db"] == 1.2 and f["worst_case_gain_db"] == 4.0
    assert str(f["channels"][1]["peak_gain_db"]) == "0.0"  # no negative zero stored
    with pytest.raises(ValueError):
        design_figures([{**entries[0], "peak_gain_db": float("nan")}], 0.0)


def _text(page: str) -> str:
    return html.unescape(re.sub(r"<[^>]+>", " ", page))


@pytest.mark.parametrize("phase", ["minimum", "mixed"])
def test_every_reader_shows_the_manifest_figures(tmp_path, phase):
    room_dir = tmp_path / "den"
    assert run("init", str(room_dir)).returncode == 0
    room = rooms.open_room(room_dir)
    rooms.add_measurement(room, [REPO / "measurements_demo"])
    extra = ["--formats", "all", "--iir"] if phase == "minimum" else []  # copies carry no figures
    r = run("design", "--rates", "48000", "--phase", phase, *extra, cwd=room_dir)
    assert r.returncode == 0, r.stderr
    (design,) = [d for d in (room_dir / "designs").iterdir() if d.is_dir()]
    man = json.loads((design / "manifest.json").read_text())
    figs = man["figures"]

    # the stored figures against the exported WAVs, measured by scipy.signal.freqz
    # (outside reference): largest boost = largest gain of a file minus the pre-gain
    for c in figs["channels"]:
        h, fs = sf.read(design / "fir" / "48000" / f"{c['name']}.wav", dtype="float64")
        _, resp = freqz(h, worN=1 << 18, include_nyquist=True)
        peak = 20 * np.log10(np.max(np.abs(resp)))
        assert abs(peak - c["peak_gain_db"]) < 0.01
        assert abs(max(peak - figs["pre_gain_db"], 0.0) - c["largest_boost_db"]) < 0.01

    # summary printed by the design command
    out = r.stdout
    assert f"Common pre-gain: {fmt_db(figs['pre_gain_db'], 2, True)}" in out
    for c in figs["channels"]:
        assert f"largest boost {fmt_db(c['largest_boost_db'])}" in out
        assert f"peak gain {fmt_db(c['peak_gain_db'], 2, True)}" in out
        assert f"worst-case gain {fmt_db(c['worst_case_gain_db'], 2, True)}" in out

    # history, JSON and text
    h = run("history", str(room_dir), "--json")
    assert h.returncode == 0, h.stderr
    entry = next(e for e in json.loads(h.stdout)["runs"] if e["kind"] == "design")
    for k in ("pre_gain_db", "largest_boost_db", "peak_gain_db", "worst_case_gain_db"):
        assert entry["figures"][k] == figs[k]
    ht = run("history", str(room_dir))
    assert f"largest boost {fmt_db(figs['largest_boost_db'])}" in ht.stdout
    assert f"peak gain {fmt_db(figs['peak_gain_db'], 2, True)}" in ht.stdout
    assert f"pre-gain {fmt_db(figs['pre_gain_db'], 2, True)}" in ht.stdout
    assert ("latency 20 ms" in ht.stdout) == (phase == "mixed")

    # the app's JSON (the same history entries)
    app_entry = next(e for e in room_overview(room)["runs"] if e["kind"] == "design")
    assert app_entry["figures"]["largest_boost_db"] == figs["largest_boost_db"]
    assert app_entry["figures"]["peak_gain_db"] == figs["peak_gain_db"]

    # the report
    rr = run("report", str(design))
    assert rr.returncode == 0, rr.stderr
    page = _text(next(design.rglob("report.html")).read_text())
    assert f"Largest boost {fmt_db(figs['largest_boost_db'])}" in page
    assert f"Pre-gain {fmt_db(figs['pre_gain_db'], 2, True)}" in page
    for c in figs["channels"]:
        assert fmt_db(c["worst_case_gain_db"], 2, True, unit=False) in page
    texts = [out, ht.stdout, page, rr.stdout]
    texts += [p.read_text() for p in design.glob("iir/*/*.txt")]
    assert len(texts) == (6 if phase == "minimum" else 4)
    for text in texts:
        assert not NEG_ZERO.search(text), NEG_ZERO.search(text)

    if phase == "mixed":  # described as it is, the caution once
        assert "Mixed-phase FIR at 48000 Hz" in page
        assert "Minimum-phase FIR" not in page
        assert "a minimum-phase filter has none" not in page
        assert "design latency taken out" in page  # the corrected response drawn aligned
        assert page.count("late by the latency") == 1
        assert f"at most {fmt_db(figs['pre_ringing_db'])}" in page
    else:
        assert "Minimum-phase FIR at 48000 Hz" in page and "Mixed-phase" not in page
