"""A headless PipeWire daemon for the tests (Debian's pipewire 0.3.65 package), no session manager.

The daemon runs with its own runtime folder (``XDG_RUNTIME_DIR`` in a temporary
folder), a null sink that drives the graph, and the configuration under test as
a drop-in (``<config>.d/``). Without a session manager nothing configures the
streams' ports or links them, so :class:`HeadlessPipeWire` does what one would:
``pw-cli set-param <node> PortConfig`` (DSP ports, float, the channel positions)
and ``pw-link``. Two things were needed to get there, found by trying: the
``libpipewire-module-access`` module (without it the clients connect but see
no objects), and the port configuration (without it the streams have no ports).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

TOOLS = ("pipewire", "pw-cli", "pw-link", "pw-dump", "pw-play", "pw-record")

DAEMON_CONF = """
context.properties = {{
    core.daemon = true
    core.name = pipewire-0
    default.clock.rate = {rate}
    default.clock.allowed-rates = [ {rate} ]
    default.clock.quantum = 1024
    default.clock.min-quantum = 1024
    support.dbus = false
}}
context.spa-libs = {{
    audio.convert.* = audioconvert/libspa-audioconvert
    support.* = support/libspa-support
}}
context.modules = [
    {{ name = libpipewire-module-protocol-native }}
    {{ name = libpipewire-module-metadata }}
    {{ name = libpipewire-module-spa-node-factory }}
    {{ name = libpipewire-module-client-node }}
    {{ name = libpipewire-module-access args = {{ }} }}
    {{ name = libpipewire-module-adapter }}
    {{ name = libpipewire-module-link-factory }}
]
context.objects = [
    {{ factory = adapter
        args = {{
            factory.name = support.null-audio-sink
            node.name = "test_sink"
            media.class = "Audio/Sink"
            audio.rate = {rate}
            audio.channels = {channels}
            audio.position = [ {positions} ]
            node.driver = true
            adapter.auto-port-config = {{
                mode = dsp monitor = true control = false position = preserve
            }}
        }}
    }}
]
"""


def available() -> bool:
    return all(shutil.which(t) for t in TOOLS)


class HeadlessPipeWire:
    """Start a daemon with ``drop_in`` (a filter-chain configuration); stop it on exit."""

    def __init__(self, folder: Path, drop_in: str, rate: int, positions: list[str]) -> None:
        self.folder = folder
        self.rate = rate
        self.positions = positions
        run = folder / "run"
        run.mkdir(mode=0o700, parents=True)
        (folder / "daemon.conf.d").mkdir()
        (folder / "daemon.conf.d" / "roomcorr.conf").write_text(drop_in)
        (folder / "daemon.conf").write_text(
            DAEMON_CONF.format(rate=rate, channels=len(positions), positions=" ".join(positions))
        )
        self.env = dict(os.environ, XDG_RUNTIME_DIR=str(run), PIPEWIRE_RUNTIME_DIR=str(run))
        self.env.pop("PIPEWIRE_CONFIG_DIR", None)
        # the daemon alone reads its configuration (and drop-ins) from the folder; the
        # clients keep the installed client.conf
        self.daemon_env = dict(self.env, PIPEWIRE_CONFIG_DIR=str(folder))
        self.procs: list[subprocess.Popen] = []

    def __enter__(self) -> HeadlessPipeWire:
        self.daemon = self._start(["pipewire", "-c", str(self.folder / "daemon.conf")], "daemon")
        try:
            self.wait_node("test_sink")
        except BaseException:
            self.__exit__()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        for p in reversed(self.procs):
            if p.poll() is None:
                p.send_signal(signal.SIGINT)
                try:
                    p.wait(5)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait(5)

    def _start(self, argv: list[str], tag: str) -> subprocess.Popen:
        log = open(self.folder / f"{tag}.log", "w")  # noqa: SIM115 (kept open for the process)
        env = self.daemon_env if tag == "daemon" else self.env
        p = subprocess.Popen(argv, env=env, stdout=log, stderr=subprocess.STDOUT,
                             stdin=subprocess.DEVNULL)  # fmt: skip
        self.procs.append(p)
        return p

    def run(self, *argv: str) -> str:
        r = subprocess.run(list(argv), env=self.env, capture_output=True, text=True, timeout=10)
        if r.returncode != 0:
            raise RuntimeError(f"{' '.join(argv)}: {r.stderr.strip()}")
        return r.stdout

    def nodes(self) -> dict[str, int]:
        out = json.loads(self.run("pw-dump") or "[]")
        return {
            o["info"]["props"]["node.name"]: o["id"]
            for o in out
            if o.get("type") == "PipeWire:Interface:Node" and "node.name" in o["info"]["props"]
        }

    def wait_node(self, name: str, timeout_s: float = 10.0) -> int:
        t0 = time.monotonic()
        while time.monotonic() - t0 < timeout_s:
            try:
                found = self.nodes()
            except (RuntimeError, json.JSONDecodeError, subprocess.TimeoutExpired):
                found = {}
            if name in found:
                return found[name]
            if self.daemon.poll() is not None:
                raise RuntimeError((self.folder / "daemon.log").read_text())
            time.sleep(0.1)
        raise RuntimeError(f"no PipeWire node {name!r} after {timeout_s} s")

    def dsp_ports(self, name: str, direction: str, positions: list[str]) -> None:
        """Give node ``name`` one float port per channel (what a session manager does)."""
        node = self.wait_node(name)
        fmt = (
            f"{{ direction: {direction}, mode: dsp, format: {{ mediaType: audio, "
            f"mediaSubtype: raw, format: F32P, rate: {self.rate}, channels: {len(positions)}, "
            f"position: [ {', '.join(positions)} ] }} }}"
        )
        self.run("pw-cli", "set-param", str(node), "PortConfig", fmt)

    def link(self, out_port: str, in_port: str, timeout_s: float = 10.0) -> None:
        t0 = time.monotonic()
        while True:
            try:
                self.run("pw-link", out_port, in_port)
                return
            except RuntimeError:
                if time.monotonic() - t0 > timeout_s:
                    raise
                time.sleep(0.1)

    def record(self, path: Path, positions: list[str]) -> subprocess.Popen:
        p = self._start(["pw-record", "-P", "{ node.name = rc_rec }", "--rate", str(self.rate),
                         "--channels", str(len(positions)), "--format", "f32", str(path)],
                        "record")  # fmt: skip
        self.dsp_ports("rc_rec", "Input", positions)
        return p

    def play(self, path: Path, positions: list[str]) -> subprocess.Popen:
        p = self._start(["pw-play", "-P", "{ node.name = rc_play }", "--rate", str(self.rate),
                         "--channels", str(len(positions)), "--format", "f32", str(path)],
                        "play")  # fmt: skip
        self.dsp_ports("rc_play", "Output", positions)
        return p
