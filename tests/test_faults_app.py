"""Fault suite, the browser app: the same promises as the command line (issue 22).

Nothing is read or written outside the room folder (links leading out are refused by
the same rule as the command line's, :func:`roomcorr.rooms.room_folder`); the room
lock excludes the app's own request threads as well as other processes; a request
the app cannot serve is a 4xx answer with one message, never a 500; request bodies
are limited before they are read, so the server's memory stays bounded.
"""

from __future__ import annotations

import hashlib
import http.client
import json
import os
import resource
import shutil
import subprocess
import sys
import threading
from pathlib import Path

import pytest

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from room_holder import room_held_elsewhere  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from roomcorr import cli, rooms  # noqa: E402
from roomcorr.errors import RoomBusyError  # noqa: E402
from roomcorr.ui.server import MAX_BODY_BYTES, TOKEN_HEADER, background_server, create_app  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
TOKEN = "test-token-0123456789"
PORT = 48322  # only used in the Host header; TestClient opens no socket
TABLE = {"tilt_db_per_octave": -0.5, "tilt_pivot_hz": 1000.0}


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()  # the standard library's SHA-256


def _tree(root: Path) -> dict[str, str]:
    return {
        p.relative_to(root).as_posix(): (_sha(p) if p.is_file() else "dir")
        for p in sorted(root.rglob("*"))
    }


@pytest.fixture(scope="module")
def base_room(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("app") / "den"
    room = rooms.init_room(root)
    rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
    assert cli.main(["design", "--room", str(root), "--rates", "48000"]) == 0
    return root


@pytest.fixture
def room(base_room, tmp_path) -> rooms.Room:
    """A private copy of the room, with an outside folder beside it (``tmp_path/outside``)."""
    root = tmp_path / "den"
    shutil.copytree(base_room, root, symlinks=True)
    (tmp_path / "outside").mkdir()
    return rooms.open_room(root)


def _client(room: rooms.Room) -> TestClient:
    return TestClient(
        create_app(room, TOKEN, PORT),
        base_url=f"http://127.0.0.1:{PORT}",
        headers={TOKEN_HEADER: TOKEN},
        raise_server_exceptions=False,  # a crash is a 500 answer here, as a browser sees it
    )


def _design_id(room: rooms.Room) -> str:
    return rooms.list_runs(room, "design", include_incomplete=False)[-1].run_id


def _link_out(room: rooms.Room, name: str) -> Path:
    """Move ``ROOM/name`` outside the room and leave a link to it (the issue's layout)."""
    out = room.root.parent / "outside" / name
    src = room.root / name
    if src.exists():
        shutil.move(str(src), out)
    else:
        out.mkdir()
    src.symlink_to(out, target_is_directory=True)
    return out


# --------------------------------------------------------------- nothing outside the room


def test_file_route_refuses_a_designs_folder_leading_out(room):
    run_id = _design_id(room)
    _link_out(room, "designs")
    r = _client(room).get(f"/api/file/design/{run_id}/manifest.json")
    assert r.status_code in (400, 404) and "error" in r.json()
    assert '"files"' not in r.text  # the outside manifest's contents never come back


def test_report_button_refuses_a_designs_folder_leading_out(room):
    run_id = _design_id(room)
    out = _link_out(room, "designs")
    before = _tree(out)
    r = _client(room).post(f"/api/report/design/{run_id}")
    assert 400 <= r.status_code < 500, r.text
    assert _tree(out) == before  # no report.html written into the outside folder


@pytest.mark.parametrize("name", ["targets", "designs"])
def test_save_refuses_a_folder_leading_out_and_writes_nothing(room, name):
    out = _link_out(room, name)
    before = _tree(out)
    r = _client(room).post("/api/save", json={"target": None, "table": TABLE, "name": "warm"})
    assert 400 <= r.status_code < 500, r.text
    assert _tree(out) == before
    assert not (room.root / "targets").is_dir() or name == "targets"


@pytest.mark.parametrize("dangling", [False, True])
def test_lock_file_link_is_never_followed(room, tmp_path, capsys, dangling):
    victim = tmp_path / "outside" / "victim.txt"
    if not dangling:
        victim.write_text("not roomcorr's\n")
    (room.root / rooms.LOCK_FILE).unlink(missing_ok=True)
    (room.root / rooms.LOCK_FILE).symlink_to(victim)
    code = cli.main(["design", "--room", str(room.root), "--rates", "48000"])
    err = capsys.readouterr().err
    assert code == 2 and "symbolic link" in err and "Traceback" not in err
    assert victim.exists() != dangling  # a dangling link creates nothing outside
    if not dangling:
        assert victim.read_text() == "not roomcorr's\n"
    r = _client(room).post("/api/save", json={"target": "flat"})
    assert r.status_code == 400 and "symbolic link" in r.json()["error"]


# --------------------------------------------------------------------------- the lock


def test_lock_excludes_other_threads_of_the_process(room):
    held, release, seen = threading.Event(), threading.Event(), []

    def holder() -> None:
        with rooms.room_lock(room, "holder"):
            with rooms.room_lock(room, "the same thread again"):  # re-entrant in its thread
                held.set()
                release.wait(10)

    t = threading.Thread(target=holder)
    t.start()
    assert held.wait(10)
    try:
        with rooms.room_lock(room, "another thread"):
            seen.append("taken")
    except RoomBusyError as exc:
        seen.append(str(exc))
    release.set()
    t.join()
    assert seen and seen[0] != "taken" and "in use" in seen[0]
    with rooms.room_lock(room, "after"):  # released completely, no KeyError
        pass
    assert not rooms.is_locked(room)


def test_concurrent_saves_never_answer_500_or_overlap(room):
    before = len(rooms.list_runs(room, "design"))
    with background_server(room, TOKEN) as url:
        host, port = url.removeprefix("http://").split(":")
        answers: list[int] = []

        def save(i: int) -> None:
            conn = http.client.HTTPConnection(host, int(port), timeout=120)
            body = json.dumps({"target": None, "table": TABLE, "name": f"t{i}"})
            conn.request(
                "POST",
                "/api/save",
                body,
                {TOKEN_HEADER: TOKEN, "content-type": "application/json", "host": f"{host}:{port}"},
            )
            answers.append(conn.getresponse().status)

        threads = [threading.Thread(target=save, args=(i,)) for i in range(3)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    assert sorted(set(answers)) <= [200, 409], answers
    assert 200 in answers
    runs = rooms.list_runs(room, "design")
    assert len(runs) - before == answers.count(200)
    assert all(r.complete and rooms.check_run(r) is None for r in runs)
    # a save refused with 409 kept no target file
    kept = sorted(p.stem for p in (room.root / "targets").glob("*.toml"))
    assert len(kept) == answers.count(200), (kept, answers)


def test_save_refused_by_the_lock_writes_no_target(room):
    with room_held_elsewhere(room):
        r = _client(room).post("/api/save", json={"target": None, "table": TABLE, "name": "x"})
    assert r.status_code == 409
    assert not (room.root / "targets" / "x.toml").exists()


def test_saving_a_target_under_a_used_name_keeps_the_earlier_one(room):
    client = _client(room)
    r1 = client.post("/api/save", json={"target": None, "table": TABLE, "name": "warm"})
    assert r1.status_code == 200, r1.text
    first = room.designs_dir / r1.json()["run_id"]
    inputs = json.loads((first / "manifest.json").read_text())["inputs"]
    target = next(i for i in inputs if i["role"] == "target")
    other = dict(TABLE, tilt_db_per_octave=-1.0)
    r2 = client.post("/api/save", json={"target": None, "table": other, "name": "warm"})
    assert r2.status_code == 200, r2.text
    # the first design's recorded target is untouched, so it can be repeated
    assert _sha(Path(target["path"])) == target["sha256"]
    second = room.designs_dir / r2.json()["run_id"]
    t2 = next(
        i
        for i in json.loads((second / "manifest.json").read_text())["inputs"]
        if i["role"] == "target"
    )
    assert t2["path"] != target["path"] and Path(t2["path"]).name == "warm-2.toml"
    # the same shape under the same name again: the existing file is used as it is
    r3 = client.post("/api/save", json={"target": None, "table": TABLE, "name": "warm"})
    third = room.designs_dir / r3.json()["run_id"]
    t3 = next(
        i
        for i in json.loads((third / "manifest.json").read_text())["inputs"]
        if i["role"] == "target"
    )
    assert t3["path"] == target["path"]


# ------------------------------------------------------------------ 400, never 500


@pytest.mark.parametrize(
    "path",
    [
        "/api/design/2026%00x",
        "/api/design/" + "2" * 5000,
        "/api/measurement/" + "a" * 5000,
        "/api/file/design/" + "9" * 5000 + "/manifest.json",
        "/api/file/design/RUN/manifest.json%00.png",
        "/api/file/design/RUN/" + "x/" * 3000 + "y",
        "/api/decay/design/%00",
        "/api/files/..%00",
    ],
)
def test_malformed_names_are_400(room, path):
    path = path.replace("RUN", _design_id(room))
    r = _client(room).get(path)
    assert r.status_code == 400, (r.status_code, r.text[:200])
    assert "error" in r.json()


@pytest.mark.parametrize(
    "route",
    ["/api/preview", "/api/save", "/api/measure/start", "/api/measure/acknowledge", "/api/plan"],
)
@pytest.mark.parametrize(
    "body",
    [
        "[" * 100_000 + "]" * 100_000,  # json recursion: RecursionError near 1000 levels
        '{"x": ' + "9" * 5000 + "}",  # over sys.get_int_max_str_digits (4300): ValueError
        '{"max_boost_db": NaN}',  # not JSON (RFC 8259 section 6); refused by its key's check
        '{"measurement": {"a": 1}, "table": 5}',
    ],
)
def test_malformed_bodies_are_400(room, route, body):
    r = _client(room).post(route, content=body, headers={"content-type": "application/json"})
    assert r.status_code == 400, (r.status_code, r.text[:200])


@pytest.mark.parametrize("value", ["nan", "x", "5", [1], {"a": 1}, True, "-inf"])
def test_measure_start_with_a_bad_level_is_400(room, value):
    client = _client(room)
    assert client.post("/api/measure/acknowledge", json={"acknowledged": True}).status_code == 200
    r = client.post("/api/measure/start", json={"settings": {"level_dbfs": value}})
    assert r.status_code == 400, (value, r.status_code, r.text[:200])


# ------------------------------------------------------------------- size limits


def _raw_post(host: str, port: int, length: int, send_bytes: int, chunked: bool) -> int:
    """POST /api/preview with a declared (or chunked) body; returns the status."""
    import socket

    s = socket.create_connection((host, port), timeout=60)
    head = (
        f"POST /api/preview HTTP/1.1\r\nHost: {host}:{port}\r\n{TOKEN_HEADER}: {TOKEN}\r\n"
        "Content-Type: application/json\r\n"
    )
    head += "Transfer-Encoding: chunked\r\n\r\n" if chunked else f"Content-Length: {length}\r\n\r\n"
    s.sendall(head.encode())
    block = b"[" * (1 << 20)
    sent = 0
    try:
        while sent < send_bytes:
            s.sendall(b"%x\r\n" % len(block) + block + b"\r\n" if chunked else block)
            sent += len(block)
    except OSError:
        pass  # the server answered and closed: what we want
    s.settimeout(60)
    answer = s.recv(200).decode("latin-1")
    s.close()
    return int(answer.split()[1])


def test_oversized_bodies_are_413_and_memory_stays_bounded(room):
    # The server runs in this process: its peak resident size (getrusage) must not grow
    # by anything like the bodies sent (300 MB declared, 64 MB streamed without a length).
    with background_server(room, TOKEN) as url:
        host, port = url.removeprefix("http://").split(":")
        peak0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kB on Linux
        assert _raw_post(host, int(port), 300 << 20, 8 << 20, chunked=False) == 413
        assert _raw_post(host, int(port), 0, 64 << 20, chunked=True) == 413
        grown_mb = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak0) / 1024
    assert grown_mb < 40, grown_mb
    assert MAX_BODY_BYTES <= 4 << 20


def test_body_at_the_limit_is_read(room):
    # a body just under the limit is served as usual (here: refused as JSON, a 400)
    r = _client(room).post("/api/preview", content=b" " * (MAX_BODY_BYTES - 10) + b"[]")
    assert r.status_code == 400


def test_cli_refuses_the_same_layouts(room, capsys):
    # the CLI's refusal of a link leading out, the rule the app now shares
    _link_out(room, "measurements")
    code = cli.main(["design", "--room", str(room.root)])
    err = capsys.readouterr().err
    assert code == 2 and "symbolic link" in err


def test_run_id_checks_do_not_refuse_real_runs(room):
    # every run the room holds is served (the name rule is not too strict)
    client = _client(room)
    for run in rooms.list_runs(room):
        kind = "design" if run.kind == "design" else "measurement"
        assert client.get(f"/api/{kind}/{run.run_id}").status_code == 200


if __name__ == "__main__":  # pragma: no cover
    sys.exit(subprocess.call([sys.executable, "-m", "pytest", __file__, "-q"], env=os.environ))
