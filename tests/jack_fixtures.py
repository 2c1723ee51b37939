"""Pytest fixtures for tests through a real JACK server (dummy backend, no sound card).

``jack_server`` starts ``jackd --no-realtime -d dummy -r 48000 -p 1024`` unless a
server already runs, and stops it afterwards. The server is named after the
environment variable ``JACK_DEFAULT_SERVER`` when it is set (``jackd -n NAME``), so
test runs of several checkouts on one machine do not share a server; libjack,
PortAudio and jack_lsp all honour the same variable. Without jackd, the JACK-Client
package or PortAudio's JACK host API the tests are skipped, except when the
environment variable ``CI=true``: there a missing audio path is an error.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
FS = 48000


def _missing(reason: str):
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"JACK audio path required in CI: {reason}")
    pytest.skip(reason)


def _server_running() -> bool:
    if shutil.which("jack_lsp") is None:
        return False
    r = subprocess.run(["jack_lsp"], capture_output=True, text=True, timeout=10)
    return r.returncode == 0 and "system:" in r.stdout


@pytest.fixture(scope="session")
def jack_server(tmp_path_factory):
    """A running JACK server at 48 kHz (started here if none runs)."""
    try:
        import jack  # noqa: F401
    except (ImportError, OSError) as exc:
        _missing(f"JACK-Client package unusable: {exc}")
    proc = None
    if not _server_running():
        if shutil.which("jackd") is None:
            _missing("jackd not installed (Debian package jackd2)")
        log = open(tmp_path_factory.mktemp("jackd") / "jackd.log", "wb")  # noqa: SIM115
        name = os.environ.get("JACK_DEFAULT_SERVER")
        proc = subprocess.Popen(
            [
                "jackd",
                *(["-n", name] if name else []),
                "--no-realtime",
                "-d",
                "dummy",
                "-r",
                str(FS),
                "-p",
                "1024",
            ],
            stdout=log,
            stderr=subprocess.STDOUT,
        )
        for _ in range(100):
            if _server_running():
                break
            if proc.poll() is not None:
                _missing(f"jackd exited with status {proc.returncode}")
            time.sleep(0.1)
        else:
            proc.terminate()
            _missing("jackd did not start within 10 s")
    try:
        from roomcorr.measure.capture import rescan_devices

        rescan_devices()
        import sounddevice as sd

        if not any("JACK" in a["name"] for a in sd.query_hostapis()):
            _missing("PortAudio was built without the JACK host API")
    except Exception as exc:  # DeviceError or PortAudio trouble
        if proc is not None:
            proc.terminate()
        _missing(f"PortAudio unusable: {exc}")
    yield
    if proc is not None:
        # close PortAudio's JACK client while the server still runs (PortAudio asserts
        # and aborts the interpreter at exit if the server vanished first)
        import sounddevice as sd

        while sd._initialized > 0:
            sd._terminate()
        proc.terminate()
        proc.wait(timeout=10)
        log.close()


class Room:
    """A running ``tests/jack_room.py`` process; its name is the PortAudio device."""

    def __init__(self, name: str, config: dict, tmp: Path):
        cfg = dict(config, name=name)
        path = tmp / f"{name}.json"
        path.write_text(json.dumps(cfg))
        self.name = name
        self.proc = subprocess.Popen(
            [sys.executable, str(HERE / "jack_room.py"), str(path)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )
        line = self.proc.stdout.readline()
        if line.strip() != "READY":
            self.close()
            raise RuntimeError(f"room client {name} did not start: {line!r}")
        from roomcorr.measure.capture import rescan_devices

        rescan_devices()

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.stdin.close()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.terminate()
                self.proc.wait(timeout=10)


@pytest.fixture
def make_room(jack_server, tmp_path):
    """Factory ``make_room(name, config) -> Room``; rooms are stopped after the test."""
    rooms: list[Room] = []

    def factory(name: str, config: dict) -> Room:
        room = Room(name, config, tmp_path)
        rooms.append(room)
        return room

    yield factory
    for r in rooms:
        r.close()


#: Short sweeps and windows for the command-line measurement tests (a settings file).
QUICK_TOML = "[measure]\nnoise_s = 0.2\ntail_s = 0.32\ntest_s = 0.2\nir_s = 0.2\n"


def roomcorr_cmd(
    *args: str, cwd=None, stdin: str | None = None, timeout: float = 240.0
) -> subprocess.CompletedProcess:
    """``roomcorr ARGS`` as a user runs it (a subprocess of this Python), output captured."""
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=cwd,
        input=stdin,
    )


def run_measure(args: list[str], timeout: float = 180.0) -> subprocess.CompletedProcess:
    """``roomcorr measure ARGS`` in a subprocess, retried (at most twice) only when the
    dummy JACK driver dropped buffers on a loaded machine; the buffer gate itself is
    never loosened."""
    for attempt in range(3):
        r = subprocess.run(
            [sys.executable, "-m", "roomcorr", "measure", *args],
            capture_output=True,
            text=True,
            timeout=timeout,
        )
        if r.returncode == 0 or "buffers dropped" not in r.stderr or attempt == 2:
            return r
    raise AssertionError("unreachable")  # pragma: no cover
