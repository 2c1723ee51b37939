"""Tests of roomcorr.rooms (room folders, settings file, runs, lock), roomcorr.app.history,
roomcorr.app.compare and roomcorr.report.compare."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest
from test_compare import FS, SPK_L, SPK_R, room_set  # the synthetic room model

from roomcorr import rooms as R
from roomcorr.analysis.compare import speed_of_sound_m_s
from roomcorr.app.compare import compare_measurements
from roomcorr.app.history import format_history, history
from roomcorr.audio_io import write_wav
from roomcorr.errors import InputFileError, OutputError, SettingsError
from roomcorr.report.compare import comparison_png, format_comparison, write_comparison_plot
from roomcorr.rooms.runs import RUN_ID
from roomcorr.settings import DesignSettings

REPO = Path(__file__).resolve().parents[1]
C20 = speed_of_sound_m_s(20.0)


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def _write_set(folder: Path, irs: np.ndarray) -> None:
    for p in range(irs.shape[0]):
        write_wav(folder / f"pos{p + 1}.wav", irs[p], FS)


def _measure(room: R.Room, irs: np.ndarray, note: str | None = None) -> Path:
    with R.new_run(room, "measurement", {"note": note} if note else None) as d:
        _write_set(d, irs)
    return d


def _wait_for(path: Path, proc: subprocess.Popen, limit_s: float = 60.0) -> None:
    """Wait until ``path`` exists (the child says it got there); not a timing check."""
    t0 = time.monotonic()
    while not path.exists():
        if proc.poll() is not None:
            raise AssertionError(f"child ended early: {proc.stderr.read() if proc.stderr else ''}")
        if time.monotonic() - t0 > limit_s:
            proc.kill()
            raise AssertionError("child never reached its checkpoint")
        time.sleep(0.02)


@pytest.fixture()
def room(tmp_path: Path) -> R.Room:
    return R.init_room(tmp_path / "lounge")


# --------------------------------------------------------------------------- folders, settings


def test_init_creates_commented_settings_that_load_as_defaults(room: R.Room):
    text = room.settings_path.read_text(encoding="utf-8")
    data = tomllib.loads(text)  # valid TOML by the standard-library parser
    assert data["settings_version"] == 1
    assert data["room"]["name"] == "lounge"
    assert text.count("\n# ") > 20  # every key explained
    s = R.load_room_settings(room)
    assert s.design == DesignSettings()
    assert s.measure["level_dbfs"] <= -20.0  # starts quiet
    assert room.measurements_dir.is_dir() and room.designs_dir.is_dir()


def test_init_refuses_existing_room_and_leaves_it(room: R.Room):
    room.settings_path.write_text(
        room.settings_path.read_text().replace("max_boost_db = 4.0", "max_boost_db = 2.5")
    )
    before = room.settings_path.read_bytes()
    with pytest.raises(OutputError, match="already a room folder"):
        R.init_room(room.root)
    assert room.settings_path.read_bytes() == before
    assert R.load_room_settings(room).design.max_boost_db == 2.5


def test_find_room_from_inside_and_outside(room: R.Room, tmp_path: Path):
    sub = room.root / "measurements" / "x" / "y"
    sub.mkdir(parents=True)
    assert R.find_room(sub) == room
    assert R.find_room(room.root) == room
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    assert R.find_room(outside) is None
    with pytest.raises(SettingsError, match="roomcorr init"):
        R.open_room(outside)


def test_unknown_keys_are_named(room: R.Room):
    text = room.settings_path.read_text()
    room.settings_path.write_text(text.replace("max_cut_db = 15.0", "boost_limit = 3.0"))
    with pytest.raises(SettingsError, match=r"design\.boost_limit"):
        R.load_room_settings(room)
    room.settings_path.write_text(text.replace('name = "lounge"', 'name = "lounge"\nowner = "x"'))
    with pytest.raises(SettingsError, match=r"room\.owner"):
        R.load_room_settings(room)
    room.settings_path.write_text(text.replace("repeats = 2", "repeatz = 2"))
    with pytest.raises(SettingsError, match="repeatz"):
        R.load_room_settings(room)


def test_newer_settings_version_is_refused_naming_the_key(room: R.Room):
    text = room.settings_path.read_text()
    room.settings_path.write_text(text.replace("settings_version = 1", "settings_version = 7"))
    with pytest.raises(SettingsError, match="settings_version = 7.*newer roomcorr"):
        R.load_room_settings(room)


def test_older_layout_without_version_or_new_keys_loads(tmp_path: Path):
    # A minimal file as an early release would have written it: no
    # settings_version, only some keys. It loads; the rest take defaults.
    root = tmp_path / "old"
    root.mkdir()
    (root / R.SETTINGS_FILE).write_text('[design]\ntarget = "gentle-tilt"\nmax_boost_db = 3.0\n')
    s = R.load_room_settings(R.open_room(root))
    assert s.design.target == "gentle-tilt"
    assert s.design.max_boost_db == 3.0
    assert s.design.temperature_c == 20.0


def test_settings_upgrade_steps_run_or_fail_naming_the_key(room: R.Room, monkeypatch):
    # Simulate a release whose layout is version 2 (a key renamed): a version-1
    # room folder is upgraded through MIGRATIONS, or refused naming the key.
    import roomcorr.settings as st

    text = room.settings_path.read_text().replace("max_boost_db = 4.0", "boost_cap_db = 3.0")
    room.settings_path.write_text(text)
    monkeypatch.setattr(st, "SETTINGS_VERSION", 2)
    with pytest.raises(SettingsError, match="settings_version = 1 cannot be upgraded"):
        R.load_room_settings(room)

    def step(data):
        data["design"]["max_boost_db"] = data["design"].pop("boost_cap_db")
        return data

    monkeypatch.setitem(R.MIGRATIONS, 1, step)
    assert R.load_room_settings(room).design.max_boost_db == 3.0


# --------------------------------------------------------------------------- runs


def test_runs_are_time_stamped_never_overwritten_and_marked_complete(room: R.Room):
    irs = room_set(SPK_L, SPK_R, C20)
    d1 = _measure(room, irs)
    d2 = _measure(room, irs * 0.5)  # same second is likely: must still be a new folder
    assert d1 != d2 and d1.parent == d2.parent == room.measurements_dir
    assert RUN_ID.match(d1.name) and RUN_ID.match(d2.name)
    assert R.latest_measurement(room) == d2
    marker = json.loads((d1 / R.COMPLETE_MARKER).read_text())
    assert marker["complete"] is True and marker["kind"] == "measurement"
    assert set(marker["files"]) == {"pos1.wav", "pos2.wav", "pos3.wav", R.SETTINGS_SNAPSHOT}
    assert R.verify_run(d1) == [] and R.verify_run(d2) == []
    (d1 / "pos2.wav").write_bytes(b"damaged")
    assert R.verify_run(d1) == ["pos2.wav"]


def test_exception_inside_run_leaves_no_complete_run_and_frees_the_lock(room: R.Room):
    irs = room_set(SPK_L, SPK_R, C20)
    good = _measure(room, irs)
    with pytest.raises(KeyboardInterrupt):
        with R.new_run(room, "measurement") as d:
            write_wav(d / "pos1.wav", irs[0], FS)
            raise KeyboardInterrupt  # what Ctrl-C raises
    assert d.is_dir() and not (d / R.COMPLETE_MARKER).exists()  # kept, not deleted
    assert R.latest_measurement(room) == good
    runs = R.list_runs(room, "measurement")
    assert [r.complete for r in runs] == [True, False]
    assert not R.is_locked(room)
    with R.new_run(room, "design"):  # the lock is free again
        assert R.is_locked(room)


def test_latest_measurement_needs_one(room: R.Room):
    with pytest.raises(InputFileError, match="no complete measurement"):
        R.latest_measurement(room)


_CHILD = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    import numpy as np
    from roomcorr import rooms as R
    from roomcorr.audio_io import write_wav
    room = R.open_room(sys.argv[1])
    flag = Path(sys.argv[2])
    with R.new_run(room, sys.argv[3]) as d:
        write_wav(d / "pos1.wav", np.ones((2, 4800)) * 0.1, 48000)
        flag.write_text(str(d))
        while True:       # busy with the next file until killed
            time.sleep(0.05)
    """
)


def test_sigkill_mid_run_leaves_earlier_runs_intact_and_no_half_run(room: R.Room, tmp_path):
    irs = room_set(SPK_L, SPK_R, C20)
    earlier = [_measure(room, irs), _measure(room, irs * 0.7)]
    digests = {p: {f.name: f.read_bytes() for f in p.iterdir()} for p in earlier}
    flag = tmp_path / "reached"
    proc = subprocess.Popen(
        [sys.executable, "-c", _CHILD, str(room.root), str(flag), "measurement"],
        env=_env(),
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        _wait_for(flag, proc)
        assert R.is_locked(room)
        with pytest.raises(
            OutputError, match=rf"in use by process {proc.pid} on .*writing a measurement"
        ):
            with R.new_run(room, "measurement"):
                pass
    finally:
        os.kill(proc.pid, signal.SIGKILL)  # also on a failed assertion above: never leave it
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    killed = Path(flag.read_text())
    assert killed.is_dir() and not (killed / R.COMPLETE_MARKER).exists()
    for p in earlier:  # byte for byte as before, and still verifying
        assert {f.name: f.read_bytes() for f in p.iterdir()} == digests[p]
        assert R.verify_run(p) == []
    assert R.latest_measurement(room) == earlier[-1]
    hist = history(room)
    assert [h["status"] for h in hist] == ["complete", "complete", "incomplete"]
    assert not R.is_locked(room)  # the operating system dropped the dead process's lock
    newer = _measure(room, irs)
    assert R.latest_measurement(room) == newer


def test_sigint_mid_design_run(room: R.Room, tmp_path):
    flag = tmp_path / "reached"
    proc = subprocess.Popen(
        [sys.executable, "-c", _CHILD, str(room.root), str(flag), "design"],
        env=_env(),
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        _wait_for(flag, proc)
        os.kill(proc.pid, signal.SIGINT)  # Ctrl-C
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode != 0
    killed = Path(flag.read_text())
    assert not (killed / R.COMPLETE_MARKER).exists()
    assert R.list_runs(room, "design", include_incomplete=False) == []


def test_lock_is_reentrant_in_one_process(room: R.Room):
    with R.room_lock(room, "outer"):
        with R.new_run(room, "measurement") as d:
            write_wav(d / "pos1.wav", np.ones((2, 4800)) * 0.1, FS)
        assert R.is_locked(room)
    assert not R.is_locked(room)


def test_measurement_files_natural_order_and_add_measurement(room: R.Room, tmp_path: Path):
    src = tmp_path / "elsewhere"
    src.mkdir()
    irs = room_set(SPK_L, SPK_R, C20)
    for name, p in (("seat10.wav", 0), ("seat2.wav", 1), ("seat1.wav", 2)):
        write_wav(src / name, irs[p], FS)
    assert [p.name for p in R.measurement_files(src)] == ["seat1.wav", "seat2.wav", "seat10.wav"]
    run = R.add_measurement(room, [src], note="before the rug")
    assert sorted(p.name for p in run.glob("*.wav")) == ["pos1.wav", "pos2.wav", "pos3.wav"]
    assert (run / "pos3.wav").read_bytes() == (src / "seat10.wav").read_bytes()
    assert history(room)[0]["note"] == "before the rug"
    (src / "seat2.wav").write_bytes(b"not audio")
    with pytest.raises(InputFileError, match="seat2.wav"):
        R.add_measurement(room, [src])
    assert len(R.list_runs(room)) == 1  # the refused import wrote nothing


# ---------------------------------------------------------------- design, history, compare


def _design(room: R.Room, meas: Path) -> Path:
    from roomcorr.audio_io import read_ir_set
    from roomcorr.deliver.export import write_design
    from roomcorr.pipeline import run_design

    settings = R.load_room_settings(room)
    settings.design.sample_rates = (48000,)
    irs, fs, _ = read_ir_set(R.measurement_files(meas))
    with R.new_run(room, "design", {"measurement": meas.name}) as d:
        write_design(run_design(irs, fs, settings), d)
    return d


def test_history_lists_key_figures(room: R.Room):
    irs = room_set(SPK_L, SPK_R, C20)
    m = _measure(room, irs)
    d = _design(room, m)
    hist = history(room)
    assert [(h["kind"], h["run_id"]) for h in hist] == [("measurement", m.name), ("design", d.name)]
    fm = hist[0]["figures"]
    assert (fm["positions"], fm["channels"], fm["sample_rate"]) == (3, 2, FS)
    # Arrival of the direct sound: r / c + 2 ms pre-delay of the model (plus
    # a few samples of loudspeaker delay).
    from test_compare import MICS

    want_ms = np.mean([np.linalg.norm(SPK_L - mic) for mic in MICS]) / C20 * 1e3 + 2.0
    assert fm["arrival_ms"][0] == pytest.approx(want_ms, abs=0.1)
    fd = hist[1]["figures"]
    assert hist[1]["source"] == m.name
    assert fd["peak_gain_db"] <= 0.0 + 1e-9  # safety: no exported filter above 0 dB
    assert fd["sample_rates"] == [48000]
    assert fd["pre_gain_db"] <= 0.0


def test_compare_default_last_two_with_filter_fit(room: R.Room):
    m1 = _measure(room, room_set(SPK_L, SPK_R, C20))
    _design(room, m1)
    # Gain-only change of the right loudspeaker (-3 dB): the level change is
    # recovered; each channel's correction still fits its shape (the level is
    # arbitrary), but the old level trims no longer balance the pair: re-design.
    m2 = _measure(room, room_set(SPK_L, SPK_R, C20, gain_r=10 ** (-3 / 20)))
    res = compare_measurements(room=room)
    # runs are named by their place in the room, not by absolute paths
    assert (res["before"], res["after"]) == (f"measurements/{m1.name}", f"measurements/{m2.name}")
    right = res["channels"][1]
    assert right["name"] == "right"
    assert right["level_change_db"] == pytest.approx(-3.0, abs=0.5)
    assert abs(right["distance_change_m"]) < 0.02
    fit = res["filter_fit"]
    assert fit["available"] and fit["made_from"] == m1.name
    for ch in fit["channels"]:
        assert ch["old_rms_db"] == pytest.approx(ch["fresh_rms_db"], abs=0.2)
        assert ch["still_fit"]
    assert fit["verdict"] == "re-design" and not fit["still_fit"]
    assert any("level of" in r and "trims" in r for r in fit["reasons"])
    trims = {c["name"]: c["trim_change_db"] for c in fit["system"]["channels"]}
    # the right is 3 dB quieter now: a fresh design trims the left 3 dB more
    assert trims["left"] - trims["right"] == pytest.approx(-3.0, abs=0.3)


def test_compare_moved_speaker_with_run_ids_and_temperature(room: R.Room):
    moved = SPK_R + np.array([0.0, -0.5, 0.0])
    c = speed_of_sound_m_s(30.0)
    m1 = _measure(room, room_set(SPK_L, SPK_R, c))
    _design(room, m1)
    m2 = _measure(room, room_set(SPK_L, moved, c))
    from test_compare import MICS

    want = np.mean([np.linalg.norm(moved - mic) - np.linalg.norm(SPK_R - mic) for mic in MICS])
    res = compare_measurements(m1.name, m2.name, room=room, temperature_c=30.0)
    assert res["channels"][1]["distance_change_m"] == pytest.approx(want, abs=0.02)
    assert res["speed_of_sound_m_s"] == pytest.approx(c, abs=1e-3)
    assert res["filter_fit"]["available"]
    right_fit = res["filter_fit"]["channels"][1]
    assert right_fit["old_rms_db"] > right_fit["fresh_rms_db"]  # a fresh design fits better


def test_compare_needs_two_measurements(room: R.Room):
    _measure(room, room_set(SPK_L, SPK_R, C20))
    with pytest.raises(InputFileError, match="compare needs two"):
        compare_measurements(room=room)
    with pytest.raises(InputFileError, match="no such"):
        compare_measurements("nope-a", "nope-b", room=room)


def test_text_output_names_the_figures(room: R.Room):
    m1 = _measure(room, room_set(SPK_L, SPK_R, C20), note="first")
    _design(room, m1)
    _measure(room, room_set(SPK_L, SPK_R + np.array([0.0, -0.3, 0.0]), C20))
    with R.new_run(room, "measurement"):
        pass  # an empty run is still a complete run folder, with no IR files ...
    hist = history(room)
    text = "\n".join(format_history(hist, R.room_name(room)))
    assert text.startswith("Room lounge: 4 run(s)")
    assert "from measurement " + m1.name in text and "(first)" in text
    assert "3 position(s) x 2 channel(s), 48000 Hz" in text
    assert "problem:" in text  # ... which history reports instead of failing
    runs = R.list_runs(room, "measurement", include_incomplete=False)
    res = compare_measurements(runs[0].path, runs[1].path, room=room)
    out = "\n".join(format_comparison(res))
    assert "ISO 9613-1" in out and "right:" in out and "distance +0.2" in out
    assert "filter check against" in out
    json.dumps(res)  # plain JSON types only


def test_new_run_folder_starts_empty_and_records_settings(room: R.Room):
    start = room.settings_path.read_bytes()
    with R.new_run(room, "measurement") as d:
        assert list(d.iterdir()) == []  # writers that insist on an empty folder accept it
        room.settings_path.write_bytes(start.replace(b"max_cut_db = 15.0", b"max_cut_db = 9.0"))
        write_wav(d / "pos1.wav", np.ones((2, 4800)) * 0.1, FS)
    assert (d / R.SETTINGS_SNAPSHOT).read_bytes() == start  # as at the start of the run
    import hashlib

    marker = json.loads((d / R.COMPLETE_MARKER).read_text())
    assert marker["room_settings_sha256"] == hashlib.sha256(start).hexdigest()


# ---------------------------------------------------------------- command line (as a user runs it)


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args],
        cwd=cwd,
        env=_env(),
        capture_output=True,
        text=True,
        timeout=300,
    )


def test_cli_init_history_compare(tmp_path: Path):
    r = _cli("init", "den", "--name", "den at the back", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "den" / R.SETTINGS_FILE).is_file()
    again = _cli("init", "den", cwd=tmp_path)
    assert again.returncode == 2
    assert again.stderr.count("\n") == 1 and "already a room folder" in again.stderr

    room = R.open_room(tmp_path / "den")
    moved = SPK_L + np.array([0.0, 0.25, 0.0])
    _measure(room, room_set(SPK_L, SPK_R, C20))
    _measure(room, room_set(moved, SPK_R, C20, gain_r=10 ** (-2 / 20)))

    h = _cli("history", cwd=room.root / "measurements")  # from inside: found by walking up
    assert h.returncode == 0, h.stderr
    assert "Room den at the back: 2 run(s)" in h.stdout

    c = _cli("compare", "--json", "--temperature", "30", "--plot", "cmp.png", cwd=room.root)
    assert c.returncode == 0, c.stderr
    doc = json.loads(c.stdout)  # stdout holds only the JSON document
    assert (room.root / "cmp.png").read_bytes()[:4] == b"\x89PNG"
    assert "curves" not in doc["channels"][0]
    from test_compare import MICS

    # The model room was made with c at 20 °C; at 30 °C roomcorr converts the
    # same arrival change with c(30 °C), so the distance scales by c30 / c20.
    c30 = speed_of_sound_m_s(30.0)
    assert doc["speed_of_sound_m_s"] == pytest.approx(c30, abs=1e-3)
    want = np.mean([np.linalg.norm(moved - m) - np.linalg.norm(SPK_L - m) for m in MICS])
    left, right = doc["channels"]
    assert left["arrival_change_ms"] == pytest.approx(want / C20 * 1e3, abs=0.02 / C20 * 1e3)
    assert left["distance_change_m"] == pytest.approx(want * c30 / C20, abs=0.02)
    assert right["level_change_db"] == pytest.approx(-2.0, abs=0.5)
    assert doc["filter_fit"]["available"] is False  # no design yet, and it says so


def test_cli_errors_are_one_line(tmp_path: Path):
    r = _cli("compare", cwd=tmp_path)
    assert r.returncode == 2 and "roomcorr init" in r.stderr and r.stderr.count("\n") == 1
    r = _cli("compare", "only-one", cwd=tmp_path)
    assert r.returncode == 2 and "both A and B" in r.stderr
    r = _cli("history", str(tmp_path), cwd=tmp_path)
    assert r.returncode == 2 and "not inside a room folder" in r.stderr


def test_design_source_from_the_manifest_file_list(room: R.Room):
    # A design command that records its inputs only in manifest.json (the
    # "measurements" file list) is still traced back to its measurement run.
    from roomcorr.audio_io import read_ir_set
    from roomcorr.deliver.export import write_design
    from roomcorr.pipeline import run_design

    m1 = _measure(room, room_set(SPK_L, SPK_R, C20))
    m2 = _measure(room, room_set(SPK_L, SPK_R, C20, gain_r=0.5))
    settings = R.load_room_settings(room)
    settings.design.sample_rates = (48000,)
    irs, fs, files = read_ir_set(R.measurement_files(m1))
    with R.new_run(room, "design") as d:
        write_design(
            run_design(irs, fs, settings), d, extra={"measurements": [str(f) for f in files]}
        )
    assert history(room)[-1]["source"] == m1.name
    res = compare_measurements(m1, m2, room=room)
    assert res["filter_fit"]["design"] == d.name  # by run id, not by absolute path


def test_compare_accepts_lists_of_files(tmp_path: Path):
    a_dir, b_dir = tmp_path / "a", tmp_path / "b"
    a_dir.mkdir()
    b_dir.mkdir()
    moved = SPK_R + np.array([0.0, -0.2, 0.0])
    _write_set(a_dir, room_set(SPK_L, SPK_R, C20))
    _write_set(b_dir, room_set(SPK_L, moved, C20))
    whole = compare_measurements(a_dir, b_dir, fit_check=False)
    files_b = R.measurement_files(b_dir)
    listed = compare_measurements(
        ",".join(str(f) for f in R.measurement_files(a_dir)),
        [str(f) for f in files_b],
        fit_check=False,
    )
    assert listed["after_files"] == [str(f) for f in files_b]
    for x, y in zip(whole["channels"], listed["channels"], strict=True):
        assert x["distance_change_m"] == y["distance_change_m"]
    assert whole["temperature_c"] == 20.0  # no room: the default temperature


def test_comparison_plot_png(tmp_path: Path):
    a_dir, b_dir = tmp_path / "a", tmp_path / "b"
    a_dir.mkdir()
    b_dir.mkdir()
    _write_set(a_dir, room_set(SPK_L, SPK_R, C20))
    _write_set(b_dir, room_set(SPK_L, SPK_R + np.array([0.0, -0.3, 0.0]), C20))
    res = compare_measurements(a_dir, b_dir, fit_check=False, with_curves=True)
    out = write_comparison_plot(res, tmp_path / "cmp.png")
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, 5.2)
    import matplotlib.image as mpimg

    img = mpimg.imread(out)
    assert img.shape[0] > 300 and img.shape[1] > 600
    assert float(np.std(img[..., :3])) > 0.05  # not blank
    with pytest.raises(OutputError, match=r"\.png"):
        write_comparison_plot(res, tmp_path / "cmp.jpg")
    with pytest.raises(ValueError, match="with_curves"):
        comparison_png(compare_measurements(a_dir, b_dir, fit_check=False))
