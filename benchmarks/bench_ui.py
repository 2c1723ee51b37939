"""Speed of the browser app: a target edit to its preview, and the page load.

Goals (issue: browser app): from an edit of the target to the updated preview
under 300 ms for the demo room, page load under 1 s. Printed against work done
without the server in the same run (the whole ``run_design`` for the same
settings, and fetching one static file), so the ratios travel between machines.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path

import httpx2 as httpx
from _util import best_of, print_table

from roomcorr import rooms
from roomcorr.app.design import DesignPreview
from roomcorr.audio_io import read_ir_set
from roomcorr.pipeline import run_design
from roomcorr.ui.server import TOKEN_HEADER, background_server

REPO = Path(__file__).resolve().parents[1]
TOKEN = "bench-token"


def _page_load_s(url: str, profile: Path) -> float | None:
    """navigationStart to loadEventEnd in headless Chromium (None without a browser)."""
    exe, driver = shutil.which("chromium"), shutil.which("chromedriver")
    if not exe or not driver:
        return None
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = exe
    for flag in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
    ):
        opts.add_argument(flag)
    browser = webdriver.Chrome(service=Service(driver), options=opts)
    try:
        best = float("inf")
        for _ in range(3):
            browser.get(url)
            ms = browser.execute_script(
                "const t = performance.timing; return t.loadEventEnd - t.navigationStart;"
            )
            best = min(best, ms / 1000.0)
        return best
    finally:
        browser.quit()


def main() -> None:
    with tempfile.TemporaryDirectory(prefix="roomcorr-bench-ui-") as tmp:
        room = rooms.init_room(Path(tmp) / "den")
        rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
        t0 = time.perf_counter()
        preview = DesignPreview(room)
        analyse_s = time.perf_counter() - t0
        edit = {"table": {"tilt_db_per_octave": -0.8, "bass_shelf_db": 2.0}, "max_boost_db": 3.0}
        update_s = best_of(lambda: preview.update(edit), 5)
        settings = rooms.load_room_settings(room)
        files = rooms.measurement_files(rooms.latest_measurement(room))
        irs, fs, _ = read_ir_set([str(f) for f in files])
        design_s = best_of(lambda: run_design(irs, fs, settings), 2)

        with background_server(room, TOKEN) as base:
            hdr = {TOKEN_HEADER: TOKEN}
            with httpx.Client(base_url=base, headers=hdr, timeout=60) as client:
                client.post("/api/preview", json=edit)  # the analysis is made once, here
                http_preview_s = best_of(lambda: client.post("/api/preview", json=edit), 5)
                static_s = best_of(lambda: client.get("/static/app.js"), 5)
            page_s = _page_load_s(f"{base}/?token={TOKEN}", Path(tmp) / "profile")

    rows = [
        [
            "analysis of the measurement (once per measurement)",
            f"{analyse_s * 1000:.0f} ms",
            "-",
            "-",
        ],
        [
            "target edit to new curves (in process)",
            f"{update_s * 1000:.0f} ms",
            f"whole run_design {design_s * 1000:.0f} ms",
            f"{update_s / design_s:.3f}",
        ],
        [
            "target edit to preview over HTTP (goal < 300 ms)",
            f"{http_preview_s * 1000:.0f} ms",
            f"static file {static_s * 1000:.1f} ms",
            f"{http_preview_s / static_s:.0f}",
        ],
        [
            "page load in headless Chromium (goal < 1 s)",
            "no browser" if page_s is None else f"{page_s * 1000:.0f} ms",
            "-",
            "-",
        ],
    ]
    print_table(
        "Browser app (demo room, 2 channels, 4 positions)",
        ["what", "time", "reference", "ratio"],
        rows,
    )


if __name__ == "__main__":
    main()
