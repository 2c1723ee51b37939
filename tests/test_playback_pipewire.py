"""The PipeWire filter-chain configuration, checked by PipeWire itself.

1. ``spa-json-dump`` (PipeWire's own SPA-JSON parser, Debian package pipewire-bin)
   reads the file and gives back the routes, gains, delays and paths we meant.
2. A headless PipeWire daemon (Debian's pipewire 0.3.65) loads it as a drop-in,
   and an impulse pushed through it with pw-play and recorded with pw-record
   from the null sink's monitor equals ``roomcorr apply``'s rendering of the
   same file (after the graph's own latency, found by cross-correlation).
"""

from __future__ import annotations

import json
import shutil
import time

import numpy as np
import pytest
import soundfile as sf
from pipewire_fixtures import HeadlessPipeWire, available
from scipy.signal import correlate
from test_playback_render import system_design  # noqa: F401  (module fixture)

from roomcorr.deliver.pipewire import (
    SINK_NAME,
    check_with_spa_json_dump,
    filter_chain_config,
    write_filter_chain_config,
)
from roomcorr.deliver.plan import load_route_plan
from roomcorr.playback.render import apply_file

FS = 48000


def _config(design, tmp_path):
    plan = load_route_plan(design, FS)
    path = write_filter_chain_config(
        tmp_path / "roomcorr.conf", filter_chain_config(plan, design, {2})
    )
    return plan, path


@pytest.mark.skipif(shutil.which("spa-json-dump") is None, reason="pipewire-bin not installed")
def test_spa_json_dump_reads_the_routes_back(system_design, tmp_path):  # noqa: F811
    plan, path = _config(system_design, tmp_path)
    doc = json.loads(check_with_spa_json_dump(path))
    args = doc["context.modules"][0]["args"]
    assert doc["context.modules"][0]["name"] == "libpipewire-module-filter-chain"
    graph = args["filter.graph"]
    conv = {n["name"]: n for n in graph["nodes"] if n["label"] == "convolver"}
    for o in range(plan.n_outputs):
        c = conv[f"out{o}"]["config"]
        assert c["filename"] == str((system_design / plan.paths[o]).resolve())
        assert c["delay"] == plan.delay_samples[o]
        assert c["gain"] == pytest.approx(plan.trim[o], rel=1e-8)
    mixer = next(n for n in graph["nodes"] if n["label"] == "mixer")
    assert [mixer["control"]["Gain 1"], mixer["control"]["Gain 2"]] == pytest.approx(
        list(plan.mix[2]), rel=1e-8
    )
    assert graph["inputs"] == ["in0:In", "in1:In"]
    assert graph["outputs"] == ["out0:Out", "out1:Out", "out2:Out"]
    assert args["capture.props"]["audio.channels"] == 2
    assert args["playback.props"]["audio.position"] == ["FL", "FR", "LFE"]


@pytest.mark.skipif(not available(), reason="pipewire and pipewire-bin not installed")
def test_an_impulse_through_a_headless_pipewire_equals_apply(system_design, tmp_path):  # noqa: F811
    plan, conf = _config(system_design, tmp_path)
    x = np.zeros((2, 3 * FS), dtype=np.float32)
    x[0, FS // 2] = 0.5  # left input
    x[1, FS] = 0.25  # right input, later
    sf.write(tmp_path / "imp.wav", x.T, FS, subtype="FLOAT")
    apply_file(tmp_path / "imp.wav", system_design, tmp_path / "ref.wav")
    ref, _ = sf.read(tmp_path / "ref.wav", always_2d=True)
    out_pos = ["FL", "FR", "LFE"]
    with HeadlessPipeWire(tmp_path / "pw", conf.read_text(), FS, out_pos) as pw:
        pw.dsp_ports(SINK_NAME, "Input", ["FL", "FR"])
        pw.dsp_ports(SINK_NAME + "_output", "Output", out_pos)
        for p in out_pos:
            pw.link(f"{SINK_NAME}_output:output_{p}", f"test_sink:playback_{p}")
        rec = pw.record(tmp_path / "rec.wav", out_pos)
        for p in out_pos:
            pw.link(f"test_sink:monitor_{p}", f"rc_rec:input_{p}")
        play = pw.play(tmp_path / "imp.wav", ["FL", "FR"])
        for p in ("FL", "FR"):
            pw.link(f"rc_play:output_{p}", f"{SINK_NAME}:playback_{p}")
        play.wait(30)
        time.sleep(1.0)  # the filters' tail (8192 taps) and the graph's buffers
    assert rec.returncode is not None
    y, fs_y = sf.read(tmp_path / "rec.wav", always_2d=True)
    assert fs_y == FS and y.shape[1] == 3
    # the graph delays everything by the same number of samples: find it on the left output
    c = correlate(y[:, 0], ref[:, 0], "full", method="fft")
    lag = int(np.argmax(np.abs(c))) - (ref.shape[0] - 1)
    assert lag >= 0
    seg = y[lag : lag + ref.shape[0]]
    n = seg.shape[0]
    for o in range(3):
        err = np.linalg.norm(seg[:, o] - ref[:n, o]) / np.linalg.norm(ref[:n, o])
        # PipeWire's convolver works in 32-bit float FFTs: -95 to -96 dB measured here
        # (0.3.65), against -145 dB for ffmpeg's afir in double precision; -90 dB required
        print(f"PipeWire output {o}: {20 * np.log10(err):.1f} dB")
        assert 20 * np.log10(err) < -90, f"output {o}: {20 * np.log10(err):.1f} dB"


@pytest.mark.skipif(shutil.which("spa-json-dump") is None, reason="pipewire-bin not installed")
def test_commands_writes_the_configuration_and_says_where_it_goes(system_design, tmp_path):  # noqa: F811
    import subprocess
    import sys

    conf = tmp_path / "roomcorr.conf"
    r = subprocess.run(
        [sys.executable, "-m", "roomcorr", "commands", str(system_design), "--pipewire", str(conf)],
        capture_output=True, text=True,
    )  # fmt: skip
    assert r.returncode == 0, r.stderr
    assert "pipewire.conf.d" in r.stdout and "start playback quietly" in r.stderr
    doc = json.loads(check_with_spa_json_dump(conf))  # PipeWire's own parser
    assert doc["context.modules"][0]["args"]["capture.props"]["node.name"] == SINK_NAME
    bad = subprocess.run(
        [sys.executable, "-m", "roomcorr", "commands", str(system_design), "--pipewire",
         str(tmp_path / "x.txt")], capture_output=True, text=True,
    )  # fmt: skip
    assert bad.returncode == 2 and ".conf" in bad.stderr and not (tmp_path / "x.txt").exists()
