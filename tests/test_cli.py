"""End-to-end command-line tests, run as a user would (subprocess)."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from conftest import REPO

from roomcorr.design.realise.fir import peak_gain_db, worst_case_gain_db


def run(*args: str, cwd=None) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=env,
        timeout=300,
    )


def test_help_lists_commands():
    r = run("--help")
    assert r.returncode == 0
    for name in ("demo", "design"):
        assert name in r.stdout


def test_demo_runs_and_prints_summary(tmp_path):
    r = run("demo", "--out", str(tmp_path / "d"), cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "left" in out and "right" in out
    assert "peak gain" in out and "worst-case gain" in out and "largest cut" in out
    assert "Caution" in r.stderr  # the cautions, once per run
    assert r.stderr.count("Caution") == 1
    assert (tmp_path / "d" / "manifest.json").is_file()
    # The main job ends with the report, and says where it is.
    assert "report.html" in out and (tmp_path / "d" / "report.html").is_file()
    # Run again: the demo refreshes its own output instead of failing.
    assert run("demo", "--out", str(tmp_path / "d"), cwd=tmp_path).returncode == 0


def test_design_writes_manifest_and_float_wavs(tmp_path):
    out = tmp_path / "o"
    r = run(
        "design",
        str(REPO / "measurements_demo"),
        "--out",
        str(out),
        "--rates",
        "44100,48000,96000,192000",
        "--target",
        "gentle-tilt",
    )
    assert r.returncode == 0, r.stderr
    m = json.loads((out / "manifest.json").read_text())
    firs = [e for e in m["files"] if e["kind"] == "fir"]
    assert len(firs) == 8
    assert m["settings"]["design"]["target"] == "gentle-tilt"
    for e in firs:
        info = sf.info(str(out / e["path"]))
        assert info.subtype == "FLOAT" and info.samplerate == e["sample_rate"]
        h, fs = sf.read(str(out / e["path"]))
        assert len(h) == e["taps"]
        assert e["peak_gain_db"] <= 0.0 + 1e-3
        # The manifest's figures agree with the file itself (float32 rounding).
        assert abs(peak_gain_db(h, fs) - e["peak_gain_db"]) < 0.01
        assert abs(worst_case_gain_db(h) - e["worst_case_gain_db"]) < 0.01
        assert e["max_boost_db"] <= 4.0 + 0.3
        assert {"channel", "channel_name", "sha256"} <= set(e)
    # Never silently overwritten.
    again = run("design", str(REPO / "measurements_demo"), "--out", str(out))
    assert again.returncode == 2 and "--replace" in again.stderr


def test_settings_file_and_options(tmp_path):
    s = tmp_path / "s.toml"
    s.write_text("settings_version = 1\n[design]\nmax_boost_db = 2.0\nsample_rates = [48000]\n")
    out = tmp_path / "o"
    r = run(
        "design",
        str(REPO / "measurements_demo"),
        "--out",
        str(out),
        "--settings",
        str(s),
        "--max-cut",
        "6",
    )
    assert r.returncode == 0, r.stderr
    m = json.loads((out / "manifest.json").read_text())
    assert m["settings"]["design"]["max_boost_db"] == 2.0
    assert m["settings"]["design"]["max_cut_db"] == 6.0
    assert all(e["max_boost_db"] <= 2.3 for e in m["files"] if e["kind"] == "fir")


def _wav(path, data, fs=48000):
    sf.write(str(path), np.asarray(data).T, fs, subtype="FLOAT")
    return str(path)


def _good(n=24000):
    x = np.zeros((2, n))
    x[:, 200] = 0.5
    m = min(n, 2000)
    x[:, 201:m] = 1e-3 * np.random.default_rng(0).standard_normal((2, m - 201))
    return x


BAD_CASES = {
    "missing": (lambda d: [str(d / "nope.wav")], [], "not found"),
    "not-audio": (
        lambda d: [(d / "t.wav").write_text("x") and str(d / "t.wav")],
        [],
        "not a readable",
    ),
    "nan": (
        lambda d: [_wav(d / "n.wav", np.where(np.arange(24000) == 9, np.nan, _good()))],
        [],
        "NaN",
    ),
    "silent": (lambda d: [_wav(d / "s.wav", np.zeros((2, 24000)))], [], "silent"),
    "clipped": (
        lambda d: [
            _wav(
                d / "c.wav",
                np.concatenate([_good()[:, :300], np.ones((2, 8)), _good()[:, 308:]], axis=1),
            )
        ],
        [],
        "clipped",
    ),
    "short": (lambda d: [_wav(d / "x.wav", _good(1000))], [], "ms long"),
    "rates": (
        lambda d: [_wav(d / "a.wav", _good()), _wav(d / "b.wav", _good(), 44100)],
        [],
        "sample rate",
    ),
    "channels": (
        lambda d: [_wav(d / "a.wav", _good()), _wav(d / "b.wav", _good()[:1])],
        [],
        "channels",
    ),
    "boost": (lambda d: [_wav(d / "a.wav", _good())], ["--max-boost", "30"], "max_boost_db"),
    "gain": (lambda d: [_wav(d / "a.wav", _good())], ["--ceiling", "3"], "allow_gain"),
    "rate": (lambda d: [_wav(d / "a.wav", _good())], ["--rates", "22050"], "22050"),
    "target": (lambda d: [_wav(d / "a.wav", _good())], ["--target", "nosuch"], "nosuch"),
    "calibration": (
        lambda d: [_wav(d / "a.wav", _good())],
        ["--calibration", "/nonexistent/cal.txt"],
        "cal.txt",
    ),
    "weights": (lambda d: [_wav(d / "a.wav", _good())], ["--weights", "1,2"], "position_weights"),
    "option": (lambda d: [_wav(d / "a.wav", _good())], ["--frobnicate"], "unrecognized"),
}


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_bad_input_catalogue(tmp_path, case):
    make, extra, msg = BAD_CASES[case]
    files = make(tmp_path)
    out = tmp_path / "out"
    r = run("design", *files, "--out", str(out), *extra)
    assert r.returncode == 2, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.startswith("roomcorr: error")]
    assert len(lines) == 1 and msg in lines[0], r.stderr
    assert "Traceback" not in r.stderr
    assert not out.exists() or not any(out.rglob("*"))


def test_allow_gain_warns(tmp_path):
    files = _wav(tmp_path / "a.wav", _good())
    r = run(
        "design",
        files,
        "--out",
        str(tmp_path / "o"),
        "--ceiling",
        "2",
        "--allow-gain",
        "--rates",
        "48000",
    )
    assert r.returncode == 0, r.stderr
    assert "WARNING" in r.stderr


def test_design_with_biquads(tmp_path):
    out = tmp_path / "o"
    r = run(
        "design",
        str(REPO / "measurements_demo"),
        "--out",
        str(out),
        "--iir",
        "--iir-sections",
        "6",
        "--rates",
        "48000",
    )
    assert r.returncode == 0, r.stderr
    assert "biquads at 48000 Hz" in r.stdout
    m = json.loads((out / "manifest.json").read_text())
    iir = [e for e in m["files"] if e["kind"] == "iir"]
    assert {e["format"] for e in iir} >= {"json", "csv"}
    for e in iir:
        assert e["sections"] <= 6
        assert e["peak_gain_db"] <= 1e-3  # the cascade with its pre-gain stage
        assert e["max_boost_db"] <= 4.0 + 0.3
        assert (out / e["path"]).is_file()
