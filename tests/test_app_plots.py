"""The app's plots read at a glance: y-ranges, target editing, levels, names and notes.

Browser checks run the real page in headless Chromium (as tests/test_ui_server.py does);
the numbers behind them are checked against the functions the command line uses
(the saved design's manifest, the report's colour scale) and against plain arithmetic.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from room_holder import room_held_elsewhere  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402
from test_ui_server import PORT, TOKEN, _auth, _chrome, _no_console_errors  # noqa: E402

from roomcorr import cli, rooms  # noqa: E402
from roomcorr.app.design import DesignPreview  # noqa: E402
from roomcorr.app.explore import compare_view, decay_view  # noqa: E402
from roomcorr.app.history import (  # noqa: E402
    LABELS_FILE,
    format_history,
    history,
    run_labels,
    set_run_label,
)
from roomcorr.deliver.export import read_manifest  # noqa: E402
from roomcorr.errors import InputFileError, RoomBusyError  # noqa: E402
from roomcorr.report import figures as fg  # noqa: E402
from roomcorr.ui.server import background_server, create_app  # noqa: E402

REPO = Path(__file__).resolve().parents[1]

#: The issue's figures: empty margin of a plot's y-range (dB), and 10 px of drag (dB).
MAX_MARGIN_DB = 10.0
MAX_DB_PER_10_PX = 1.0


@pytest.fixture(scope="module")
def room(tmp_path_factory) -> rooms.Room:
    """The demo measurement, twice (for Compare), and one design made by the CLI."""
    root = tmp_path_factory.mktemp("plots") / "den"
    r = rooms.init_room(root)
    wavs = sorted((REPO / "measurements_demo").glob("*.wav"))
    rooms.add_measurement(r, wavs)
    rooms.add_measurement(r, wavs)
    assert cli.main(["design", "--room", str(root), "--rates", "48000"]) == 0
    return r


@pytest.fixture()
def client(room) -> TestClient:
    return TestClient(create_app(room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")


# ------------------------------------------------------------------ numbers behind the plots


def test_preview_levels_are_the_saved_designs_manifest_figures(room):
    # Boost and pre-gain beside the preview come from the chain a saved design runs
    # (synthesize_fir, plan_system, full_band_peak_gain_db, common_pre_gain_db): the same
    # edit saved gives the same pre-gain and largest boost in its manifest.
    prev = DesignPreview(room)
    edit = {"table": {"tilt_db_per_octave": -0.5, "points": [[60, -2.0], [300, 1.0]]},
            "max_boost_db": 3.5}
    quick = prev.update(edit)
    assert "pre_gain_db" not in quick  # the fast preview leaves them out (asked when idle)
    view = prev.update({**edit, "levels": True})
    run_dir, entries = prev.save(edit, "levels")
    manifest = read_manifest(run_dir)
    assert view["pre_gain_db"] == pytest.approx(manifest["pre_gain_db"], abs=0.01)
    assert view["sample_rates"] == sorted({int(e["sample_rate"]) for e in entries
                                           if e.get("kind") == "fir"})
    boost = max(e["max_boost_db"] for e in entries if e.get("kind") == "fir")
    assert max(c["max_boost_db"] for c in view["channels"]) == pytest.approx(boost, abs=0.01)
    assert all(c["max_boost_db"] <= 3.5 + 0.05 for c in view["channels"])  # the cap holds


def test_compare_difference_is_after_minus_before(room):
    runs = [r.run_id for r in rooms.list_runs(room, "measurement")]
    res = compare_view(room, runs[0], runs[1])
    for ch in res["channels"]:
        c = ch["curves"]
        diff = np.array(c["difference_db"], dtype=float)
        expect = np.array(c["after_db"], dtype=float) - np.array(c["before_db"], dtype=float)
        np.testing.assert_allclose(diff, expect, atol=1.5e-3)  # arithmetic, 3 decimals sent


def test_decay_map_colours_are_the_reports(room):
    # One colour scale: the app draws with the stops the decay view sends, which are the
    # report's; the report's matplotlib colormap passes through every stop (matplotlib's
    # LinearSegmentedColormap interpolates linearly between them).
    run_id = rooms.list_runs(room, "design", include_incomplete=False)[-1].run_id
    view = decay_view(room, "design", run_id, channel=0)
    scale = view["colour_scale"]
    assert scale["floor_db"] == fg.DECAY_MAP_FLOOR_DB
    assert scale["stops"] == [[db, list(rgb)] for db, rgb in fg.DECAY_MAP_STOPS]
    cmap = fg.decay_map_colormap()
    for db, rgb in fg.DECAY_MAP_STOPS:
        got = np.array(cmap((db - fg.DECAY_MAP_FLOOR_DB) / -fg.DECAY_MAP_FLOOR_DB)[:3]) * 255
        np.testing.assert_allclose(got, rgb, atol=1.0)


# ------------------------------------------------------------------ names and notes of runs


def test_names_and_notes_live_in_one_room_file(room):
    meas = rooms.list_runs(room, "measurement")[0]
    label = set_run_label(room, "measurement", meas.run_id, "  before the rug ", "sofa moved\nleft")
    assert label == {"name": "before the rug", "note": "sofa moved\nleft"}
    doc = json.loads((room.root / LABELS_FILE).read_text(encoding="utf-8"))
    assert doc["runs"][f"measurement/{meas.run_id}"] == label
    entry = next(r for r in history(room) if r["run_id"] == meas.run_id)
    assert entry["label"] == label and entry["status"] == "complete"  # the run stays whole
    text = "\n".join(format_history(history(room)))  # roomcorr history shows them too
    assert f'{meas.run_id}  measurement  complete  "before the rug"' in text
    assert "      note: sofa moved / left" in text
    rooms.verified(room, meas.path)  # its sealed files are untouched
    # both empty: the label goes
    assert set_run_label(room, "measurement", meas.run_id, "", "") == {}
    assert f"measurement/{meas.run_id}" not in run_labels(room)


@pytest.mark.parametrize(
    ("name", "note", "words"),
    [("x" * 61, "", "at most 60"), ("a\tb", "", "control characters"), (5, "", "expected text"),
     ("ok", "y" * 501, "at most 500")],
)
def test_label_refusals(room, name, note, words):
    meas = rooms.list_runs(room, "measurement")[0]
    with pytest.raises(InputFileError, match=words):
        set_run_label(room, "measurement", meas.run_id, name, note)


def test_label_of_an_unknown_run_and_under_a_held_lock(room, client):
    with pytest.raises(InputFileError, match="not a run"):
        set_run_label(room, "design", "2000-01-01_000000Z", "x")
    r = client.post("/api/label/design/2000-01-01_000000Z", headers=_auth(), json={"name": "x"})
    assert r.status_code == 404
    meas = rooms.list_runs(room, "measurement")[0]
    with room_held_elsewhere(room):
        with pytest.raises(RoomBusyError):
            set_run_label(room, "measurement", meas.run_id, "busy")
        r = client.post(f"/api/label/measurement/{meas.run_id}", headers=_auth(),
                        json={"name": "busy"})
        assert r.status_code == 409
    r = client.post(f"/api/label/measurement/{meas.run_id}", json={"name": "no token"})
    assert r.status_code in (401, 403)


def test_a_damaged_labels_file_is_named_not_emptied(room, tmp_path):
    path = room.root / LABELS_FILE
    keep = path.read_text(encoding="utf-8") if path.exists() else None
    try:
        path.write_text("{not json", encoding="utf-8")
        with pytest.raises(InputFileError, match="damaged"):
            run_labels(room)
        meas = rooms.list_runs(room, "measurement")[0]
        with pytest.raises(InputFileError):
            set_run_label(room, "measurement", meas.run_id, "x")
        assert path.read_text(encoding="utf-8") == "{not json"  # nothing overwritten
    finally:
        if keep is None:
            path.unlink()
        else:
            path.write_text(keep, encoding="utf-8")


# ------------------------------------------------------------------ in the browser


def _margins(plots: list[dict]) -> list[tuple[str, float]]:
    """Empty margin (dB) of each plot: its y-range minus its curves' extent in its band."""
    out = []
    for p in plots:
        if p["extent"] is None:
            continue
        lo, hi = p["y"]
        elo, ehi = p["extent"]
        out.append((p["title"], (hi - lo) - (ehi - elo)))
    return out


def test_browser_plots_fit_their_curves_and_a_finger_can_drag(room, tmp_path):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    driver = _chrome(tmp_path, height=1800)

    def state() -> dict:
        return driver.execute_script("return window.roomcorrDesign()")

    def settled(n: int) -> None:
        wait.until(lambda d: state()["previews"] > n)
        wait.until(lambda d: not d.execute_script("return inFlight || queued"))

    try:
        with background_server(room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))
            # rows read as links: pointer cursor and an "open" cell
            row = driver.find_element(By.CSS_SELECTOR, "#runs tbody tr.pick")
            assert row.value_of_css_property("cursor") == "pointer"
            assert "open" in row.find_element(By.CSS_SELECTOR, "td.open").text

            # Measure, idle: Stop is not red; the meter's words follow its marks
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=measure]").click()
            stop = driver.find_element(By.ID, "m-stop")
            assert "idle" in stop.get_attribute("class")
            assert stop.value_of_css_property("background-color") in (
                "rgba(255, 255, 255, 1)", "rgb(255, 255, 255)")
            # a -4 dBFS peak, held (its mark stays), then the level sinks below -60 dBFS
            # (the level starts just under the held peak, so the hold is not renewed)
            driver.execute_script("measure.level = {peak: -4.5, rms: -12}; measure.peakHold = -4;"
                                  "measure.peakHoldAt = performance.now() + 1e7;")
            wait.until(lambda d: d.execute_script("return measure.level.peak < -70"))
            wait.until(lambda d: "now silent" in d.find_element(By.ID, "m-meter-text").text
                       or "now peak -" in d.find_element(By.ID, "m-meter-text").text)
            text = driver.find_element(By.ID, "m-meter-text").text
            assert text.startswith("input peak -4.0 dBFS (purple mark") and "quiet" not in text
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()

            # Design: every level plot spans its curves with at most 10 dB to spare
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            wait.until(lambda d: state()["previews"] >= 1)
            margins = _margins(driver.execute_script("return window.roomcorrPlots('design-plots')"))
            assert len(margins) == 4  # two loudspeakers, two plots each
            assert all(0.0 <= m <= MAX_MARGIN_DB for _, m in margins), margins
            # the boost and pre-gain beside the preview, once the page is idle
            levels = driver.find_element(By.ID, "d-levels")
            wait.until(lambda d: levels.get_attribute("data-pre-gain-db"))
            shown = float(levels.get_attribute("data-pre-gain-db"))
            expect = DesignPreview(room).update({"target": "flat", "max_boost_db": 4.0,
                                                 "levels": True})["pre_gain_db"]
            assert shown == pytest.approx(expect, abs=0.005)
            assert "pre-gain" in driver.find_element(By.ID, "d-levels").text

            # one point: the note says it cannot change the shape; a finger's 10 px <= 1 dB
            over = driver.find_element(By.CSS_SELECTOR, "#design-plots .target-plot .u-over")
            w, h = over.rect["width"], over.rect["height"]

            def at(x: float, y: float) -> tuple[int, int]:
                return int(round(x - w / 2)), int(round(y - h / 2))

            assert not driver.find_element(By.ID, "d-point-note").is_displayed()
            x, y = driver.execute_script("return window.roomcorrDesign().targetPixel(400)")
            n = state()["previews"]
            ActionChains(driver).move_to_element_with_offset(over, *at(x, y)).click().perform()
            settled(n)
            assert len(state()["points"]) == 1
            assert driver.find_element(By.ID, "d-point-note").is_displayed()
            assert state()["pxPerDb"] >= 10.0
            g0 = state()["points"][0][1]
            n = state()["previews"]
            hx, hy = state()["handles"][0]
            chain = ActionChains(driver).move_to_element_with_offset(over, *at(hx, hy))
            chain.click_and_hold().move_by_offset(0, -5).move_by_offset(0, -5).release().perform()
            settled(n)
            moved = state()["points"][0][1] - g0
            assert 0.3 <= moved <= MAX_DB_PER_10_PX, moved  # it moved, and finely
            print(f"design margins {margins}; 10 px drag moved {moved:.2f} dB "
                  f"({state()['pxPerDb']:.1f} px/dB)")

            # undo and redo: the drag, then the added point, and back
            driver.find_element(By.ID, "d-undo").click()
            wait.until(lambda d: state()["points"] and state()["points"][0][1] == g0)
            driver.find_element(By.ID, "d-undo").click()
            wait.until(lambda d: state()["points"] == [])
            assert not driver.find_element(By.ID, "d-point-note").is_displayed()
            driver.find_element(By.ID, "d-redo").click()
            driver.find_element(By.ID, "d-redo").click()
            wait.until(lambda d: state()["points"] and state()["points"][0][1] == pytest.approx(
                g0 + moved))

            # zoom out and back
            btn = driver.find_element(By.CSS_SELECTOR, "#design-plots .zoom-out")
            before = driver.execute_script("return window.roomcorrPlots('design-plots')")[0]["y"]
            btn.click()
            wide = driver.execute_script("return window.roomcorrPlots('design-plots')")[0]["y"]
            assert wide[1] - wide[0] > before[1] - before[0]
            btn.click()

            # Save: a link to the new run opens it in Explore
            n_designs = len(rooms.list_runs(room, "design"))
            driver.find_element(By.ID, "d-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "saved as design"))
            assert len(rooms.list_runs(room, "design")) == n_designs + 1
            new_id = rooms.list_runs(room, "design")[-1].run_id
            driver.find_element(By.ID, "d-saved-link").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "explore-title"), new_id))
            wait.until(lambda d: d.execute_script("return document.body.dataset.exploreMs"))
            margins = _margins(driver.execute_script("return window.roomcorrPlots('plots')"))
            level = [(t, m) for t, m in margins if "Measured" in t or "Predicted" in t]
            assert level and all(m <= MAX_MARGIN_DB for _, m in level), margins

            # Explore: another design overlaid on the one shown
            sel = driver.find_elements(By.CSS_SELECTOR, "#explore-controls select")[2]
            other = [o.get_attribute("value") for o in sel.find_elements(By.TAG_NAME, "option")]
            assert len(other) >= 2 and new_id not in other
            driver.execute_script(
                "arguments[0].value = arguments[1];"
                "arguments[0].dispatchEvent(new Event('change'))",
                sel, other[1])
            wait.until(lambda d: "Purple: design" in d.find_element(By.ID, "plots").text)
            series = driver.execute_script(
                "return [...document.querySelectorAll('#plots .plot')][0]"
                ".querySelectorAll('.u-legend .u-series').length")
            assert series >= 9  # 4 positions, average, target, predicted, + the overlay's two

            # the decay map's colours are the report's
            wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#decay-plots canvas"))
            for db, rgb in fg.DECAY_MAP_STOPS:
                got = driver.execute_script(f"return window.roomcorrHeat({db})")
                assert got == list(rgb)

            # the saved design can be heard from the Design page: its second link opens the
            # Files page's Listen row on that design
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            driver.find_element(By.ID, "d-saved-listen").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "files-title"), new_id))
            assert driver.find_element(By.ID, "listen-start").is_displayed()

            # Compare: a difference curve below the two
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()
            driver.find_element(By.ID, "c-go").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "compared"))
            shown_plots = driver.execute_script("return window.roomcorrPlots('plots')")
            titles = [t["title"] for t in shown_plots]
            assert any("difference (after − before)" in t for t in titles), titles
            margins = _margins(shown_plots)  # before/after and difference, 20 Hz to 20 kHz
            assert margins and all(m <= MAX_MARGIN_DB for _, m in margins), margins

            # a name and a note, given on the Room page, stored in the room's labels file
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()
            first = driver.find_element(By.CSS_SELECTOR, "#runs tbody tr")
            first.find_element(By.CSS_SELECTOR, "button.l-edit").click()
            first = driver.find_element(By.CSS_SELECTOR, "#runs tbody tr")
            first.find_element(By.CSS_SELECTOR, "input.l-name").send_keys("first try")
            first.find_element(By.CSS_SELECTOR, "textarea.l-note").send_keys("mic on the sofa")
            first.find_element(By.CSS_SELECTOR, "button.l-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "runs"), "first try"))
            kind, run_id = driver.find_element(
                By.CSS_SELECTOR, "#runs tbody tr").get_attribute("data-run").split("/")
            assert run_labels(room)[f"{kind}/{run_id}"] == {"name": "first try",
                                                          "note": "mic on the sofa"}
            _no_console_errors(driver)
    finally:
        driver.quit()
