"""Speed of the browser app: a target edit to its preview, the page load, Explore's data.

Goals (issue: browser app): from an edit of the target to the updated preview
under 300 ms for the demo room, page load under 1 s (the Room page, and a design
opened in Explore with its decay times and ringing maps fetched and drawn), the
live meter at least 10 updates a second without dropped audio buffers.
Printed against work done without the server in the same run (the whole
``run_design`` for the same settings, the report's own decay and ringing
sections, and fetching one static file), so the ratios travel between machines.

The live meter is measured on a measurement started through the app's own
route, with a real-time stand-in for the audio device (:class:`_ClockedAudio`:
256-frame blocks at 48 kHz, each callback called when its block is due, the
microphone hearing the output one block later); meter events are counted where
a page receives them (the live WebSocket). A callback served more than one block
period after its due time is counted as late (a sound card would have under-run);
the same measurement without the app and its meter is the reference.
"""

from __future__ import annotations

import shutil
import tempfile
import threading
import time
from pathlib import Path

import httpx2 as httpx
import numpy as np
from _util import best_of, print_table

from roomcorr import rooms
from roomcorr.app.design import DesignPreview
from roomcorr.audio_io import read_ir_set
from roomcorr.pipeline import run_design
from roomcorr.ui.server import TOKEN_HEADER, background_server

REPO = Path(__file__).resolve().parents[1]
TOKEN = "bench-token"


def _browser_times(url: str, profile: Path, run_id: str) -> dict[str, float] | None:
    """Times measured in headless Chromium (None without a browser), best of 3, in seconds.

    ``page``: navigationStart to loadEventEnd; ``explore``: a click on a design run
    until its responses, filter, decay times and ringing maps are fetched and drawn
    (the page's own ``performance.now()`` figure); ``drag``: a target point moved by
    the drag code until the preview it asked for is drawn.
    """
    exe, driver = shutil.which("chromium"), shutil.which("chromedriver")
    if not exe or not driver:
        return None
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

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
        "--window-size=1300,1800",
        f"--user-data-dir={profile}",
    ):
        opts.add_argument(flag)
    browser = webdriver.Chrome(service=Service(driver), options=opts)
    out = {"page": float("inf"), "explore": float("inf"), "drag": float("inf")}
    try:
        wait = WebDriverWait(browser, 60)
        for _ in range(3):
            browser.get(url)
            ms = browser.execute_script(
                "const t = performance.timing; return t.loadEventEnd - t.navigationStart;"
            )
            out["page"] = min(out["page"], ms / 1000.0)
            rows = wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs tbody tr.pick"))
            next(r for r in rows if run_id in r.text).click()
            ms = wait.until(lambda d: d.execute_script("return document.body.dataset.exploreMs"))
            out["explore"] = min(out["explore"], float(ms) / 1000.0)
            browser.find_element(By.CSS_SELECTOR, "nav button[data-tab=design]").click()
            wait.until(lambda d: d.execute_script("return window.roomcorrDesign().previews >= 1"))
            for k in range(3):
                ms = browser.execute_async_script(
                    "const done = arguments[arguments.length - 1];"
                    "if (!targetPoints.length) { addPoint(80, 0); addPoint(400, 0); }"
                    "const n = previewCount, t0 = performance.now();"
                    f"setPoint(0, 80, {2.0 + k}); shaped = true; requestPreview();"
                    "const poll = () => (previewCount > n && !inFlight && !queued)"
                    " ? done(performance.now() - t0) : setTimeout(poll, 2);"
                    "poll();"
                )
                out["drag"] = min(out["drag"], ms / 1000.0)
        return out
    finally:
        browser.quit()


class _ClockedAudio:
    """Enough of ``sounddevice`` for one full-duplex stream, paced by the clock."""

    BLOCK = 256

    class CallbackStop(Exception):
        pass

    class CallbackAbort(Exception):
        pass

    class PortAudioError(Exception):
        pass

    def __init__(self) -> None:
        self.late = 0
        self.blocks = 0
        outer = self

        class Stream:
            def __init__(
                self, device, samplerate, channels, dtype, blocksize, callback, finished_callback
            ):
                self.fs, self.cb, self.done = samplerate, callback, finished_callback
                self.n_in, self.n_out = channels
                self.running = True
                self.thread = threading.Thread(target=self._run, daemon=True)

            def _run(self) -> None:
                period = outer.BLOCK / self.fs
                rng = np.random.default_rng(0)
                heard = np.zeros((outer.BLOCK, self.n_out), np.float32)
                t0, k = time.perf_counter(), 0
                while self.running:
                    due = t0 + k * period
                    wait = due - time.perf_counter()
                    if wait > 0:
                        time.sleep(wait)
                    elif -wait > period:
                        outer.late += 1
                    indata = np.zeros((outer.BLOCK, self.n_in), np.float32)
                    indata[:, 0] = 0.5 * heard.sum(axis=1) + 1e-4 * rng.standard_normal(outer.BLOCK)
                    outdata = np.zeros((outer.BLOCK, self.n_out), np.float32)
                    try:
                        self.cb(indata, outdata, outer.BLOCK, None, None)
                    except (outer.CallbackStop, outer.CallbackAbort):
                        break
                    heard = outdata
                    outer.blocks += 1
                    k += 1
                self.done()

            def start(self) -> None:
                self.thread.start()

            def abort(self) -> None:
                self.running = False

            def stop(self) -> None:
                self.thread.join(10)

            def close(self) -> None:
                self.running = False

        self.Stream = Stream


def live_meter_rate(tmp: Path) -> dict:
    """Meter events per second as a page receives them, and late audio callbacks."""
    from starlette.testclient import TestClient

    from roomcorr.app import measure as am
    from roomcorr.measure import capture
    from roomcorr.ui.server import create_app

    room = rooms.init_room(tmp / "meter")
    audio = _ClockedAudio()
    saved = capture._sd, capture.open_devices
    capture._sd = lambda: audio
    capture.open_devices = lambda *a, **k: capture.Devices(0, "clocked", 0, "clocked", False)
    try:
        am.acknowledge_cautions(room)
        client = TestClient(create_app(room, TOKEN, 1), base_url="http://127.0.0.1:1")
        hdr = {TOKEN_HEADER: TOKEN}
        settings = {"outputs": [1], "positions": 1, "sweep_s": 2.0, "repeats": 1}
        spans, meters, start = [], 0, None
        with client.websocket_connect(f"ws://127.0.0.1:1/api/live?token={TOKEN}") as ws:
            ws.receive_json()
            r = client.post("/api/measure/start", headers=hdr, json={"settings": settings})
            r.raise_for_status()
            while True:
                ev = ws.receive_json()
                now = time.perf_counter()
                if ev["type"] == "capture":
                    start, meters = now, 0
                elif ev["type"] == "meter" and start is not None:
                    meters += 1
                elif ev["type"] == "capture_done" and start is not None:
                    spans.append((meters, now - start))
                    start = None
                elif ev["type"] == "prompt":
                    client.post("/api/measure/answer", headers=hdr, json={"answer": "continue"})
                elif ev["type"] in ("finished", "stopped", "failed"):
                    break
    finally:
        capture._sd, capture.open_devices = saved
    rates = [n / s for n, s in spans if s > 0]
    # reference: the same measurement without the app and without a meter
    plain = _ClockedAudio()
    capture._sd = lambda: plain
    capture.open_devices = lambda *a, **k: capture.Devices(0, "clocked", 0, "clocked", False)
    try:
        ms = am.settings_for_room(room, settings)
        am.measure_in_room(room, ms, say=lambda text: None, answer=lambda text: "")
    finally:
        capture._sd, capture.open_devices = saved
    return {
        "result": ev["type"],
        "min_rate": min(rates) if rates else 0.0,
        "captures": len(spans),
        "late": audio.late,
        "blocks": audio.blocks,
        "late_plain": plain.late,
        "blocks_plain": plain.blocks,
    }


def main() -> None:
    from roomcorr.app import decay_view, design_view
    from roomcorr.app.design import design_in_room

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
        settings.design.sample_rates = (48000,)
        run_dir, _, _ = design_in_room(room, settings)
        run_id = run_dir.name
        decay_s = best_of(lambda: decay_view(room, "design", run_id, channel=0), 3)
        design_view_s = best_of(lambda: design_view(room, run_id), 3)
        report_s = best_of(lambda: _report_decay_sections(run_dir), 2)

        with background_server(room, TOKEN) as base:
            hdr = {TOKEN_HEADER: TOKEN}
            with httpx.Client(base_url=base, headers=hdr, timeout=60) as client:
                client.post("/api/preview", json=edit)  # the analysis is made once, here
                http_preview_s = best_of(lambda: client.post("/api/preview", json=edit), 5)
                static_s = best_of(lambda: client.get("/static/app.js"), 5)
                one = f"/api/decay/design/{run_id}?channel=0"
                http_decay_s = best_of(lambda: client.get(one), 3)
                decay_kb = len(client.get(one).content) / 1000
            browser = _browser_times(f"{base}/?token={TOKEN}", Path(tmp) / "profile", run_id)
        meter = live_meter_rate(Path(tmp))

    def shown(key: str) -> str:
        return "no browser" if browser is None else f"{browser[key] * 1000:.0f} ms"

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
            "dragged target point to drawn preview, in Chromium (goal < 300 ms)",
            shown("drag"),
            "-",
            "-",
        ],
        [
            "page load in headless Chromium (goal < 1 s)",
            shown("page"),
            "-",
            "-",
        ],
        [
            "Explore's decay and ringing data, one loudspeaker (in process)",
            f"{decay_s * 1000:.0f} ms",
            f"report's decay + ringing sections, 2 loudspeakers {report_s * 1000:.0f} ms",
            f"{2 * decay_s / report_s:.2f} (per loudspeaker)",
        ],
        [
            f"  the same over HTTP ({decay_kb:.0f} kB of JSON)",
            f"{http_decay_s * 1000:.0f} ms",
            f"static file {static_s * 1000:.1f} ms",
            f"{http_decay_s / static_s:.0f}",
        ],
        [
            "Explore's design curves and filters (in process)",
            f"{design_view_s * 1000:.0f} ms",
            "-",
            "-",
        ],
        [
            "open a design in Explore: fetch and draw all (goal < 1 s)",
            shown("explore"),
            "-",
            "-",
        ],
        [
            f"live meter, slowest of {meter['captures']} captures (goal >= 10/s)",
            f"{meter['min_rate']:.1f} updates/s",
            f"audio blocks {48000 / _ClockedAudio.BLOCK:.1f}/s",
            f"{meter['min_rate'] / (48000 / _ClockedAudio.BLOCK):.3f}",
        ],
        [
            "late audio blocks with the app's meter (goal 0)",
            f"{meter['late']} of {meter['blocks']}",
            f"no app, no meter: {meter['late_plain']} of {meter['blocks_plain']}",
            "-",
        ],
    ]
    print_table(
        "Browser app (demo room, 2 channels, 4 positions)",
        ["what", "time", "reference", "ratio"],
        rows,
    )


def _report_decay_sections(run_dir: Path) -> None:
    """The report's decay and ringing sections of a design (figures included), as it makes them."""
    from roomcorr.deliver.export import load_design_curves
    from roomcorr.report import figures as fg
    from roomcorr.report.context import channel_of, report_context
    from roomcorr.report.reverberation import decay_column, ringing_column

    curves = load_design_curves(run_dir)
    ctx = report_context(curves, png=lambda fig: fg.png_bytes(fig, dpi=90))
    for ch in curves["channels"]:
        x = channel_of(curves, ch, ctx)
        decay_column(x, ctx)
        ringing_column(x, ctx)


if __name__ == "__main__":
    main()
