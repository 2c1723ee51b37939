"""The whole job in the browser app on a real audio server: measure, design, save, export.

JACK (dummy backend) and the test room client (tests/jack_room.py) stand in for the
sound card and the room; headless Chromium (Debian's chromium-driver, Selenium)
clicks through the Measure page (cautions, devices, a test tone, two positions),
then Design (a target change, a save) and Files. The filter files the app wrote
must equal, byte for byte, what ``roomcorr design`` writes from the same
measurement with the same settings. Real time: short sweeps, one loudspeaker.
Run it with ``JACK_DEFAULT_SERVER`` set to a name of your own when other test runs
share the machine.
"""

from __future__ import annotations

import hashlib
import os
import time
from pathlib import Path

import numpy as np
import pytest
from jack_fixtures import jack_server, make_room  # noqa: F401  (pytest fixtures)

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from test_ui_measure import set_room_measure  # noqa: E402
from test_ui_server import _assert_not_blank, _chrome  # noqa: E402

from roomcorr import (
    cli,  # noqa: E402
    rooms,  # noqa: E402
)
from roomcorr.ui.server import background_server  # noqa: E402

TOKEN = "browser-measure-token-7"
DEVICE = "roomsim_ui"


def room_response() -> np.ndarray:
    """Direct sound 2 m away, one reflection and a decaying diffuse tail (seeded)."""
    rng = np.random.default_rng(23)
    h = np.zeros(6000)
    h[280] = 0.5
    h[430] = -0.2
    m = len(h) - 280
    h[280:] += 0.02 * rng.standard_normal(m) * np.exp(-np.arange(m) / 700)
    return h


def _set(driver, element_id: str, value: str) -> None:
    driver.execute_script(
        "const e = document.getElementById(arguments[0]); e.value = arguments[1];"
        "e.dispatchEvent(new Event('input'));",
        element_id,
        value,
    )


def test_measure_design_save_and_export_in_the_browser(make_room, tmp_path):  # noqa: F811
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    make_room(
        DEVICE, {"speakers": [{"ir": room_response().tolist()}], "noise_rms": 1e-4, "seed": 4}
    )
    room = rooms.init_room(tmp_path / "hall")
    set_room_measure(room, {"noise_s": 0.3, "tail_s": 0.4, "ir_s": 0.25, "test_s": 0.3})
    shots = Path(os.environ.get("ROOMCORR_UI_SHOT", tmp_path / "x.png")).parent
    driver = _chrome(tmp_path, height=1500)
    try:
        with background_server(room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=measure]").click()
            # cautions first: nothing can sound before they are acknowledged
            ack = wait.until(ec.element_to_be_clickable((By.ID, "m-ack")))
            assert "protect your hearing" in driver.find_element(By.ID, "m-caution-text").text
            assert not driver.find_element(By.ID, "m-start").is_enabled()
            ack.click()
            wait.until(lambda d: d.find_element(By.ID, "m-start").is_enabled())
            assert (room.root / "cautions-acknowledged.json").is_file()
            # devices: the test room plays and records
            for sel in ("m-in-dev", "m-out-dev"):
                wait.until(
                    lambda d, s=sel: d.find_elements(
                        By.CSS_SELECTOR, f"#{s} option[data-name='{DEVICE}']"
                    )
                )
                option = driver.find_element(
                    By.CSS_SELECTOR, f"#{sel} option[data-name='{DEVICE}']"
                )
                option.click()
            rows = driver.find_elements(By.CSS_SELECTOR, "#m-speakers tbody tr")
            rows[1].find_element(By.CSS_SELECTOR, ".m-remove").click()  # one loudspeaker
            _set(driver, "m-positions", "2")
            _set(driver, "m-sweep", "0.5")
            _set(driver, "m-repeats", "1")
            # the wiring check: a quiet tone, heard by the microphone
            driver.find_element(By.CSS_SELECTOR, "#m-speakers .m-tone").click()
            wait.until(ec.text_to_be_present_in_element((By.CSS_SELECTOR, ".m-heard"), "heard"))
            assert "not heard" not in driver.find_element(By.CSS_SELECTOR, ".m-heard").text
            driver.find_element(By.ID, "m-start").click()
            meter_seen = False
            deadline = time.monotonic() + 240
            while time.monotonic() < deadline:
                text = driver.find_element(By.ID, "status").text
                if "measured 2 position" in text or "stopped" in text:
                    break
                meter_seen |= "input peak" in driver.find_element(By.ID, "m-meter-text").text
                prompt = driver.find_element(By.ID, "m-prompt")
                if prompt.is_displayed():
                    words = driver.find_element(By.ID, "m-prompt-text").text
                    buttons = {
                        b.get_attribute("data-choice"): b
                        for b in prompt.find_elements(By.TAG_NAME, "button")
                    }
                    if "continue" in buttons:
                        if "position 2" in words:
                            driver.save_screenshot(str(shots / "measure-next.png"))
                        buttons["continue"].click()
                    elif "buffers dropped" in words:  # a loaded machine: measure it again,
                        buttons["repeat"].click()  # as a user would (the gate stays)
                    else:
                        pytest.fail(f"unexpected failed check: {words}")
                time.sleep(0.1)
            assert "measured 2 position" in driver.find_element(By.ID, "status").text
            assert meter_seen  # the live meter moved while the sweeps played
            saved = driver.find_elements(By.CSS_SELECTOR, "#m-area circle.saved")
            assert len(saved) == 2
            shot = shots / "measure.png"
            driver.save_screenshot(str(shot))
            meas = rooms.list_runs(room, "measurement", include_incomplete=False)
            assert len(meas) == 1 and len(rooms.measurement_files(meas[0].path)) == 2
            # Design: the new measurement, a change of the tilt, a save
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            wait.until(
                lambda d: d.find_elements(
                    By.CSS_SELECTOR, f"#d-measurement option[value='{meas[0].run_id}']"
                )
            )
            _set(driver, "d-measurement", meas[0].run_id)
            wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "#design-plots canvas")) >= 2)
            driver.execute_script(
                "const s = document.getElementById('d-tilt'); s.value = -0.8;"
                "s.dispatchEvent(new Event('input'));"
            )
            wait.until(ec.text_to_be_present_in_element((By.ID, "o-tilt"), "-0.8"))
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "preview of"))
            driver.find_element(By.ID, "d-name").clear()
            driver.find_element(By.ID, "d-name").send_keys("warmer")
            driver.find_element(By.ID, "d-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "saved as design"))
            run_app = rooms.list_runs(room, "design", include_incomplete=False)[-1]
            # Export: the Files page lists what the design wrote, with its SHA-256
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=room]").click()
            design_row = wait.until(
                lambda d: [
                    r
                    for r in d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick")
                    if run_app.run_id in r.text
                ]
            )
            design_row[0].click()
            wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "#plots canvas")) >= 4)
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=files]").click()
            listed = {}
            for tr in driver.find_elements(By.CSS_SELECTOR, "#files tbody tr"):
                cells = tr.find_elements(By.TAG_NAME, "td")
                listed[cells[0].text] = cells[3].text
            wavs = sorted(
                p.relative_to(run_app.path).as_posix() for p in run_app.path.rglob("*.wav")
            )
            assert wavs and set(wavs) <= set(listed)
            for rel in wavs:
                digest = hashlib.sha256((run_app.path / rel).read_bytes()).hexdigest()
                assert listed[rel] == digest, rel
            driver.save_screenshot(str(shots / "files.png"))
            # Stop: a longer sweep stopped while it plays; nothing finished is left behind
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=measure]").click()
            _set(driver, "m-positions", "1")
            _set(driver, "m-sweep", "6")
            driver.find_element(By.ID, "m-start").click()
            wait.until(lambda d: d.find_element(By.ID, "m-prompt").is_displayed())
            d_prompt = driver.find_element(
                By.CSS_SELECTOR, "#m-prompt button[data-choice=continue]"
            )
            d_prompt.click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "m-progress-text"), "position 1"))
            wait.until(ec.text_to_be_present_in_element((By.ID, "m-progress-text"), "%"))
            driver.find_element(By.ID, "m-stop").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "stopped"))
            assert "sound off" in driver.find_element(By.ID, "m-progress-text").text
            done = rooms.list_runs(room, "measurement", include_incomplete=False)
            assert [r.run_id for r in done] == [meas[0].run_id]
            assert driver.find_element(By.ID, "m-start").is_enabled()  # ready again
            severe = [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]
            assert not severe, severe
    finally:
        driver.quit()
    _assert_not_blank(shot)
    # the same measurement and settings through the command line: the same bytes
    target = room.root / "targets" / "warmer.toml"
    assert target.is_file()
    assert cli.main(["design", "--room", str(room.root), "--target", str(target)]) == 0
    run_cli = rooms.list_runs(room, "design", include_incomplete=False)[-1].path
    assert run_cli != run_app.path
    cli_wavs = sorted(p.relative_to(run_cli).as_posix() for p in run_cli.rglob("*.wav"))
    assert cli_wavs == wavs
    for rel in wavs:
        assert (run_app.path / rel).read_bytes() == (run_cli / rel).read_bytes(), rel
