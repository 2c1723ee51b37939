"""The app's plan view: the layout drawn and edited, saved as ``roomcorr layout set`` saves it
(same checks and messages, same atomic write, under the room lock), with advise's stored
suggestions; bounded requests, 4xx and never 500 on bad ones, the room's containment."""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import pytest

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

sys.path.insert(0, str(Path(__file__).parent))
from room_holder import room_held_elsewhere  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402
from test_ui_server import _chrome  # noqa: E402

from roomcorr import rooms  # noqa: E402
from roomcorr.cli import main  # noqa: E402
from roomcorr.placement.layout import read_layout  # noqa: E402
from roomcorr.ui.server import MAX_BODY_BYTES, TOKEN_HEADER, background_server, create_app  # noqa: E402

TOKEN = "test-token-plan-0123456789abcdef"
PORT = 48327
GOOD = {
    "size_m": [4.6, 5.8, 2.5],
    "loudspeakers": {"left": [1.2, 0.7, 1.0], "right": [3.4, 0.7, 1.0]},
    "seat": [2.3, 3.3, 1.1],
    "measured": [[2.3, 3.3, 1.1], [2.05, 3.3, 1.1], [2.55, 3.3, 1.1]],
}


@pytest.fixture()
def room(tmp_path) -> rooms.Room:
    return rooms.init_room(tmp_path / "den")


@pytest.fixture()
def client(room) -> TestClient:
    return TestClient(create_app(room, TOKEN, PORT), base_url=f"http://127.0.0.1:{PORT}",
                      raise_server_exceptions=False)


def _auth() -> dict[str, str]:
    return {TOKEN_HEADER: TOKEN}


def _cli_set(room: rooms.Room, plan: dict) -> int:
    args = ["layout", "set", "--room", str(room.root), "--size",
            ",".join(map(str, plan["size_m"])), "--seat", ",".join(map(str, plan["seat"]))]
    for n, p in plan["loudspeakers"].items():
        args += ["--speaker", f"{n}=" + ",".join(map(str, p))]
    for p in plan.get("measured", []):
        args += ["--measured", ",".join(map(str, p))]
    return main(args)


def test_save_writes_what_the_command_line_writes(client, room, tmp_path):
    empty = client.get("/api/plan", headers=_auth()).json()
    assert empty["layout"] is None and empty["problem"] is None and empty["advice"] is None
    assert empty["limits"]["head_half_width_m"] == 0.3
    r = client.post("/api/plan", headers=_auth(), json=GOOD)
    assert r.status_code == 200, r.text
    assert r.json()["saved"] == "layout.toml"
    from_app = room.layout_path.read_text()
    assert _cli_set(room, GOOD) == 0
    assert room.layout_path.read_text() == from_app  # byte for byte the same file
    view = client.get("/api/plan", headers=_auth()).json()
    assert view["layout"] == read_layout(room.layout_path).to_dict()
    assert view["advice"] is None and view["problem"] is None


@pytest.mark.parametrize(
    "change",
    [
        {"loudspeakers": {"left": [9.2, 0.7, 1.0], "right": [3.4, 0.7, 1.0]}},  # outside
        {"loudspeakers": {"left": [2.3, 3.2, 1.0], "right": [3.4, 0.7, 1.0]}},  # on the seat
        {"seat": [2.3, 3.3, 9.0]},                                             # above the ceiling
        {"size_m": [0.5, 5.8, 2.5]},                                           # too small a room
        {"loudspeakers": {"le ft": [1.2, 0.7, 1.0]}},                          # a bad name
    ],
)
def test_refusals_carry_the_command_lines_message(client, room, capsys, change):
    plan = {**GOOD, **change}
    r = client.post("/api/plan", headers=_auth(), json=plan)
    assert r.status_code == 400, r.text
    assert not room.layout_path.exists()  # nothing written
    capsys.readouterr()
    assert _cli_set(room, plan) == 2
    cli_err = capsys.readouterr().err.strip()
    assert r.json()["error"] in cli_err  # the CLI adds only its "roomcorr: error:" prefix


@pytest.mark.parametrize(
    "body, status",
    [
        (b"not json", 400),
        (b"[1, 2]", 400),
        (json.dumps({**GOOD, "colour": "red"}).encode(), 400),
        (json.dumps({**GOOD, "seat": [2.3, 3.3]}).encode(), 400),
        (json.dumps({**GOOD, "loudspeakers": []}).encode(), 400),
        (json.dumps({**GOOD, "loudspeakers": {}}).encode(), 400),
        (json.dumps({**GOOD, "measured": "x"}).encode(), 400),
        (json.dumps({**GOOD, "seat": ["two", 3.3, 1.1]}).encode(), 400),
        (json.dumps({**GOOD, "seat": [True, 3.3, 1.1]}).encode(), 400),
        (json.dumps({**GOOD, "loudspeakers": {"left": {"x": 1}}}).encode(), 400),
        (b'{"size_m": [NaN, 5.8, 2.5], "loudspeakers": {"l": [1, 1, 1]}, "seat": [2, 3, 1]}', 400),
        (b"[" * 5000 + b"]" * 5000, 400),
    ],
)
def test_bad_requests_are_4xx_never_500(client, room, body, status):
    r = client.post("/api/plan", headers={**_auth(), "content-type": "application/json"},
                    content=body)
    assert r.status_code == status, r.text
    assert not room.layout_path.exists()


def test_an_oversized_request_is_refused_before_it_is_read(client, room):
    # RFC 9110 section 15.5.14: 413 Content Too Large
    r = client.post("/api/plan", headers={**_auth(), "content-type": "application/json"},
                    content=b" " * (MAX_BODY_BYTES + 1))
    assert r.status_code == 413


def test_a_held_room_is_409_and_nothing_is_written(client, room):
    with room_held_elsewhere(room):
        r = client.post("/api/plan", headers=_auth(), json=GOOD)
    assert r.status_code == 409, r.text
    assert not room.layout_path.exists()


def test_a_layout_leading_out_of_the_room_is_neither_read_nor_followed(client, room, tmp_path):
    outside = tmp_path / "outside.toml"
    outside.write_text("[room]\nsize_m = [4.0, 5.0, 2.5]\n")
    os.symlink(outside, room.layout_path)
    view = client.get("/api/plan", headers=_auth()).json()
    assert view["layout"] is None and "outside the room folder" in view["problem"]
    r = client.post("/api/plan", headers=_auth(), json=GOOD)
    assert r.status_code == 400 and "outside the room folder" in r.json()["error"]
    assert outside.read_text() == "[room]\nsize_m = [4.0, 5.0, 2.5]\n"  # never written through


def test_damaged_advice_is_reported_not_served(client, room):
    assert client.post("/api/plan", headers=_auth(), json=GOOD).status_code == 200
    (room.root / "advice.json").write_text('{"layout_sha256": "x", "made_utc": "t", '
                                           '"suggestions": [{"text": "t", "speakers_m": '
                                           '{"left": [1, 2, NaN]}, "seat_m": [1, 2, 3]}], '
                                           '"plan": {}}')
    view = client.get("/api/plan", headers=_auth()).json()
    assert view["advice"] is None and "advice.json" in view["advice_problem"]


def test_token_is_required(client):
    assert client.get("/api/plan").status_code == 403
    assert client.post("/api/plan", json=GOOD).status_code == 403


# --------------------------------------------------------------------------- real browser


def _advice(room: rooms.Room) -> None:
    """An advice file as advise keeps it (suggestion and map), for the plan to draw."""
    from roomcorr.app.placement import store_advice
    from roomcorr.deliver.atomic import sha256_of

    grid_x = [0.5 + 0.3 * i for i in range(13)]
    grid_y = [0.6 + 0.35 * j for j in range(15)]
    res = {
        "current": {"boom_db": 2.8, "ripple_db": 6.0},
        "suggestions": [{
            "speakers_m": {"left": [1.2, 1.0, 1.0], "right": [3.4, 1.0, 1.0]},
            "seat_m": [2.3, 3.3, 1.1], "boom_db": 2.0, "ripple_db": 4.4, "score": 0.8,
            "text": "Move both loudspeakers 30 cm further from the front wall: test advice",
        }],
        "plan": {"size_m": GOOD["size_m"], "current": {}, "suggested": {
            "speakers_m": {"left": [1.2, 1.0, 1.0], "right": [3.4, 1.0, 1.0]},
            "seat_m": [2.3, 3.3, 1.1]},
            "map": {"x_m": grid_x, "y_m": grid_y,
                    "ripple_db": [[3.0 + 0.1 * i + 0.05 * j for i in range(13)]
                                  for j in range(15)]}},
        "model": {},
    }
    store_advice(room, res, sha256_of(room.layout_path), "none")


def test_browser_drags_a_loudspeaker_saves_and_refuses_a_position_outside(room, tmp_path,
                                                                          capsys):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    assert _cli_set(room, GOOD) == 0
    _advice(room)
    driver = _chrome(tmp_path, height=1400)
    try:
        with background_server(room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            wait.until(lambda d: d.find_elements(By.CSS_SELECTOR, "#runs"))
            driver.find_element(By.CSS_SELECTOR, "nav button[data-tab=plan]").click()
            left = wait.until(lambda d: d.find_element(
                By.CSS_SELECTOR, "#p-svg rect.p-speaker[data-name=left]"))
            # the stored advice is drawn: its map and the suggested positions in green
            assert len(driver.find_elements(By.CSS_SELECTOR, "#p-map rect")) == 13 * 15
            assert len(driver.find_elements(By.CSS_SELECTOR, "#p-svg .p-suggested")) == 3
            assert "test advice" in driver.find_element(By.ID, "p-advice").text
            assert len(driver.find_elements(By.CSS_SELECTOR, "#p-svg path.p-measured")) == 3
            assert not driver.find_element(By.ID, "p-count").is_displayed()  # no measurement
            px_per_m = driver.execute_script("return window.roomcorrPlan().pxPerMetre")
            # drag the left loudspeaker 0.5 m further from the front wall (down the page)
            ActionChains(driver).click_and_hold(left).move_by_offset(0, 10).move_by_offset(
                0, round(0.5 * px_per_m) - 10).release().perform()
            edited = driver.execute_script("return window.roomcorrPlan().plan")
            y_left = edited["loudspeakers"][0][1][1]
            assert abs(y_left - 1.2) <= 0.02, edited
            assert edited["loudspeakers"][0][1][0] == 1.2  # moved straight back: x kept
            driver.find_element(By.ID, "p-save").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "layout saved"))
            saved = read_layout(room.layout_path)
            assert saved.loudspeakers["left"] == (1.2, pytest.approx(y_left, abs=1e-9), 1.0)
            assert saved.loudspeakers["right"] == (3.4, 0.7, 1.0)  # untouched
            assert len(saved.measured) == 3
            # the advice was made for the layout before the drag: marked as such
            assert "layout has changed since" in driver.find_element(By.ID, "p-advice").text
            # type a position outside the room: refused with the command line's message
            before = room.layout_path.read_text()
            x_box = driver.find_element(By.CSS_SELECTOR, "#p-speaker-1 input.x")
            x_box.clear()
            x_box.send_keys("5.1")
            driver.find_element(By.ID, "p-save").click()
            err = wait.until(lambda d: d.find_element(By.ID, "p-error").text or None)
            assert "loudspeakers.right" in err and "lies outside the room (0 to 4.6 m)" in err
            assert room.layout_path.read_text() == before
            capsys.readouterr()
            assert main(["layout", "set", "--room", str(room.root), "--speaker",
                         f"left=1.2,{y_left},1.0", "--speaker", "right=5.1,0.7,1.0"]) == 2
            assert err in capsys.readouterr().err  # the command line's very message
            shot = Path(os.environ.get("ROOMCORR_UI_SHOT_DIR", tmp_path)) / "plan.png"
            driver.save_screenshot(str(shot))
            # the one entry in the console is the refused request (400), nothing else
            severe = [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]
            assert all("/api/plan" in e["message"] and "400" in e["message"] for e in severe)
    finally:
        driver.quit()


def test_browser_compare_draws_the_predicted_and_the_measured_change(tmp_path):
    # Two runs of a pyroomacoustics room (Allen and Berkley image sources), the loudspeakers
    # 0.6 m further from the front wall in the second: the Compare view draws, per
    # loudspeaker, the change the model predicted beside the measured one, and its text
    # holds the figures of compare_measurements (one result for CLI, report and app).
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import Select, WebDriverWait
    from test_compare_move import AFTER, BEFORE, _layout, _simulate, _write

    from roomcorr.app.explore import compare_view
    from roomcorr.placement.layout import write_layout

    room = rooms.init_room(tmp_path / "den")
    write_layout(room.layout_path, _layout(BEFORE))
    run_a = rooms.add_measurement(room, _write(tmp_path / "a", _simulate(BEFORE)))
    write_layout(room.layout_path, _layout(AFTER))
    run_b = rooms.add_measurement(room, _write(tmp_path / "b", _simulate(AFTER)))
    expected = compare_view(room, run_a.name, run_b.name)["predicted_change"]
    driver = _chrome(tmp_path, height=1400)
    try:
        with background_server(room, TOKEN) as base:
            driver.get(f"{base}/?token={TOKEN}")
            wait = WebDriverWait(driver, 60)
            wait.until(lambda d: len(d.find_elements(By.CSS_SELECTOR, "#c-before option")) == 2)
            Select(driver.find_element(By.ID, "c-before")).select_by_value(run_a.name)
            Select(driver.find_element(By.ID, "c-after")).select_by_value(run_b.name)
            driver.find_element(By.ID, "c-go").click()
            wait.until(ec.text_to_be_present_in_element((By.ID, "status"), "compared"))
            titles = [h.text.splitlines()[0]
                      for h in driver.find_elements(By.CSS_SELECTOR, "#plots .plot h3")]
            assert titles.count("left: predicted and measured change after the move") == 1
            assert titles.count("right: predicted and measured change after the move") == 1
            text = driver.find_element(By.ID, "explore-text").text
            for ch in expected["channels"]:
                assert ch["words"]["text"] in text
                assert f"off by {ch['held_db']:.1f} dB RMS" in text
    finally:
        driver.quit()


def test_the_plan_knows_how_many_positions_the_layout_should_list(client, room):
    demo = sorted((Path(__file__).resolve().parents[1] / "measurements_demo").glob("pos*.wav"))
    run = rooms.add_measurement(room, demo)
    view = client.get("/api/plan", headers=_auth()).json()
    assert view["latest_measurement"] == run.name and view["latest_positions"] == len(demo)


def _coord(extent: float):
    from hypothesis import strategies as st

    # anywhere in the room, walls and their last millimetre included
    return st.one_of(st.floats(0.0, extent), st.sampled_from([1e-4, 4e-4, 6e-4, extent - 4e-4]))


def test_whatever_the_page_saves_reads_back_or_is_refused_untouched(tmp_path_factory):
    # Property (hypothesis): a plan the server accepts is a layout.toml that reads back to
    # the same positions within the file's 0.5 mm rounding; one it refuses leaves the file
    # as it was. Near a wall, rounding to the file's millimetres must not put a position
    # on the wall after it was accepted (the file would then stop every later command).
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from roomcorr.app.plan import save_plan
    from roomcorr.errors import SettingsError

    room = rooms.init_room(tmp_path_factory.mktemp("prop") / "den")
    size = (4.6, 5.8, 2.5)
    pos = st.tuples(_coord(size[0]), _coord(size[1]), _coord(size[2]))

    @settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(left=pos, seat=pos)
    def check(left, seat):
        before = room.layout_path.read_bytes() if room.layout_path.exists() else None
        plan = {"size_m": list(size), "loudspeakers": {"left": list(left)}, "seat": list(seat)}
        try:
            save_plan(room, plan)
        except SettingsError:
            now = room.layout_path.read_bytes() if room.layout_path.exists() else None
            assert now == before
            return
        back = read_layout(room.layout_path)
        for got, want in ((back.loudspeakers["left"], left), (back.seat, seat)):
            assert max(abs(a - b) for a, b in zip(got, want, strict=True)) <= 0.0005 + 1e-12

    check()
