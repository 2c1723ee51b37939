"""Soak test for trust (issue 22): random kills of every writer, a fault catalogue, the app.

Run: ``python benchmarks/soak_trust.py [--kills N] [--seed S]`` (default 100 kills,
seed 22; ``--kills 12`` for a quick run). Not run by ``run_all.py`` (a long
robustness run, not a speed figure). Everything happens in a temporary folder:

* a room (one measurement, one design), a plain design folder ``d`` outside it and an
  ``outside`` folder with a file roomcorr must never touch;
* each writer is run once to the end to time it; then each round starts one writer, or
  two at once, and kills it (SIGKILL or SIGINT) after a random, seeded delay of 0.15 to
  0.95 times that duration (so that kills land while files are written): ``design``
  in the room, ``design --replace`` and ``report`` of ``d``, ``report .`` inside
  ``d``, the app's Save and full-report button (the app server is the killed
  process), and the app's Save together with a ``design`` from the command line;
* after every round: ``d`` must hold exactly the files its manifest lists with their
  SHA-256 (:func:`roomcorr.deliver.export.design_differences`), every finished run of
  the room must pass its record's check (:func:`roomcorr.rooms.check_run`), and
  nothing outside the room and ``d`` may have changed (staging folders that the next
  write removes excepted);
* then a catalogue of malformed files (CLI) and requests (app) is run once, and the
  server's memory is read from ``/proc`` before and after oversized requests.

Prints the issue's counts: tracebacks, reads or writes outside, mixed folders, 500
answers, the server's resident memory.
"""

from __future__ import annotations

import argparse
import hashlib
import http.client
import json
import os
import random
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "measurements_demo"
TEMP = (".roomcorr-tmp-", ".roomcorr-old-")
ENV = dict(os.environ, PYTHONPATH=str(REPO), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
TABLE = {"tilt_db_per_octave": -0.5, "tilt_pivot_hz": 1000.0}


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _cmd(*args: object) -> list[str]:
    return [sys.executable, "-m", "roomcorr", *map(str, args)]


def _snapshot(root: Path, skip: list[Path]) -> dict[str, str]:
    """Every file outside ``skip`` (and outside staging folders) with its SHA-256."""
    out = {}
    for p in root.rglob("*"):
        if any(s == p or s in p.parents for s in skip) or any(
            part.startswith(TEMP) for part in p.relative_to(root).parts
        ):
            continue
        if p.is_file() and not p.is_symlink():
            out[p.relative_to(root).as_posix()] = _sha(p)
    return out


class Server:
    """``roomcorr ui ROOM --no-browser`` in a subprocess (so that it can be killed)."""

    def __init__(self, room: Path) -> None:
        self.proc = subprocess.Popen(
            _cmd("ui", room, "--no-browser"),
            env=ENV,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        line = self.proc.stdout.readline()
        m = re.search(r"http://127\.0\.0\.1:(\d+)/\?token=(\S+)", line)
        if m is None:
            raise RuntimeError(f"the app did not start: {line!r} {self.proc.stderr.read()}")
        self.port, self.token = int(m.group(1)), m.group(2)

    def request(
        self, method: str, path: str, body: bytes | str | None = None, timeout: float = 300
    ) -> int:
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=timeout)
        headers = {
            "x-roomcorr-token": self.token,
            "host": f"127.0.0.1:{self.port}",
            "content-type": "application/json",
        }
        try:
            conn.request(method, path, body, headers)
            return conn.getresponse().status
        except (OSError, http.client.HTTPException):
            return 0  # the server was killed under the request
        finally:
            conn.close()

    def rss_mb(self) -> tuple[float, float]:
        """(resident, peak resident) size in MB, from /proc (Linux)."""
        text = Path(f"/proc/{self.proc.pid}/status").read_text()
        rss = int(re.search(r"VmRSS:\s+(\d+)", text).group(1)) / 1024
        hwm = int(re.search(r"VmHWM:\s+(\d+)", text).group(1)) / 1024
        return rss, hwm

    def stop(self, sig: int = signal.SIGINT) -> str:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
        try:
            _, err = self.proc.communicate(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            _, err = self.proc.communicate()
        return err or ""


def _latest_design(room: Path) -> str:
    runs = sorted(p.name for p in (room / "designs").iterdir() if (p / "complete.json").is_file())
    return runs[-1]


def _kill_round(rng: random.Random, action: str, root: Path, delay: float) -> tuple[str, list[str]]:
    """Start ``action``, kill it after ``delay`` seconds unless it ended; return (how it
    ended, stderr texts)."""
    room, d = root / "room", root / "d"
    errs: list[str] = []
    sig = signal.SIGKILL if rng.random() < 0.5 else signal.SIGINT
    if action.startswith("app") or action == "both":
        server = Server(room)
        if action == "app-report":
            call = ("POST", f"/api/report/design/{_latest_design(room)}", None)
        else:
            body = {"target": None, "table": TABLE, "name": f"t{rng.randrange(3)}"}
            call = ("POST", "/api/save", json.dumps(body))
        statuses: list[int] = []
        t = threading.Thread(target=lambda: statuses.append(server.request(*call)))
        t.start()
        cli = None
        if action == "both":  # the command line writes the same room at the same moment
            cli = subprocess.Popen(
                _cmd("design", "--room", room, "--rates", "48000"),
                env=ENV,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE,
                text=True,
            )
        t.join(timeout=delay)
        ended = "done" if not t.is_alive() else "cut"
        errs.append(server.stop(sig))
        t.join()
        if cli is not None:
            if rng.random() < 0.5 and cli.poll() is None:
                cli.send_signal(sig)
            errs.append(cli.communicate()[1])
        if 500 in statuses:
            errs.append("HTTP 500")
        return ended, errs
    args, cwd = {
        "design": (_cmd("design", "--room", room, "--rates", "48000"), root),
        "design-replace": (
            _cmd("design", root / "irs", "--out", d, "--replace", "--rates", "48000"),
            root,
        ),
        "report": (_cmd("report", d), root),
        "report-dot": (_cmd("report", "."), d),
    }[action]
    proc = subprocess.Popen(
        args, env=ENV, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
    )
    try:
        _, err = proc.communicate(timeout=delay)
        ended = "done"
    except subprocess.TimeoutExpired:
        proc.send_signal(sig)
        _, err = proc.communicate()
        ended = "cut"
    errs.append(err.decode(errors="replace"))
    return ended, errs


def _mixed(root: Path) -> list[str]:
    """Folders a reader would see half old, half new (empty when all are whole)."""
    sys.path.insert(0, str(REPO))
    from roomcorr import rooms
    from roomcorr.deliver.export import design_differences
    from roomcorr.errors import RoomcorrError

    out = []
    try:
        diff = design_differences(root / "d")
    except RoomcorrError as exc:
        diff = [str(exc)]
    if diff:
        out.append(f"d: {diff[0]}")
    room = rooms.open_room(root / "room")
    for run in rooms.list_runs(room):
        problem = rooms.check_run(run)
        if problem:
            out.append(f"{run.run_id}: {problem}")
    return out


CLI_CATALOGUE = {
    # name: (file relative to the copy, new content)
    "manifest-deep": ("d/manifest.json", "[" * 100_000 + "]" * 100_000),
    "manifest-big-int": ("d/manifest.json", '{"files": [], "x": ' + "9" * 5000 + "}"),
    "manifest-settings-design": ("d/manifest.json", None),
    "manifest-measurements": ("d/manifest.json", None),
    "record-deep": ("irs/measurement.json", "[" * 100_000 + "]" * 100_000),
    "record-big-int": ("irs/measurement.json", '{"x": ' + "9" * 5000 + "}"),
    "record-positions": ("irs/measurement.json", '{"positions": 5}'),
    "marker-deep": ("MEAS/complete.json", "[" * 100_000 + "]" * 100_000),
    "marker-big-int": ("MEAS/complete.json", '{"complete": true, "x": ' + "9" * 5000 + "}"),
    "marker-weakened": ("MEAS/complete.json", '{"complete": true}'),
    "extra-wav": ("MEAS/pos9.wav", b"copy"),
    "toml-deep": ("room/roomcorr-room.toml", "x = " + "[" * 5000 + "]" * 5000 + "\n"),
    "measure-level-text": (
        "room/roomcorr-room.toml",
        'settings_version = 1\n[measure]\nlevel_dbfs = "x"\n',
    ),
    "measure-sweep-text": (
        "room/roomcorr-room.toml",
        'settings_version = 1\n[measure]\nsweep_s = "5"\n',
    ),
    "measure-positions-text": (
        "room/roomcorr-room.toml",
        'settings_version = 1\n[measure]\npositions = "3"\n',
    ),
    "fir-deleted": ("d/fir/48000/left.wav", "DELETE"),
    "lock-link-out": ("room/.roomcorr-lock", "LINK"),
    "designs-link-out": ("room/designs", "LINKDIR"),
}


def _catalogue_cli(root: Path) -> tuple[int, int, int]:
    """Run every malformed-file case with the commands that read it; returns
    (commands run, tracebacks, answers other than one line with exit 2 or a listing)."""
    runs = tracebacks = wrong = 0
    for name, (rel, content) in CLI_CATALOGUE.items():
        case = root / f"case-{name}"
        shutil.copytree(root / "pristine", case, symlinks=True)
        meas = sorted((case / "room" / "measurements").iterdir())[0]
        p = case / rel.replace("MEAS", str(meas.relative_to(case)))
        if content is None:
            doc = json.loads(p.read_text())
            doc.update({"settings": {"design": 5}} if "settings" in name else {"measurements": 5})
            p.write_text(json.dumps(doc))
        elif content == "DELETE":
            p.unlink()
        elif content == "LINK":
            p.unlink(missing_ok=True)
            p.symlink_to(root / "outside" / "victim.txt")
        elif content == "LINKDIR":
            shutil.move(str(p), case / "elsewhere")
            p.symlink_to(case / "elsewhere", target_is_directory=True)
        elif isinstance(content, bytes):
            shutil.copy(meas / "pos1.wav", p)
        else:
            p.write_text(content)
        commands = {  # the commands that read the damaged file (measure only where refused)
            "manifest": [["report", case / "d"]],
            "fir": [["report", case / "d"]],
            "record": [
                ["report", case / "irs", "--out", case / "irs-report"],
                ["design", case / "irs", "--out", case / "new", "--rates", "48000"],
            ],
            "marker": [["history", case / "room"], ["report", meas]],
            "extra": [["history", case / "room"], ["design", "--room", case / "room"]],
            "toml": [["design", "--room", case / "room"], ["measure", "--room", case / "room"]],
            "measure": [["measure", "--room", case / "room", "--yes"]],
            "lock": [["design", "--room", case / "room"]],
            "designs": [["history", case / "room"], ["design", "--room", case / "room"]],
        }[name.split("-")[0]]
        for args, cwd in ((c, case) for c in commands):
            r = subprocess.run(_cmd(*args), env=ENV, cwd=cwd, capture_output=True, text=True)
            runs += 1
            tracebacks += "Traceback" in r.stderr
            lines = [ln for ln in r.stderr.splitlines() if ln.strip() and "aution" not in ln]
            if r.returncode not in (0, 2) or (r.returncode == 2 and len(lines) != 1):
                wrong += 1
                print(f"  {name}: {' '.join(map(str, args[:1]))} -> {r.returncode}: {lines[-1:]}")
    return runs, tracebacks, wrong


def _catalogue_app(server: Server, run_id: str) -> tuple[int, int, dict[int, int]]:
    """Malformed requests; returns (requests, 500 answers, answers by status)."""
    deep = "[" * 100_000 + "]" * 100_000
    big = '{"x": ' + "9" * 5000 + "}"
    requests = [
        ("GET", "/api/design/2026%00x", None),
        ("GET", "/api/design/" + "2" * 5000, None),
        ("GET", "/api/measurement/" + "a" * 5000, None),
        ("GET", f"/api/file/design/{run_id}/manifest.json%00.png", None),
        ("GET", f"/api/file/design/{run_id}/" + "x/" * 3000 + "y", None),
        ("GET", f"/api/file/design/{run_id}/../../roomcorr-room.toml", None),
        ("GET", "/api/decay/design/%00?bands=1", None),
        ("GET", f"/api/decay/design/{run_id}?bands=99999999999", None),
        ("GET", "/api/files/..%00", None),
        ("GET", "/api/compare/%00/x", None),
        ("POST", "/api/report/design/" + "9" * 5000, None),
    ]
    for route in ("/api/preview", "/api/save", "/api/measure/start", "/api/measure/acknowledge"):
        bodies = [deep, big, "[]", "x"]
        if not route.startswith("/api/measure"):  # a valid start would play a sweep: never
            bodies += ['{"max_boost_db": NaN}', '{"measurement": {"a": 1}}']
        for body in bodies:
            requests.append(("POST", route, body))
    for level in ('"nan"', '"x"', "[1]", "true", '"-inf"'):
        requests.append(
            (
                "POST",
                "/api/measure/start",
                json.dumps({"settings": {"level_dbfs": json.loads(level)}}),
            )
        )
    by_status: dict[int, int] = {}
    server.request("POST", "/api/measure/acknowledge", '{"acknowledged": true}')
    for method, path, body in requests:
        status = server.request(method, path, body)
        by_status[status] = by_status.get(status, 0) + 1
    server.request("POST", "/api/measure/stop", "{}")
    return len(requests), by_status.get(500, 0), by_status


def _oversized(server: Server) -> list[tuple[str, int, float]]:
    """Send oversized bodies; returns (what, status, server peak RSS in MB) per request."""
    out = []
    for what, declared, streamed, chunked in (
        ("300 MB declared", 300 << 20, 16 << 20, False),
        ("64 MB chunked", 0, 64 << 20, True),
    ):
        s = socket.create_connection(("127.0.0.1", server.port), timeout=60)
        head = (
            f"POST /api/preview HTTP/1.1\r\nHost: 127.0.0.1:{server.port}\r\n"
            f"x-roomcorr-token: {server.token}\r\nContent-Type: application/json\r\n"
        )
        head += (
            "Transfer-Encoding: chunked\r\n\r\n"
            if chunked
            else f"Content-Length: {declared}\r\n\r\n"
        )
        s.sendall(head.encode())
        block = b"[" * (1 << 20)
        sent = 0
        try:
            while sent < streamed:
                s.sendall(b"%x\r\n" % len(block) + block + b"\r\n" if chunked else block)
                sent += len(block)
        except OSError:
            pass
        try:
            status = int(s.recv(100).decode("latin-1").split()[1])
        except (OSError, IndexError, ValueError):
            status = 0
        s.close()
        out.append((what, status, server.rss_mb()[1]))
    return out


def main(kills: int = 100, seed: int = 22) -> None:
    rng = random.Random(seed)
    started = time.time()
    with tempfile.TemporaryDirectory(prefix="roomcorr-trust-") as tmp:
        root = Path(tmp)
        (root / "outside").mkdir()
        (root / "outside" / "victim.txt").write_text("not roomcorr's\n")
        (root / "irs").mkdir()
        for p in sorted(DEMO.glob("*.wav")):
            shutil.copy(p, root / "irs" / p.name)
        for args in (
            ["init", root / "room"],
            ["design", root / "irs", "--out", root / "d", "--rates", "48000"],
        ):
            subprocess.run(_cmd(*args), env=ENV, check=True, capture_output=True)
        sys.path.insert(0, str(REPO))
        from roomcorr import rooms

        rooms.add_measurement(rooms.open_room(root / "room"), [root / "irs"])
        subprocess.run(
            _cmd("design", "--room", root / "room", "--rates", "48000"),
            env=ENV,
            check=True,
            capture_output=True,
        )
        skip = [root / "room", root / "d"]
        outside = _snapshot(root, skip)
        actions = [
            "design",
            "design-replace",
            "report",
            "report-dot",
            "app-save",
            "app-report",
            "both",
        ]
        counts = {a: 0 for a in actions}
        tracebacks = mixed = escaped = cut = 0
        # How long each writer takes here (one run to the end); kills are then spread
        # over that time, the last part (where the files are written) included.
        took = {}
        for action in actions:
            t0 = time.time()
            _, errs = _kill_round(rng, action, root, 600.0)
            took[action] = time.time() - t0
            tracebacks += sum("Traceback" in e or "HTTP 500" in e for e in errs)
        print("duration to the end: " + ", ".join(f"{a} {t:.1f} s" for a, t in took.items()))
        for i in range(kills):
            action = actions[i % len(actions)] if i < len(actions) else rng.choice(actions)
            counts[action] += 1
            ended, errs = _kill_round(rng, action, root, rng.uniform(0.15, 0.95) * took[action])
            cut += ended == "cut"
            tb = sum("Traceback" in e or "HTTP 500" in e for e in errs)
            bad = _mixed(root)
            out_changed = _snapshot(root, skip) != outside
            tracebacks += tb
            mixed += bool(bad)
            escaped += out_changed
            note = "" if not (tb or bad or out_changed) else f"  !! {bad[:1]} {errs if tb else ''}"
            print(f"round {i + 1:3d} {action:14s} {ended:4s}{note}", flush=True)
        # catalogue of malformed files and requests, on a pristine copy
        shutil.copytree(root, root.parent / (root.name + "-p"), symlinks=True)
        pristine = root / "pristine"
        shutil.move(str(root.parent / (root.name + "-p")), pristine)
        for sub in list(pristine.iterdir()):
            if sub.name not in ("room", "d", "irs"):
                shutil.rmtree(sub) if sub.is_dir() else sub.unlink()
        # the record of a plain measurement folder (for its cases)
        (pristine / "irs" / "measurement.json").write_text('{"positions": []}')
        cli_runs, cli_tb, cli_wrong = _catalogue_cli(root)
        server = Server(root / "room")
        n_req, n500, by_status = _catalogue_app(server, _latest_design(root / "room"))
        rss0, hwm0 = server.rss_mb()
        big = _oversized(server)
        rss1, hwm1 = server.rss_mb()
        err = server.stop()
        tracebacks += "Traceback" in err
        escaped += (
            _snapshot(
                root, [*skip, root / "pristine", *root.glob("case-*"), *root.glob("irs-report")]
            )
            != outside
        )
        print()
        print(
            f"kills: {kills} rounds ({cut} cut short): "
            + ", ".join(f"{a} {n}" for a, n in counts.items())
        )
        print(f"tracebacks (rounds, app server): {tracebacks}")
        print(f"reads/writes outside the room and the output folder: {escaped}")
        print(f"mixed folders after a round: {mixed}")
        print(
            f"fault catalogue (CLI): {cli_runs} commands, {cli_tb} tracebacks, "
            f"{cli_wrong} not one line"
        )
        print(
            f"fault catalogue (app): {n_req} requests, {n500} answered 500; by status {by_status}"
        )
        for what, status, peak in big:
            print(f"oversized body {what}: answer {status}, server peak RSS {peak:.0f} MB")
        print(
            f"server RSS before/after oversized bodies: {rss0:.0f} / {rss1:.0f} MB "
            f"(peak {hwm0:.0f} / {hwm1:.0f} MB)"
        )
        print(f"soak time {time.time() - started:.0f} s")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kills", type=int, default=100, help="kill rounds (default 100)")
    ap.add_argument("--seed", type=int, default=22)
    a = ap.parse_args()
    main(a.kills, a.seed)
