"""The browser app's server: the same data as the command line, and every refusal.

The security rules tested here are the module docstring's of
:mod:`roomcorr.ui.server`; the numbers the app serves are checked against the
design files themselves and against scipy (an outside reference).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import soundfile as sf

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from room_holder import room_held_elsewhere  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from roomcorr import cli, rooms  # noqa: E402
from roomcorr.app.compare import compare_measurements  # noqa: E402
from roomcorr.app.history import history  # noqa: E402
from roomcorr.deliver.export import load_design_curves  # noqa: E402
from roomcorr.report.compare import format_comparison  # noqa: E402
from roomcorr.ui.server import TOKEN_HEADER, background_server, bind_loopback, create_app  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
TOKEN = "test-token-0123456789"
PORT = 48321  # only used in the Host header; TestClient opens no socket


@pytest.fixture(scope="module")
def demo_room(tmp_path_factory) -> rooms.Room:
    """A room folder with the demo measurement and one design made by the CLI."""
    root = tmp_path_factory.mktemp("ui") / "den"
    room = rooms.init_room(root)
    rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
    assert cli.main(["design", "--room", str(root), "--rates", "48000"]) == 0
    return room


@pytest.fixture()
def client(demo_room) -> TestClient:
    return TestClient(create_app(demo_room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}")


def _auth() -> dict[str, str]:
    return {TOKEN_HEADER: TOKEN}


def _design_id(room: rooms.Room) -> str:
    return rooms.list_runs(room, "design", include_incomplete=False)[-1].run_id



# --------------------------------------------------------------------------- same engine


def test_room_lists_the_same_runs_as_history(client, demo_room):
    data = client.get("/api/room", headers=_auth()).json()
    expect = history(demo_room)
    assert [(r["kind"], r["run_id"], r["status"]) for r in data["runs"]] == [
        (r["kind"], r["run_id"], r["status"]) for r in expect
    ]
    assert data["name"] == rooms.room_name(demo_room)


def test_design_view_serves_the_design_files_curves(client, demo_room):
    run_id = _design_id(demo_room)
    view = client.get(f"/api/design/{run_id}", headers=_auth()).json()
    curves = load_design_curves(demo_room.designs_dir / run_id)
    freq = curves["freq_hz"]
    x = np.array(view["freq_hz"])
    idx = np.searchsorted(freq, x - 0.01)
    for ch_view, ch in zip(view["channels"], curves["channels"], strict=True):
        np.testing.assert_allclose(ch_view["correction_db"], ch["correction_db"][idx], atol=1e-3)
        np.testing.assert_allclose(ch_view["target_db"], ch["target_db"][idx], atol=1e-3)
        predicted = np.array(ch_view["predicted_db"], dtype=float)
        expect = ch["measured_db"][:, idx] + ch["correction_db"][idx]
        np.testing.assert_allclose(predicted, expect, atol=2e-3)


def test_filter_magnitude_matches_scipy_freqz_of_the_wav(client, demo_room):
    # Outside reference: scipy.signal.freqz of the exported WAV file.
    run_id = _design_id(demo_room)
    view = client.get(f"/api/design/{run_id}", headers=_auth()).json()
    filt = view["filters"]["48000"][0]
    path = demo_room.designs_dir / run_id / "fir" / "48000" / f"{filt['channel']}.wav"
    h, fs = sf.read(path, dtype="float64")
    f = np.array(filt["freq_hz"])
    _, resp = scipy.signal.freqz(h, worN=f, fs=fs)
    np.testing.assert_allclose(filt["magnitude_db"], 20 * np.log10(np.abs(resp)), atol=0.01)


def test_filter_phase_and_group_delay_match_scipy(client, demo_room):
    # Outside reference: scipy.signal.freqz (phase) and scipy.signal.group_delay of the WAV.
    run_id = _design_id(demo_room)
    filt = client.get(f"/api/design/{run_id}", headers=_auth()).json()["filters"]["48000"][1]
    path = demo_room.designs_dir / run_id / "fir" / "48000" / f"{filt['channel']}.wav"
    h, fs = sf.read(path, dtype="float64")
    f = np.array(filt["freq_hz"])
    _, resp = scipy.signal.freqz(h, worN=f, fs=fs)
    diff = np.radians(filt["phase_deg"]) - np.angle(resp)
    assert np.degrees(np.max(np.abs(np.angle(np.exp(1j * diff))))) < 0.5  # rounded to 0.1 degree
    _, gd = scipy.signal.group_delay((h, [1.0]), w=f, fs=fs)
    # read between FFT bins 0.2 Hz apart: 1 % where the delay changes fast (a notch)
    np.testing.assert_allclose(filt["group_delay_ms"], gd / fs * 1000.0, rtol=0.01, atol=0.02)


def test_files_list_and_download_with_matching_sha256(client, demo_room):
    import hashlib

    run_id = _design_id(demo_room)
    files = client.get(f"/api/files/{run_id}", headers=_auth()).json()
    wav = next(f for f in files if f["path"].endswith(".wav"))
    got = client.get(f"/api/file/design/{run_id}/{wav['path']}", headers=_auth())
    assert got.status_code == 200
    assert hashlib.sha256(got.content).hexdigest() == wav["sha256"]


def test_measurement_view_has_every_position(client, demo_room):
    run_id = rooms.latest_measurement(demo_room).name
    view = client.get(f"/api/measurement/{run_id}", headers=_auth()).json()
    n_pos = len(rooms.measurement_files(demo_room.measurements_dir / run_id))
    assert len(view["positions"]) == n_pos
    assert all(len(ch["measured_db"]) == n_pos for ch in view["channels"])


# --------------------------------------------------------------------------- refusals


def test_token_is_required_everywhere(client, demo_room):
    run_id = _design_id(demo_room)
    for path in ("/", "/static/app.js", "/api/room", f"/api/design/{run_id}"):
        assert client.get(path).status_code == 403, path
        assert client.get(path, headers={TOKEN_HEADER: "wrong"}).status_code == 403, path
    assert client.get("/", params={"token": TOKEN}).status_code == 200


def test_page_sets_a_cookie_that_carries_the_token(client):
    first = client.get("/", params={"token": TOKEN})
    assert first.status_code == 200 and "roomcorr_token" in first.cookies
    assert client.get("/api/room").status_code == 200  # the client keeps the cookie


def test_foreign_host_and_origin_are_refused(demo_room):
    # DNS rebinding: a foreign name resolving to 127.0.0.1 still sends its own Host.
    app = create_app(demo_room, TOKEN, PORT)
    evil = TestClient(app, base_url=f"http://evil.example:{PORT}")
    assert evil.get("/api/room", headers=_auth()).status_code == 403
    wrong_port = TestClient(app, base_url=f"http://127.0.0.1:{PORT + 1}")
    assert wrong_port.get("/api/room", headers=_auth()).status_code == 403
    good = TestClient(app, base_url=f"http://127.0.0.1:{PORT}")
    hdr = {**_auth(), "origin": "http://evil.example"}
    assert good.get("/api/room", headers=hdr).status_code == 403
    hdr = {**_auth(), "origin": f"http://localhost:{PORT}"}
    assert good.get("/api/room", headers=hdr).status_code == 200


@pytest.mark.parametrize(
    "path",
    [
        "/api/file/design/{run}/../../roomcorr-room.toml",
        "/api/file/design/{run}/%2e%2e/%2e%2e/roomcorr-room.toml",
        "/api/file/design/{run}//etc/passwd",
        "/api/file/design/../designs/{run}/manifest.json",
        "/api/file/elsewhere/{run}/manifest.json",
        "/api/file/design/{run}/fir",
        "/api/design/..",
        "/api/design/.hidden",
        "/api/static/../server.py",
        "/static/..%2fserver.py",
    ],
)
def test_nothing_outside_the_room_can_be_read(client, demo_room, path):
    r = client.get(path.format(run=_design_id(demo_room)), headers=_auth())
    assert r.status_code in (400, 403, 404), r.text  # 400: not a run id or file name


def test_a_link_leading_out_of_the_run_is_refused(client, demo_room, tmp_path):
    secret = tmp_path / "secret.txt"
    secret.write_text("not yours")
    run_id = _design_id(demo_room)
    link = demo_room.designs_dir / run_id / "escape.txt"
    os.symlink(secret, link)
    try:
        r = client.get(f"/api/file/design/{run_id}/escape.txt", headers=_auth())
        assert r.status_code == 404 and "not yours" not in r.text
    finally:
        link.unlink()


def test_the_server_binds_loopback_only():
    sock = bind_loopback(0)
    try:
        assert sock.getsockname()[0] == "127.0.0.1"
    finally:
        sock.close()


# --------------------------------------------------------------------------- real browser


def _browser_available() -> tuple[str, str] | None:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    return (exe, driver) if exe and driver else None


def _chrome(tmp_path: Path, height: int = 2200):
    """Headless Debian Chromium through Selenium (skips, or fails on CI, without it)."""
    found = _browser_available()
    if found is None:
        if os.environ.get("CI") == "true":
            pytest.fail("chromium and chromium-driver must be installed (the CI script does)")
        pytest.skip("chromium or chromedriver not installed")
    pytest.importorskip("selenium")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = found[0]
    for flag in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--window-size=1300,{height}",
    ):
        opts.add_argument(flag)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(service=Service(found[1]), options=opts)


def _assert_not_blank(shot: Path) -> None:
    """A screenshot with content: not one colour, a fair share of pixels off the background."""
    from matplotlib.image import imread

    img = imread(shot)[..., :3]
    background = np.median(img.reshape(-1, 3), axis=0)
    differs = np.any(np.abs(img - background) > 0.1, axis=-1)
    assert differs.mean() > 0.03 and img.std() > 0.03, shot


def _element_shot(driver, element, path: Path) -> None:
    """A screenshot of one element: scrolled into view, the window's image cut to its box."""
    from matplotlib.image import imread, imsave

    driver.execute_script("arguments[0].scrollIntoView({block: 'start'});", element)
    box = driver.execute_script(
        "const r = arguments[0].getBoundingClientRect();"
        "return [r.left, r.top, r.right, r.bottom, window.devicePixelRatio];",
        element,
    )
    whole = path.with_name(path.stem + "-window.png")
    driver.save_screenshot(str(whole))
    img = imread(whole)
    x0, y0, x1, y1 = (int(round(v * box[4])) for v in box[:4])
    imsave(path, img[max(0, y0) : y1, max(0, x0) : x1])


def _no_console_errors(driver) -> None:
    severe = [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]
    assert not severe, severe


def test_browser_shows_history_and_draws_a_design(demo_room, tmp_path):
    driver = _chrome(tmp_path)
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    try:
        with background_server(demo_room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            rows = wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))
            n_runs = len(history(demo_room))
            assert len(driver.find_elements(By.CSS_SELECTOR, "#runs tbody tr")) == n_runs
            assert "token" not in driver.current_url  # the key does not stay in the address bar
            design_row = next(r for r in rows if r.text.startswith("design"))
            design_row.click()
            wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "#plots canvas")) >= 4)
            wait.until(lambda d: d.execute_script("return document.body.dataset.exploreMs"))
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "design"))
            shot = Path(os.environ.get("ROOMCORR_UI_SHOT", tmp_path / "explore.png"))
            driver.save_screenshot(str(shot))
            # Design: a change of the tilt redraws the preview; saving makes a new design run
            n_designs = len(rooms.list_runs(demo_room, "design"))
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "#design-plots canvas")) >= 2)
            driver.execute_script(
                "const s = document.getElementById('d-tilt'); s.value = -1.0;"
                "s.dispatchEvent(new Event('input'));"
            )
            wait.until(ec.text_to_be_present_in_element((By.ID, "o-tilt"), "-1.0"))
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "preview of"))
            driver.save_screenshot(str(shot.with_name("design.png")))
            driver.find_element(By.ID, "d-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "saved as design"))
            assert len(rooms.list_runs(demo_room, "design")) == n_designs + 1
            assert (demo_room.root / "targets" / "shaped.toml").is_file()
            # Compare (here the one measurement with itself): the CLI's text and both curves
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()
            driver.find_element(By.ID, "c-go").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "compared"))
            assert "speed of sound" in driver.find_element(By.ID, "explore-text").text
            assert len(driver.find_elements(By.CSS_SELECTOR, "#plots canvas")) >= 2
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=files]").click()
            links = driver.find_elements(By.CSS_SELECTOR, "#files tbody a")
            assert any(a.text.endswith(".wav") for a in links)
            # Export: the full report of the design shown, written beside its files
            shown = driver.find_element(By.ID, "files-title").text.rsplit(" ", 1)[-1]
            driver.find_element(By.ID, "report-write").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "report written"))
            link = driver.find_element(By.ID, "report-link")
            assert link.is_displayed() and link.get_attribute("href").endswith("/report.html")
            assert (demo_room.designs_dir / shown / "report.html").is_file()
            _no_console_errors(driver)
    finally:
        driver.quit()
    _assert_not_blank(shot)


def _decay_cells(rows: dict, k: int) -> list[str]:
    """Row k of the report's decay table (two decimals, * near the noise) from decay_view rows."""
    out = []
    for key in ("edt", "t20", "t30"):
        v = rows[f"{key}_s"][k]
        out.append("n/a" if v is None else f"{v:.2f}" + ("" if rows["valid"][key][k] else " *"))
    return out


def _decay_rows(driver) -> list[list[str]]:
    """The cells of the page's decay table, read in one step (the table is redrawn on changes)."""
    return driver.execute_script(
        "return [...document.querySelectorAll('#decay-times table.decay tbody tr')]"
        ".map(tr => [...tr.cells].map(td => td.textContent));"
    )


def test_browser_explore_shows_decay_times_and_ringing_maps(demo_room, tmp_path):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select, WebDriverWait

    from roomcorr.app import decay_view

    run_id = _design_id(demo_room)
    driver = _chrome(tmp_path, height=3400)
    try:
        with background_server(demo_room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            rows = wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))
            next(r for r in rows if r.text.startswith("design") and run_id in r.text).click()
            wait.until(lambda d: d.execute_script("return document.body.dataset.exploreMs"))
            assert driver.find_elements(By.CSS_SELECTOR, "#decay-times canvas")
            maps = driver.find_elements(By.CSS_SELECTOR, "#ringing canvas.heat-map")
            assert len(maps) == 2  # as measured and corrected
            # the table shows the application layer's numbers, * where the report puts one
            view = decay_view(demo_room, "design", run_id)
            combined = view["channels"][0]["combined"]
            shown = _decay_rows(driver)
            assert [r[0] for r in shown] == view["channels"][0]["bands"]["label"]
            assert [r[1:4] for r in shown] == [_decay_cells(combined, k) for k in range(len(shown))]
            shot = tmp_path / "decay.png"
            _element_shot(driver, driver.find_element(By.ID, "decay-times"), shot)
            _assert_not_blank(shot)
            ring = tmp_path / "ringing.png"
            _element_shot(driver, driver.find_element(By.ID, "ringing"), ring)
            _assert_not_blank(ring)
            # hovering a map reads its level back
            ActionChains(driver).move_to_element(maps[0]).perform()
            readout = driver.find_element(By.CSS_SELECTOR, "#ringing .readout")
            wait.until(lambda d: " Hz, " in readout.text)
            # third-octave bands for the second position: a new table of 22 bands
            selects = driver.find_elements(By.CSS_SELECTOR, "#decay-controls select")
            Select(selects[1]).select_by_value("3")
            wait.until(lambda d: len(_decay_rows(d)) == 22)
            selects = driver.find_elements(By.CSS_SELECTOR, "#decay-controls select")
            Select(selects[2]).select_by_value("1")
            third = decay_view(demo_room, "design", run_id, 3, 1)["channels"][0]["per_position"][1]
            expect = [_decay_cells(third, k) for k in range(22)]
            wait.until(lambda d: [r[1:4] for r in _decay_rows(d)] == expect)
            # a measurement run: the same section, one map (nothing corrected yet)
            driver.execute_script("delete document.body.dataset.exploreMs;")
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()
            rows = driver.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick")
            next(r for r in rows if r.text.startswith("measurement")).click()
            wait.until(lambda d: d.execute_script("return document.body.dataset.exploreMs"))
            assert len(driver.find_elements(By.CSS_SELECTOR, "#ringing canvas.heat-map")) == 1
            assert len(_decay_rows(driver)) == 8
            _no_console_errors(driver)
    finally:
        driver.quit()


def test_browser_drags_target_points_and_saves_what_the_cli_designs(demo_room, tmp_path):
    # Points added by clicking the target line, one dragged up, one sideways, one removed
    # by a double-click; the design saved then equals the CLI's from the same points
    # written as a frequency/dB target file (byte for byte).
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    driver = _chrome(tmp_path, height=1800)

    def state() -> dict:
        return driver.execute_script("return window.roomcorrDesign()")

    def table() -> list[list[float]]:
        rows = driver.find_elements(By.CSS_SELECTOR, "#d-points tbody tr")
        return [
            [float(i.get_attribute("value")) for i in tr.find_elements(By.TAG_NAME, "input")]
            for tr in rows
        ]

    try:
        with background_server(demo_room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            wait.until(lambda d: state()["previews"] >= 1)
            over = driver.find_element(By.CSS_SELECTOR, "#design-plots .target-plot .u-over")
            w, h = over.rect["width"], over.rect["height"]

            def at(x: float, y: float) -> tuple[int, int]:  # Selenium offsets from the centre
                return int(round(x - w / 2)), int(round(y - h / 2))

            def settled(n: int) -> None:
                wait.until(lambda d: state()["previews"] > n)
                wait.until(lambda d: not d.execute_script("return inFlight || queued"))

            for f in (80.0, 400.0, 2000.0):
                x, y = driver.execute_script(f"return window.roomcorrDesign().targetPixel({f})")
                n = state()["previews"]
                ActionChains(driver).move_to_element_with_offset(over, *at(x, y)).click().perform()
                settled(n)
            points = state()["points"]
            assert len(points) == 3 and table() == points
            for (f, g), want in zip(points, (80.0, 400.0, 2000.0), strict=True):
                assert f == pytest.approx(want, rel=0.02) and abs(g) <= 1.0  # on the line
            # drag the first point up by 48 pixels, in small steps
            n, before = state()["previews"], state()["target"][0]
            hx, hy = state()["handles"][0]
            chain = ActionChains(driver).move_to_element_with_offset(over, *at(hx, hy))
            chain = chain.click_and_hold()
            for _ in range(8):
                chain = chain.move_by_offset(0, -6)
            chain.release().perform()
            settled(n)
            moved = state()
            assert moved["points"][0][0] == points[0][0]
            assert moved["points"][0][1] > points[0][1] + 3.0
            assert table() == moved["points"]
            assert moved["lastEdit"]["table"]["points"] == sorted(moved["points"])
            changed = [abs(a - b) for a, b in zip(moved["target"][0], before, strict=True)
                       if a is not None and b is not None]
            assert max(changed) > 1.0  # the preview's target followed the point
            # drag the second point sideways: higher frequency, same gain
            n = state()["previews"]
            hx, hy = state()["handles"][1]
            chain = ActionChains(driver).move_to_element_with_offset(over, *at(hx, hy))
            chain.click_and_hold().move_by_offset(15, 0).move_by_offset(15, 0).release().perform()
            settled(n)
            side = state()["points"][1]
            assert side[0] > points[1][0] * 1.05 and side[1] == pytest.approx(points[1][1], abs=0.3)
            # double-click the third point: removed from the plot and the list
            n = state()["previews"]
            hx, hy = state()["handles"][2]
            chain = ActionChains(driver).move_to_element_with_offset(over, *at(hx, hy))
            chain.double_click().perform()
            settled(n)
            kept = state()["points"]
            assert len(kept) == 2 and table() == kept
            # the list refuses what the target rules refuse, and keeps the last good value
            f_input = driver.find_elements(By.CSS_SELECTOR, "#d-points tbody tr input")[0]
            typed = "arguments[0].value = arguments[1];"
            typed += "arguments[0].dispatchEvent(new Event('input'));"
            driver.execute_script(typed, f_input, "30000")
            wait.until(lambda d: "bad" in f_input.get_attribute("class"))
            assert "frequency must be" in driver.find_element(By.ID, "status").text
            assert state()["points"] == kept
            driver.execute_script(typed, f_input, str(kept[0][0]))
            wait.until(lambda d: "bad" not in f_input.get_attribute("class"))
            name = driver.find_element(By.ID, "d-name")
            name.clear()
            name.send_keys("dragged")
            n_designs = len(rooms.list_runs(demo_room, "design"))
            driver.find_element(By.ID, "d-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "saved as design"))
            assert len(rooms.list_runs(demo_room, "design")) == n_designs + 1
            _no_console_errors(driver)
    finally:
        driver.quit()
    run_app = rooms.list_runs(demo_room, "design", include_incomplete=False)[-1].path
    curve = tmp_path / "dragged.txt"
    curve.write_text("".join(f"{f!r} {g!r}\n" for f, g in sorted(kept)))
    cmd = ["design", "--room", str(demo_room.root), "--target", str(curve), "--max-boost", "4"]
    assert cli.main(cmd) == 0
    _assert_same_filters(run_app, demo_room)


def test_a_damaged_run_is_reported_not_served(client, demo_room):
    # Verification on read (complete.json's SHA-256): a changed filter file is refused.
    run_id = _design_id(demo_room)
    wav = next((demo_room.designs_dir / run_id / "fir" / "48000").glob("*.wav"))
    original = wav.read_bytes()
    try:
        wav.write_bytes(original[:-4] + b"\x00\x00\x80\x7f")  # last sample +inf
        rel = wav.relative_to(demo_room.designs_dir / run_id).as_posix()
        r = client.get(f"/api/file/design/{run_id}/{rel}", headers=_auth())
        assert r.status_code in (400, 404) and "damaged" in r.json()["error"]
        room = client.get("/api/room", headers=_auth()).json()
        status = {x["run_id"]: x["status"] for x in room["runs"]}
        assert status[run_id] == "damaged"
    finally:
        wav.write_bytes(original)


# --------------------------------------------------------------------------- design in the app


def test_preview_is_the_designs_own_curves(demo_room):
    # The same engine: the preview's correction equals run_design's for the same settings.
    from roomcorr.app.design import DesignPreview
    from roomcorr.audio_io import read_ir_set
    from roomcorr.pipeline import run_design

    prev = DesignPreview(demo_room)
    view = prev.update({"target": "gentle-tilt", "max_boost_db": 3.0})
    settings = rooms.load_room_settings(demo_room)
    settings.design.target = "gentle-tilt"
    settings.design.max_boost_db = 3.0
    settings.design.sample_rates = (48000,)
    files = rooms.measurement_files(rooms.latest_measurement(demo_room))
    irs, fs, _ = read_ir_set([str(f) for f in files])
    result = run_design(irs, fs, settings)
    for ch_view, ch in zip(view["channels"], result.channels, strict=True):
        np.testing.assert_allclose(ch_view["correction_db"], ch.correction_db[prev.keep], atol=0.01)
        assert ch_view["band_hz"] == pytest.approx(ch.band_hz, abs=0.1)


def _assert_same_filters(run_app: Path, room: rooms.Room) -> None:
    """The room's latest design (just made by the CLI) has the app's filter files, byte for byte."""
    run_cli = rooms.list_runs(room, "design", include_incomplete=False)[-1].path
    assert run_cli != run_app
    wavs = sorted(p.relative_to(run_app) for p in run_app.rglob("*.wav"))
    assert wavs and wavs == sorted(p.relative_to(run_cli) for p in run_cli.rglob("*.wav"))
    for rel in wavs:
        assert (run_app / rel).read_bytes() == (run_cli / rel).read_bytes(), rel


def test_app_design_gives_the_cli_filters_byte_for_byte(demo_room):
    from roomcorr.app.design import DesignPreview

    table = {"tilt_db_per_octave": -0.6, "bass_shelf_db": 2.0, "bass_shelf_hz": 150.0,
             "points": [[3000.0, -1.0]]}
    run_app, _ = DesignPreview(demo_room).save({"table": table, "max_boost_db": 3.5}, "evening")
    target = demo_room.root / "targets" / "evening.toml"
    assert target.is_file()
    args = ["design", "--room", str(demo_room.root), "--target", str(target), "--max-boost", "3.5"]
    assert cli.main(args) == 0
    _assert_same_filters(run_app, demo_room)


def test_preview_and_save_refusals(client, demo_room):
    inf = b'{"max_boost_db": Infinity}'  # what a page could send; JSON itself has no inf
    bad = client.post("/api/preview", headers={**_auth(), "content-type": "application/json"},
                      content=inf)
    assert bad.status_code == 400 and "max_boost_db" in bad.json()["error"]
    bad = client.post("/api/preview", headers=_auth(), json={"max_boost_db": 40})
    assert bad.status_code == 400  # the same limit as the command line (12 dB)
    bad = client.post("/api/preview", headers=_auth(), content=b"[1, 2]")
    assert bad.status_code == 400
    bad = client.post("/api/save", headers=_auth(), json={"table": {"tilt_db_per_octave": 0},
                                                          "name": "../escape"})
    assert bad.status_code == 400 and not (demo_room.root.parent / "escape.toml").exists()
    assert client.post("/api/preview", json={}).status_code == 403  # no token
    hdr = {**_auth(), "origin": "http://evil.example"}
    assert client.post("/api/save", headers=hdr, json={}).status_code == 403


def test_save_waits_for_the_room_lock(client, demo_room):
    before = len(rooms.list_runs(demo_room, "design"))
    # Another process (a CLI command) holds the room: the app must refuse to write.
    with room_held_elsewhere(demo_room):
        r = client.post("/api/save", headers=_auth(), json={"target": "flat"})
        assert r.status_code == 409 and r.json()["error"]
        assert len(rooms.list_runs(demo_room, "design")) == before


def test_live_channel_needs_the_token_and_reports_a_saved_design(client, demo_room):
    from starlette.websockets import WebSocketDisconnect

    live = f"ws://127.0.0.1:{PORT}/api/live"
    for refused in (live, f"{live}?token=wrong", f"ws://evil.example:{PORT}/api/live?token={TOKEN}"):
        with pytest.raises(WebSocketDisconnect) as closed:
            with client.websocket_connect(refused) as ws:
                ws.receive_json()
        assert closed.value.code == 1008  # policy violation
    with client.websocket_connect(f"{live}?token={TOKEN}") as ws:
        assert ws.receive_json() == {"type": "hello"}
        r = client.post("/api/save", headers=_auth(), json={"target": "flat"})
        assert r.status_code == 200, r.text
        assert ws.receive_json() == {"type": "design", "state": "started"}
        done = ws.receive_json()
        assert done["state"] == "finished" and done["run_id"] == r.json()["run_id"]


def test_compare_gives_what_roomcorr_compare_prints(client, demo_room):
    # The same engine: the app's comparison is the CLI's (roomcorr compare) for two runs.
    first = rooms.latest_measurement(demo_room)
    second = rooms.add_measurement(demo_room, rooms.measurement_files(first))
    r = client.get(f"/api/compare/{first.name}/{second.name}", headers=_auth())
    assert r.status_code == 200, r.text
    view = r.json()
    expect = compare_measurements(first, second, room=demo_room, with_curves=True)
    assert view["text"] == format_comparison(expect)
    for ch_view, ch in zip(view["channels"], expect["channels"], strict=True):
        after = ch["curves"]["after_db"]
        np.testing.assert_allclose(ch_view["curves"]["after_db"], after, atol=1e-3)
        assert ch_view["level_change_db"] == pytest.approx(ch["level_change_db"], abs=1e-9)
    for bad in ("..", ".hidden", "%2e%2e%2f%2e%2e%2fetc"):
        r = client.get(f"/api/compare/{bad}/{second.name}", headers=_auth())
        assert r.status_code in (400, 403, 404), bad  # 400: not a run id


def test_decay_route_serves_the_application_layers_data(client, demo_room):
    from roomcorr.app import decay_view

    meas = rooms.latest_measurement(demo_room).name
    r = client.get(f"/api/decay/measurement/{meas}?bands=3&position=1", headers=_auth())
    assert r.status_code == 200, r.text
    assert r.json() == decay_view(demo_room, "measurement", meas, 3, 1)
    one = client.get(f"/api/decay/measurement/{meas}?channel=1", headers=_auth())
    assert one.json() == decay_view(demo_room, "measurement", meas, channel=1)
    for query in ("bands=2", "bands=-1", "position=9", "position=x", "bands=1e3", "channel=2"):
        bad = client.get(f"/api/decay/measurement/{meas}?{query}", headers=_auth())
        assert bad.status_code == 400 and bad.json()["error"], query
    refused = (f"/api/decay/design/{meas}", f"/api/decay/x/{meas}", "/api/decay/measurement/..")
    for path in refused:
        assert client.get(path, headers=_auth()).status_code in (400, 404), path
    assert client.get(f"/api/decay/measurement/{meas}").status_code == 403  # no token


def test_preview_refuses_target_points_the_target_rules_refuse(client):
    # The same checks as a target file on the command line (design.curve.target.target_points).
    hdr = {**_auth(), "content-type": "application/json"}
    for points in (b"[[NaN, 1.0]]", b"[[1000, Infinity]]", b"[[5, 1]]", b"[[1000, 30]]",
                   b"[[1000, 1], [1000, 2]]"):
        body = b'{"target": null, "table": {"points": ' + points + b"}}"
        bad = client.post("/api/preview", headers=hdr, content=body)
        assert bad.status_code == 400 and "target point" in bad.json()["error"], points
    good = client.post("/api/preview", headers=_auth(),
                       json={"table": {"points": [[40.0, 3.0], [1000.0, -1.0]]}})
    assert good.status_code == 200, good.text


# --------------------------------------------------------------------------- the full report


def test_report_is_the_one_the_cli_writes_and_keeps_the_run_whole(client, demo_room):
    run_id = _design_id(demo_room)
    run_dir = demo_room.designs_dir / run_id
    r = client.post(f"/api/report/design/{run_id}", headers=_auth(), json={})
    assert r.status_code == 200, r.text
    data = r.json()
    assert data["path"] == "report.html" and data["summary"]
    served = client.get(f"/api/file/design/{run_id}/report.html", headers=_auth())
    assert served.status_code == 200
    assert served.content == (run_dir / "report.html").read_bytes()
    # The same engine: `roomcorr report RUN` writes the same page, byte for byte.
    assert cli.main(["report", str(run_dir)]) == 0
    assert (run_dir / "report.html").read_bytes() == served.content
    rooms.verified(demo_room, run_dir)  # the run's own files are untouched (SHA-256 of all)


def test_report_refusals(client, demo_room):
    run_id = _design_id(demo_room)
    assert client.post(f"/api/report/design/{run_id}", json={}).status_code == 403  # no token
    for kind, rid in (("design", ".."), ("design", "no-such-run"), ("settings", run_id)):
        r = client.post(f"/api/report/{kind}/{rid}", headers=_auth(), json={})
        assert r.status_code in (400, 404), (kind, rid)
    with room_held_elsewhere(demo_room):
        r = client.post(f"/api/report/design/{run_id}", headers=_auth(), json={})
        assert r.status_code == 409 and r.json()["error"]
