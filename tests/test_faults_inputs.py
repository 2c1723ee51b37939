"""Fault suite, inputs: every class of bad number, file and signal, run as a user would.

Each CLI case runs ``python -m roomcorr design`` in a subprocess and must end
with exit status 2, exactly one line on standard error (no cautions before
it, no traceback) and no output files.
"""

from __future__ import annotations

import json
import os
import subprocess
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import REPO, synthetic_ir
from test_cli import run  # python -m roomcorr in a subprocess, with a timeout (a hang fails)

from roomcorr.analysis.plausibility import implausible_responses, impulse_response_problems
from roomcorr.audio_io import read_curve_file
from roomcorr.errors import InputFileError

FS = 48000


def _wav(path: Path, data: np.ndarray, fs: int = FS) -> str:
    sf.write(str(path), np.atleast_2d(data).T, fs, subtype="FLOAT")
    return str(path)


def _room_like(n: int = 24000) -> np.ndarray:
    """Two channels of a small invented room (conftest's model), peak 0.5."""
    return 0.5 * np.stack([synthetic_ir(FS, n, seed=s) for s in (3, 4)])


def _good(d: Path) -> list[str]:
    return [_wav(d / "pos1.wav", _room_like())]


def _text(d: Path, name: str, text: str) -> str:
    p = d / name
    p.write_bytes(text.encode("utf-8"))
    return str(p)


def _fifo(d: Path, name: str = "pipe") -> str:
    p = d / name
    os.mkfifo(p)
    return str(p)


def _outside_target(d: Path) -> str:
    """A TOML with a [target] table outside the presets, named relative to the presets folder.

    Today's main joined any --target text to the presets folder, so this name
    reached the file; it is not a path that exists relative to the working
    folder, so now it is simply not found.
    """
    (d / "elsewhere").mkdir()
    (d / "elsewhere" / "evil.toml").write_text("[target]\ntilt_db_per_octave = 3.0\n")
    return os.path.relpath(d / "elsewhere" / "evil", REPO / "presets")


def _settings(d: Path, body: str) -> str:
    return _text(d, "s.toml", "settings_version = 1\n[design]\n" + body)


# (files maker, extra options maker, expected text in the one error line)
CASES = {
    # numbers on the command line
    "ceiling-nan": (_good, lambda d: ["--ceiling", "nan"], "not a finite number"),
    "ceiling-inf": (_good, lambda d: ["--ceiling", "inf", "--allow-gain"], "not a finite"),
    "ceiling-nan-allow-gain": (
        _good,
        lambda d: ["--ceiling", "nan", "--allow-gain"],
        "not a finite number",
    ),
    "rates-inf": (_good, lambda d: ["--rates", "inf"], "not a finite number"),
    "rates-fraction": (_good, lambda d: ["--rates", "48000.5"], "whole number"),
    "weights-nan": (_good, lambda d: ["--weights", "nan,1"], "not a finite number"),
    "weights-huge": (_good, lambda d: ["--weights", "1e308,1e308"], "out of range"),
    "weights-large": (_good, lambda d: ["--weights", "1e9"], "position_weights"),
    "max-boost-nan": (_good, lambda d: ["--max-boost", "nan"], "not a finite number"),
    "band-lo-inf": (_good, lambda d: ["--band-lo", "inf"], "not a finite number"),
    "taps-overflow": (_good, lambda d: ["--taps", "1e400"], "not a finite number"),
    "taps-underscore": (_good, lambda d: ["--taps", "4_096"], "expected a number"),
    # numbers in a settings file
    "settings-ceiling-nan": (
        _good,
        lambda d: ["--settings", _settings(d, "ceiling_db = nan\n")],
        "ceiling_db",
    ),
    "settings-ceiling-nan-allow": (
        _good,
        lambda d: ["--settings", _settings(d, "ceiling_db = nan\nallow_gain = true\n")],
        "ceiling_db",
    ),
    "settings-weights-nan": (
        _good,
        lambda d: ["--settings", _settings(d, "position_weights = [nan]\n")],
        "position_weights",
    ),
    "settings-boost-inf": (
        _good,
        lambda d: ["--settings", _settings(d, "max_boost_db = inf\n")],
        "max_boost_db",
    ),
    "settings-q-nan": (
        _good,
        lambda d: ["--settings", _settings(d, "iir_q_range = [0.3, nan]\n")],
        "iir_q_range",
    ),
    # numbers in a WAV header
    "wav-rate": (
        lambda d: [_wav(d / "slow.wav", _room_like(2000), fs=1000)],
        lambda d: [],
        "sample rate",
    ),
    # numbers in curve files
    "calibration-nan": (
        _good,
        lambda d: ["--calibration", _text(d, "c.txt", "20 0\nnan 3\n20000 0\n")],
        "line 2",
    ),
    "calibration-inf": (
        _good,
        lambda d: ["--calibration", _text(d, "c.txt", "20 0\n1000 inf\n20000 0\n")],
        "not a finite number",
    ),
    "calibration-ambiguous": (
        _good,
        lambda d: ["--calibration", _text(d, "c.txt", "20,0,-1,2\n1000,0,0,0\n")],
        "ambiguous",
    ),
    "calibration-thousands": (
        _good,
        lambda d: ["--calibration", _text(d, "c.txt", "20;1,5\n1.000;0,5\n")],
        "line 2",
    ),
    "target-nan": (_good, lambda d: ["--target", _text(d, "t.txt", "20 0\n1000 -nan\n")], "line 2"),
    # files that are not regular files
    "fifo-calibration": (_good, lambda d: ["--calibration", _fifo(d)], "not a regular file"),
    "fifo-settings": (_good, lambda d: ["--settings", _fifo(d)], "not a regular file"),
    "fifo-target": (_good, lambda d: ["--target", _fifo(d)], "not a regular file"),
    "fifo-ir": (lambda d: [_fifo(d, "pos1.wav")], lambda d: [], "not a regular file"),
    "folder-calibration": (_good, lambda d: ["--calibration", str(d)], "is a folder"),
    # a preset name is a plain name inside the presets folder
    "target-outside-presets": (_good, lambda d: ["--target", _outside_target(d)], "not found"),
    "target-pyproject": (_good, lambda d: ["--target", "../pyproject"], "not found"),
    # not impulse responses
    "not-ir-dc": (
        lambda d: [_wav(d / "dc.wav", np.full((2, 24000), 0.3))],
        lambda d: [],
        "does not look like an impulse response",
    ),
    "not-ir-noise": (
        lambda d: [_wav(d / "n.wav", 0.1 * np.random.default_rng(1).standard_normal((2, 24000)))],
        lambda d: [],
        "above the noise",
    ),
    "not-ir-sine": (
        lambda d: [
            _wav(
                d / "s.wav", np.tile(0.3 * np.sin(2 * np.pi * 997 * np.arange(24000) / FS), (2, 1))
            )
        ],
        lambda d: [],
        "above the noise",
    ),
    "not-ir-reversed": (
        lambda d: [
            _wav(d / "r.wav", np.concatenate([_room_like()[:, ::-1], np.zeros((2, 12000))], axis=1))
        ],
        lambda d: [],
        "time-reversed",
    ),
    "not-ir-arrival-at-end": (
        lambda d: [
            _wav(d / "e.wav", np.concatenate([np.zeros((2, 23900)), _room_like()[:, :100]], axis=1))
        ],
        lambda d: [],
        "very end",
    ),
}


def _assert_refused(r: subprocess.CompletedProcess, msg: str, out: Path) -> None:
    assert r.returncode == 2, (r.returncode, r.stderr)
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    # one line, nothing else: no cautions before it, no traceback
    assert len(lines) == 1, r.stderr
    assert "error" in lines[0] and msg in lines[0], lines[0]
    assert "Traceback" not in r.stderr and "Caution" not in r.stderr
    assert not out.exists() or not any(out.rglob("*"))


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input_is_refused_with_one_line(tmp_path, case):
    make_files, make_opts, msg = CASES[case]
    files = make_files(tmp_path)
    opts = make_opts(tmp_path)
    out = tmp_path / "out"
    r = run("design", *files, "--out", str(out), *opts, cwd=tmp_path)
    _assert_refused(r, msg, out)


def test_room_settings_nan_ceiling_is_refused(tmp_path):
    room = tmp_path / "room"
    assert run("init", str(room)).returncode == 0
    toml = next(room.glob("*.toml"))
    toml.write_text("settings_version = 1\n[design]\nceiling_db = nan\nallow_gain = true\n")
    r = run("design", "--room", str(room), _good(tmp_path)[0])
    assert r.returncode == 2 and "ceiling_db" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not any((room / "designs").glob("*/manifest.json"))


def test_force_designs_from_an_implausible_file(tmp_path):
    # --force is the documented way round the check; the filters stay within the ceiling
    noise = 0.1 * np.random.default_rng(1).standard_normal((2, 24000))
    f = _wav(tmp_path / "n.wav", noise)
    out = tmp_path / "out"
    r = run("design", f, "--out", str(out), "--force", "--rates", "48000")
    assert r.returncode == 0, r.stderr
    m = json.loads((out / "manifest.json").read_text())
    assert all(e["peak_gain_db"] <= 0.01 for e in m["files"] if e["kind"] == "fir")


def test_settings_file_paths_are_relative_to_the_file(tmp_path):
    # calibration and target named in a settings file are found beside it, from any folder
    conf = tmp_path / "conf"
    conf.mkdir()
    (conf / "mic.txt").write_text("20\t0,0\n1000\t0,0\n20000\t-1,5\n")  # decimal commas
    (conf / "aim.txt").write_text("20 2\n20000 -2\n")
    (conf / "s.toml").write_text(
        'settings_version = 1\n[design]\ncalibration = "mic.txt"\ntarget = "aim.txt"\n'
        "sample_rates = [48000]\n"
    )
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    out = tmp_path / "out"
    r = run(
        "design",
        _good(tmp_path)[0],
        "--out",
        str(out),
        "--settings",
        str(conf / "s.toml"),
        cwd=elsewhere,
    )
    assert r.returncode == 0, r.stderr
    design = json.loads((out / "manifest.json").read_text())["settings"]["design"]
    assert Path(design["calibration"]) == (conf / "mic.txt").resolve()
    assert Path(design["target"]) == (conf / "aim.txt").resolve()
    # the manifest is valid JSON (no NaN), and it says where peak gain was evaluated
    text = (out / "manifest.json").read_text()
    json.loads(text, parse_constant=lambda c: pytest.fail(f"manifest holds {c}"))
    assert json.loads(text)["peak_gain_band"] == "DC to Nyquist"


def test_cautions_print_once_when_work_starts(tmp_path):
    r = run("design", _good(tmp_path)[0], "--out", str(tmp_path / "o"), "--rates", "48000")
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("Caution") == 1


# ----------------------------------------------------------------- text files, table-driven

# (file bytes, expected frequencies, expected dB); every layout the README promises
LAYOUTS = {
    "space": (b"20 -1.5\n1000 0\n20000 2.25\n", [20, 1000, 20000], [-1.5, 0, 2.25]),
    "tab": (b"20\t-1.5\n1000\t0\n", [20, 1000], [-1.5, 0]),
    "tab-decimal-comma": (b"20,0\t-1,2\n1000,0\t0,0\n", [20, 1000], [-1.2, 0]),
    "semicolon": (b"100;5.5\n200;-1\n", [100, 200], [5.5, -1]),
    "semicolon-decimal-comma": (b"100;5,5\n200;-1\n", [100, 200], [5.5, -1]),
    "comma": (b"20,-1.5\n1000,0.0\n", [20, 1000], [-1.5, 0]),
    "comma-space": (b"20, -1.5\n1000, 0.0\n", [20, 1000], [-1.5, 0]),
    "space-decimal-comma": (b"20,0 -1,2\n1000 0\n", [20, 1000], [-1.2, 0]),
    "bom": (b"\xef\xbb\xbf20 1\n100 2\n", [20, 100], [1, 2]),
    "crlf": (b"20 1\r\n100 2\r\n", [20, 100], [1, 2]),
    "header-and-comments": (
        b'"Sens factor =-1.2dB"\nFreq(Hz)\tdB\n# note\n20 1\n100 2 45\n',
        [20, 100],
        [1, 2],
    ),
    "exponent": (b"2e1 1e-1\n1E3 0\n", [20, 1000], [0.1, 0]),
    "unsorted": (b"1000 0\n20 1\n", [20, 1000], [1, 0]),
    "latin-1-header": ("Fréquence;dB\n20;1\n100;2\n".encode("latin-1"), [20, 100], [1, 2]),
}

# (file bytes, text expected in the message); each refused with the line number
BAD_LAYOUTS = {
    "nan-first-column": (b"20 1\nnan 3\n100 2\n", "line 2"),
    "nan-second-column": (b"20 1\n100 NaN\n", "line 2"),
    "inf": (b"20 1\n100 -inf\n", "line 2"),
    "ambiguous-commas": (b"20,0,-1,2\n1000,0,0,0\n", "line 1"),
    "dot-and-decimal-comma": (b"20;1,5\n1.000;0,5\n", "line 2"),
    "comma-line-in-decimal-comma-file": (b"20\t1,5\n100,2.5\n", "line 2"),
    "one-column": (b"20 1\n100\n", "line 2"),
    "not-a-number": (b"20 1\n100 1.2.3\n", "line 2"),
    "underscore": (b"20 1\n1_000 2\n", "line 2"),
    "zero-frequency": (b"0 1\n100 2\n", "line 1"),
    "huge-db": (b"20 1\n100 1e6\n", "line 2"),
}


@pytest.mark.parametrize("case", sorted(LAYOUTS))
def test_text_layouts_are_read_as_written(tmp_path, case):
    raw, f_exp, g_exp = LAYOUTS[case]
    p = tmp_path / "curve.txt"
    p.write_bytes(raw)
    f, g = read_curve_file(p)
    np.testing.assert_array_equal(f, f_exp)
    np.testing.assert_allclose(g, g_exp, rtol=0, atol=1e-12)


@pytest.mark.parametrize("case", sorted(BAD_LAYOUTS))
def test_ambiguous_or_bad_text_is_refused_with_the_line(tmp_path, case):
    raw, where = BAD_LAYOUTS[case]
    p = tmp_path / "curve.txt"
    p.write_bytes(raw)
    with pytest.raises(InputFileError, match=where):
        read_curve_file(p)


# ----------------------------------------------------------------- no false refusals


def _simulated_room(fs: int, t60_s: float, drr_db: float, dur_s: float, seed: int) -> np.ndarray:
    """An invented seat: delay, direct sound, exponentially decaying diffuse tail, noise.

    Diffuse energy E_d = sigma^2 fs t60 / (6 ln 10) for an envelope 10^(-3t/t60)
    (integral of exp(-2t/tau), tau = t60 / (3 ln 10)); the direct impulse's
    amplitude is set from the direct-to-reverberant ratio ``drr_db``.
    """
    rng = np.random.default_rng(seed)
    n = int(dur_s * fs)
    d = int(0.006 * fs)
    t = np.arange(n - d) / fs
    sigma = 0.02
    tail = sigma * rng.standard_normal(n - d) * 10 ** (-3 * t / t60_s)
    e_diffuse = sigma**2 * fs * t60_s / (6 * np.log(10))
    h = np.zeros(n)
    h[d:] = tail
    h[d] += np.sqrt(e_diffuse * 10 ** (drr_db / 10))
    h += 1e-5 * rng.standard_normal(n)
    return 0.5 * h / np.max(np.abs(h))


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_demo_room_is_accepted_at_every_rate(fs):
    from roomcorr.demo import synthesize_demo_room

    for seed in (11, 12):
        irs, _, _ = synthesize_demo_room(fs, seed)
        assert implausible_responses(irs, fs) == []


def test_bundled_demo_measurements_are_accepted():
    from roomcorr.audio_io import read_ir_set

    irs, fs, _ = read_ir_set([REPO / "measurements_demo"], require_impulse=True)
    assert irs.shape[0] == 4


@pytest.mark.parametrize("t60_s", [0.2, 0.5, 1.2])
@pytest.mark.parametrize("drr_db", [-10.0, 0.0, 6.0])
@pytest.mark.parametrize("dur_s", [0.1, 0.5])
def test_realistic_rooms_are_accepted(t60_s, drr_db, dur_s):
    # listening seats (common practice, from memory): T60 0.2 to 1.2 s, direct-to-
    # reverberant ratio -10 to +6 dB, files from the 0.1 s minimum up
    h = _simulated_room(FS, t60_s, drr_db, dur_s, seed=int(t60_s * 10 + drr_db + 100 * dur_s))
    assert impulse_response_problems(h, FS) == []


def test_band_limited_subwoofer_response_is_accepted():
    from scipy.signal import butter, sosfilt

    sos = butter(4, 80.0, fs=FS, output="sos")
    h = sosfilt(sos, synthetic_ir(FS, 48000))
    assert impulse_response_problems(h, FS) == []
    # ... while the same response reversed in time is not
    rev = np.concatenate([h[::-1], np.zeros(FS // 4)])
    assert any("time-reversed" in p for p in impulse_response_problems(rev, FS))


@pytest.mark.parametrize(
    "opts, msg",
    [
        (["--level", "nan"], "not a finite number"),
        (["--sweep-seconds", "inf"], "not a finite number"),
        (["--rate", "48000.5"], "whole number"),
        (["--settings", "LEVEL"], "measure.level_dbfs"),
    ],
)
def test_measure_numbers_are_checked_before_any_sound(tmp_path, opts, msg):
    # a NaN level passes every 'level > cap' test: it must be refused before a device opens
    if opts[-1] == "LEVEL":
        opts = ["--settings", _text(tmp_path, "m.toml", "[measure]\nlevel_dbfs = nan\n")]
    out = tmp_path / "session"
    r = run("measure", "--out", str(out), "--yes", *opts, cwd=tmp_path)
    _assert_refused(r, msg, out)


@pytest.mark.parametrize("peak_to_noise_db", [40.0, 60.0, 90.0])
def test_clean_impulse_over_noise_is_accepted(peak_to_noise_db):
    # an electrical loopback: one impulse over white noise, nothing before or after it but
    # the noise; the build-up check counts energy above the noise, so chance alone (noise
    # before the peak louder than noise after it, half the time) never refuses it
    for seed in range(40):
        rng = np.random.default_rng(seed)
        h = 0.5 * 10 ** (-peak_to_noise_db / 20) * rng.standard_normal(24000)
        h[480 + seed] += 0.5
        assert impulse_response_problems(h, FS) == [], seed


# ----------------------------------------------------------------- malformed files (issue 22)

ROOM_SETTINGS = {
    # 5000 levels of nesting: tomllib recurses per level (RecursionError near 1000)
    "toml-deep": ("settings_version = 1\nx = " + "[" * 5000 + "]" * 5000 + "\n", "nested deeper"),
    "measure-level-text": ('settings_version = 1\n[measure]\nlevel_dbfs = "x"\n', "level_dbfs"),
    "measure-sweep-text": ('settings_version = 1\n[measure]\nsweep_s = "5"\n', "sweep_s"),
    "measure-positions-text": ('settings_version = 1\n[measure]\npositions = "3"\n', "positions"),
}


@pytest.mark.parametrize("case", sorted(ROOM_SETTINGS))
@pytest.mark.parametrize("command", ["design", "measure"])
def test_malformed_room_settings_are_one_line(tmp_path, case, command):
    # every command that reads the room's settings refuses them in one line, exit 2
    body, msg = ROOM_SETTINGS[case]
    if command != "measure" and case.startswith("measure-"):
        pytest.skip("only 'measure' reads the [measure] table's values")
    room = tmp_path / "room"
    assert run("init", str(room)).returncode == 0
    (room / "roomcorr-room.toml").write_text(body)
    args = {
        "design": ["design", "--room", str(room), _good(tmp_path)[0]],
        "measure": ["measure", "--room", str(room), "--yes"],
    }[command]
    r = run(*args, cwd=tmp_path)
    _assert_refused(r, msg, room / "designs")


def _record(d: Path, text: str) -> list[str]:
    files = _good(d)
    Path(files[0]).parent.joinpath("measurement.json").write_text(text)
    return files


RECORDS = {
    "deep": "[" * 100_000 + "]" * 100_000,
    "big-int": '{"positions": [], "x": ' + "9" * 5000 + "}",
    "positions-number": '{"positions": 5}',
    "positions-of-numbers": '{"positions": [1, 2]}',
    "settings-number": '{"settings": 5}',
}


@pytest.mark.parametrize("case", sorted(RECORDS))
@pytest.mark.parametrize("command", ["report", "design"])
def test_malformed_measurement_record_is_one_line(tmp_path, case, command):
    # a measurement folder outside a room: its measurement.json is read for channel
    # names (design) and quality figures (report); a malformed one is named in one line
    files = _record(tmp_path, RECORDS[case])
    out = tmp_path / "out"
    folder = str(Path(files[0]).parent)
    args = (
        ["report", folder, "--out", str(out)]
        if command == "report"
        else ["design", folder, "--out", str(out)]
    )
    r = run(*args, cwd=tmp_path)
    _assert_refused(r, "measurement.json", out)


def test_ctrl_c_at_start_is_one_line(tmp_path):
    # SIGINT within the first tens of ms (while Python imports): exit 130 and one line
    # (POSIX shells: 128 + SIGINT = 130), never a traceback through roomcorr's code.
    # Before roomcorr's first line runs (CPython's own start-up: site, the import
    # system), the interpreter answers for itself; that is outside any program.
    import signal
    import sys
    import time

    env = dict(os.environ, PYTHONPATH=str(REPO))
    ours = 0
    for delay_s in (0.0, 0.01, 0.02, 0.03, 0.04, 0.05, 0.06, 0.08, 0.1, 0.15, 0.2, 0.3):
        proc = subprocess.Popen(
            [sys.executable, "-m", "roomcorr", "history", str(tmp_path)],
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        time.sleep(delay_s)
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=60)
        frames = [ln for ln in err.splitlines() if ln.strip().startswith("File ")]
        # roomcorr's code is the package folder; a virtual environment inside the clone
        # (CI's .venv) holds CPython's start-up hooks, which are not roomcorr's
        assert not any(str(REPO / "roomcorr") in f for f in frames), (delay_s, "\n".join(frames))
        if frames or proc.returncode == -signal.SIGINT:
            continue  # CPython's start-up, before roomcorr's first line
        lines = [ln for ln in err.splitlines() if ln.strip()]
        ours += 1
        assert proc.returncode in (130, 2) and len(lines) == 1, (delay_s, proc.returncode, err)
    assert ours >= 3  # the later signals all reached roomcorr


def test_ctrl_c_noted_while_starting_is_answered_by_main(capsys, monkeypatch):
    # the handler roomcorr/__init__ installs for the command notes a Ctrl-C; main answers
    import roomcorr
    from roomcorr.cli import main

    monkeypatch.setattr(roomcorr, "_EARLY_INTERRUPTS", [2])
    assert main(["--help"]) == 130
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "interrupted" in err


def test_ctrl_c_inside_a_finaliser_is_delivered_again(monkeypatch):
    # A SIGINT that arrives while Python runs a weak-reference callback is printed as
    # "Exception ignored ... Traceback" and lost (Python's unraisable hook); while a
    # command runs, roomcorr's hook delivers it again so that it stops the command.
    import signal
    import time
    import types

    from roomcorr.cli import _interrupt_again

    seen = []
    old = signal.signal(signal.SIGINT, lambda *a: seen.append("SIGINT"))
    try:
        _interrupt_again(types.SimpleNamespace(exc_value=KeyboardInterrupt()))
        deadline = time.monotonic() + 5
        while not seen and time.monotonic() < deadline:  # delivered a moment later
            time.sleep(0.005)
    finally:
        signal.signal(signal.SIGINT, old)
    assert seen == ["SIGINT"]


def test_ctrl_c_while_a_compiled_module_initialises_is_one_line(capsys, monkeypatch):
    # found by the trust soak: a SIGINT during scipy's extension start-up surfaces as
    # ImportError("initialization failed") caused by the KeyboardInterrupt
    from roomcorr import cli

    def interrupted(args):
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt as exc:
            raise ImportError("initialization failed") from exc

    commands = [(n, add, interrupted if n == "history" else run) for n, add, run in cli._COMMANDS]
    monkeypatch.setattr(cli, "_COMMANDS", commands)
    assert cli.main(["history"]) == 130
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "interrupted" in err and "Traceback" not in err
