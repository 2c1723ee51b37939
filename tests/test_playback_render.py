"""Rendering through a design's routes: hand-computed routes, scipy's convolution, refusals."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from music_synth import synth_music
from scipy.signal import fftconvolve
from speaker_rooms import Room, seats, simulate

from roomcorr.audio_io import write_wav
from roomcorr.deliver.atomic import sha256_of
from roomcorr.deliver.export import write_design, write_manifest
from roomcorr.deliver.plan import load_route_plan
from roomcorr.pipeline import run_design
from roomcorr.playback.render import LOWERED_PEAK_DBFS, SUBTYPES, BlockConvolver, apply_file
from roomcorr.settings import Settings, design_from_dict

RATES = (44100, 48000)


def _hand_design(folder, fs=48000):
    """Two inputs, two outputs, routes and trims left to the player (``in_filters`` false).

    Output 0 (left): h0 = [1, 0.5], fed by input 0 at 0 dB and input 1 at -6.0206 dB
    (gain 0.5); trim +6.0206 dB (x2), no delay, normal polarity.
    Output 1 (right): h1 = [0.25, 0, -1], fed by input 1 at 0 dB; trim 0 dB, delay 3
    samples, inverted polarity.
    """
    folder.mkdir()
    (folder / "fir" / str(fs)).mkdir(parents=True)
    h = {"left": np.array([1.0, 0.5]), "right": np.array([0.25, 0.0, -1.0])}
    files = []
    for c, (name, taps) in enumerate(h.items()):
        rel = f"fir/{fs}/{name}.wav"
        write_wav(folder / rel, taps.astype(np.float32), fs)
        files.append(
            {"path": rel, "kind": "fir", "channel": c, "channel_name": name,
             "sample_rate": fs, "taps": taps.size, "sha256": sha256_of(folder / rel)}
        )  # fmt: skip
    g6 = 20 * np.log10(2.0)
    routes = [
        {"input": 0, "input_name": "left", "output": 0, "output_name": "left",
         "sample_rate": fs, "path": f"fir/{fs}/left.wav", "gain_db": 0.0},
        {"input": 1, "input_name": "right", "output": 0, "output_name": "left",
         "sample_rate": fs, "path": f"fir/{fs}/left.wav", "gain_db": -g6},
        {"input": 1, "input_name": "right", "output": 1, "output_name": "right",
         "sample_rate": fs, "path": f"fir/{fs}/right.wav", "gain_db": 0.0},
    ]  # fmt: skip
    outputs = [
        {"output": 0, "name": "left", "delay_samples": {str(fs): 0}, "gain_db": g6,
         "polarity": 1, "in_filters": False},
        {"output": 1, "name": "right", "delay_samples": {str(fs): 3}, "gain_db": 0.0,
         "polarity": -1, "in_filters": False},
    ]  # fmt: skip
    write_manifest(
        folder,
        {"format_version": 1, "pre_gain_db": -1.5, "files": files, "routes": routes,
         "outputs": outputs, "latency": {}},
    )  # fmt: skip
    return folder


def test_routes_delays_and_gains_against_a_hand_computed_case(tmp_path):
    design = _hand_design(tmp_path / "d")
    fs = 48000
    x = np.zeros((2, 8))
    x[0, 0] = 0.25  # impulse on the left input at n = 0
    x[1, 2] = 0.25  # impulse on the right input at n = 2 (peaks stay below full scale)
    sf.write(tmp_path / "x.wav", x.T, fs, subtype="DOUBLE")
    apply_file(tmp_path / "x.wav", design, tmp_path / "y.wav", subtype="DOUBLE")
    y, _ = sf.read(tmp_path / "y.wav", always_2d=True)
    # worked by hand (convolution sums, gains multiplied in):
    # left = 2 * h0 * (x0 + 0.5 x1) = 2 * ([1, .5] at 0 + [.5, .25] at 2)
    left = 0.25 * np.array([2.0, 1.0, 1.0, 0.5, 0, 0, 0, 0, 0, 0, 0, 0])
    # right = -1 * delay_3(h1 * x1) = -1 * ([.25, 0, -1] at 2 + 3)
    right = 0.25 * np.array([0, 0, 0, 0, 0, -0.25, 0, 1.0, 0, 0, 0, 0])
    assert y.shape == (8 + 3 + 3 - 1, 2)  # taps 3 plus delay 3, less one
    np.testing.assert_allclose(y[:12, 0], left, atol=1e-15)
    np.testing.assert_allclose(y[:12, 1], right, atol=1e-15)
    assert np.abs(y[12:]).max() < 1e-15


def test_block_convolver_equals_fftconvolve():
    rng = np.random.default_rng(11)
    h = rng.standard_normal((3, 1000))
    mix = rng.standard_normal((3, 2))
    x = rng.standard_normal((2, 5 * 256 + 77))
    conv = BlockConvolver(h, mix, 256)
    n_blocks = -(-(x.shape[1] + 999) // 256)
    xp = np.zeros((2, n_blocks * 256))
    xp[:, : x.shape[1]] = x
    y = np.concatenate([conv.process(xp[:, k * 256 : (k + 1) * 256]) for k in range(n_blocks)], 1)
    for o in range(3):
        ref = fftconvolve(mix[o] @ x, h[o])  # scipy.signal, the reference
        err = np.linalg.norm(y[o, : ref.size] - ref) / np.linalg.norm(ref)
        assert 20 * np.log10(err) < -250


@pytest.fixture(scope="module")
def system_design(tmp_path_factory):
    """Left, right and subwoofer with trims left to the player (delays and gains to apply)."""
    room = Room(
        speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0), (4.9, 0.3, 0.3)],
        kinds=["main", "main", "sub"],
        gains_db=[0.0, -1.0, 2.0],
        mics_m=seats((3.1, 2.05, 1.1), 3),
    )
    irs = simulate(room, length_s=0.4)
    settings = Settings(
        design=design_from_dict(
            {"channel_names": ["left", "right", "sub"], "subwoofer": "sub",
             "sample_rates": list(RATES), "taps": 8192, "formats": ["wav", "txt"],
             "align": False}
        )
    )  # fmt: skip
    out = tmp_path_factory.mktemp("play") / "design"
    write_design(run_design(irs, 48000, settings), out)
    return out


def _reference(x: np.ndarray, design, fs: int) -> np.ndarray:
    """scipy.signal.fftconvolve through the routes, straight from the manifest and the WAVs."""
    man = json.loads((design / "manifest.json").read_text())
    routes = [r for r in man["routes"] if r["sample_rate"] == fs]
    outs = {o["output"]: o for o in man.get("outputs", [])}
    n_out = 1 + max(r["output"] for r in routes)
    parts = []
    for o in range(n_out):
        mine = [r for r in routes if r["output"] == o]
        h, _ = sf.read(design / mine[0]["path"], dtype="float64")
        m = sum(10 ** (r["gain_db"] / 20) * x[r["input"]] for r in mine)
        y = fftconvolve(m, h)
        t = outs.get(o, {"in_filters": True})
        if not t["in_filters"]:
            y = np.concatenate([np.zeros(t["delay_samples"][str(fs)]), y])
            y *= t["polarity"] * 10 ** (t["gain_db"] / 20)
        parts.append(y)
    n = max(p.size for p in parts)
    return np.array([np.pad(p, (0, n - p.size)) for p in parts])


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("subtype", SUBTYPES)
def test_apply_equals_fftconvolve_through_the_routes(system_design, tmp_path, fs, subtype):
    x = synth_music(fs, 2.0, rms_dbfs=-24.0)
    sf.write(tmp_path / "music.wav", x.T, fs, subtype="FLOAT")
    x, _ = sf.read(tmp_path / "music.wav", always_2d=True)
    res = apply_file(tmp_path / "music.wav", system_design, tmp_path / "out.wav", subtype=subtype)
    assert res.lowered_db == 0.0
    y, fs_y = sf.read(tmp_path / "out.wav", always_2d=True)
    ref = _reference(x.T, system_design, fs)
    assert fs_y == fs and y.shape == ref.T.shape
    if subtype == "PCM_24":
        # the same rounding libsndfile applies, to the reference (so only rendering differs)
        sf.write(tmp_path / "ref.wav", ref.T, fs, subtype="PCM_24")
        ref = sf.read(tmp_path / "ref.wav", always_2d=True)[0].T
    for o in range(ref.shape[0]):
        err = np.linalg.norm(y[:, o] - ref[o]) / np.linalg.norm(ref[o])
        err_db = 20 * np.log10(max(err, 1e-300))
        assert err_db < -120, f"output {o}: {err_db:.1f} dB"  # the figure
    assert res.peak_dbfs == pytest.approx(20 * np.log10(np.abs(ref).max()), abs=0.01)


def test_apply_lowers_a_result_that_would_clip_and_says_by_how_much(tmp_path):
    design = _hand_design(tmp_path / "d")  # left output: 2 * h0 * (x0 + 0.5 x1), gain up to 3
    fs = 48000
    x = 0.9 * synth_music(fs, 1.0, rms_dbfs=-6.0)
    x = 0.9 * x / np.abs(x).max()
    sf.write(tmp_path / "hot.wav", x.T, fs, subtype="FLOAT")
    x, _ = sf.read(tmp_path / "hot.wav", always_2d=True)
    ref_peak = np.abs(_reference(x.T, design, fs)).max()
    assert ref_peak > 1.0
    res = apply_file(tmp_path / "hot.wav", design, tmp_path / "out.wav")
    y, _ = sf.read(tmp_path / "out.wav")
    assert np.abs(y).max() == pytest.approx(10 ** (LOWERED_PEAK_DBFS / 20), rel=1e-6)
    assert res.lowered_db == pytest.approx(20 * np.log10(ref_peak) - LOWERED_PEAK_DBFS, abs=1e-6)
    r = _cli("apply", str(tmp_path / "hot.wav"), "--design", str(design),
             "--out", str(tmp_path / "no.wav"), "--no-lower")  # fmt: skip
    assert r.returncode == 2 and "clip" in r.stderr and not (tmp_path / "no.wav").exists()
    r = _cli("apply", str(tmp_path / "hot.wav"), "--design", str(design),
             "--out", str(tmp_path / "low.wav"))  # fmt: skip
    assert r.returncode == 0 and f"LOWERED by {res.lowered_db:.2f} dB" in r.stdout


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "roomcorr", *args], capture_output=True, text=True)


def test_apply_cli_prints_the_peak(system_design, tmp_path):
    x = synth_music(44100, 1.0)
    sf.write(tmp_path / "m.wav", x.T, 44100, subtype="FLOAT")
    r = _cli("apply", str(tmp_path / "m.wav"), "--design", str(system_design),
             "--out", str(tmp_path / "o.wav"))  # fmt: skip
    assert r.returncode == 0, r.stderr
    assert "Output peak (sample):" in r.stdout and "dBFS" in r.stdout
    assert "start playback quietly" in r.stderr


@pytest.mark.parametrize("case", ["rate", "unreadable", "same", "channels"])
def test_apply_refusals_are_one_line_exit_2_nothing_written(system_design, tmp_path, case):
    good = tmp_path / "m.wav"
    sf.write(good, synth_music(48000, 0.5).T, 48000, subtype="FLOAT")
    out = tmp_path / "o.wav"
    if case == "rate":
        src, words = tmp_path / "m96.wav", "no filters for 96000 Hz"
        sf.write(src, synth_music(96000, 0.5).T, 96000, subtype="FLOAT")
    elif case == "unreadable":
        src, words = tmp_path / "bad.wav", "not a readable audio file"
        src.write_bytes(b"RIFF....WAVEjunk")
    elif case == "same":
        src, out, words = good, good, "is the input file"
    else:
        src, words = tmp_path / "mono.wav", "1 channel(s), but the design has 2 input(s)"
        sf.write(src, synth_music(48000, 0.5)[0], 48000, subtype="FLOAT")
    before = sorted(p.name for p in tmp_path.iterdir())
    size = good.stat().st_size
    r = _cli("apply", str(src), "--design", str(system_design), "--out", str(out))
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in r.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written
    assert good.stat().st_size == size


def test_route_plan_matches_the_manifest(system_design):
    plan = load_route_plan(system_design, 48000)
    man = json.loads((system_design / "manifest.json").read_text())
    sub = next(o for o in man["outputs"] if o["role"] == "sub")
    assert plan.output_names == ["left", "right", "sub"]
    assert plan.delay_samples[2] == sub["delay_samples"]["48000"] > 0
    # the subwoofer gets each main at 1 / n_mains (routes.py)
    np.testing.assert_allclose(plan.mix[2], [0.5, 0.5], rtol=1e-3)
