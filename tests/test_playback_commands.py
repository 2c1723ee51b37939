"""The printed ffmpeg and sox commands do what ``roomcorr apply`` does (within -100 dB)."""

from __future__ import annotations

import shlex
import shutil
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from music_synth import synth_music
from test_playback_render import RATES, system_design  # noqa: F401  (module fixture)

from roomcorr.playback.render import apply_file


def _cli(*args: str, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args], capture_output=True, text=True, cwd=cwd
    )


def _printed(design, fs: int, tool: str, cwd) -> list[list[str]]:
    """The command lines ``roomcorr commands`` prints for ``tool`` at rate ``fs``."""
    r = _cli("commands", str(design), "--rate", str(fs), cwd=cwd)
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stdout.splitlines() if ln.startswith(tool + " ")]
    assert lines, r.stdout
    return [shlex.split(ln) for ln in lines]


def _error_db(y: np.ndarray, ref: np.ndarray) -> float:
    return float(20 * np.log10(np.linalg.norm(y - ref) / np.linalg.norm(ref)))


@pytest.mark.skipif(shutil.which("ffmpeg") is None, reason="ffmpeg not installed")
@pytest.mark.skipif(shutil.which("sox") is None, reason="sox not installed")
@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("tool", ["ffmpeg", "sox"])
def test_printed_commands_render_like_apply(system_design, tmp_path, fs, tool):  # noqa: F811
    x = synth_music(fs, 2.0, rms_dbfs=-20.0)
    sf.write(tmp_path / "music.wav", x.T, fs, subtype="FLOAT")
    res = apply_file(tmp_path / "music.wav", system_design, tmp_path / "apply.wav")
    assert res.lowered_db == 0.0
    ref, _ = sf.read(tmp_path / "apply.wav", always_2d=True)
    for argv in _printed(system_design, fs, tool, tmp_path):
        subprocess.run(argv, check=True, capture_output=True, cwd=tmp_path)
    y, fs_y = sf.read(tmp_path / "corrected.wav", always_2d=True)
    assert fs_y == fs and y.shape[1] == ref.shape[1] == 3
    # ffmpeg's afir lets out up to one partition of silence more (commands.py); sox the same length
    assert ref.shape[0] <= y.shape[0] <= ref.shape[0] + (8192 if tool == "ffmpeg" else 0)
    assert np.abs(y[ref.shape[0] :]).max(initial=0.0) < 1e-6
    for o in range(3):
        err = _error_db(y[: ref.shape[0], o], ref[:, o])
        print(f"{tool} {fs} output {o}: {err:.1f} dB")
        assert err < -100, f"{tool} output {o} at {fs} Hz: {err:.1f} dB"  # the figure


def test_commands_without_text_files_say_how_to_get_them(tmp_path):
    from test_playback_render import _hand_design

    design = _hand_design(tmp_path / "d")
    r = _cli("commands", str(design))
    assert r.returncode == 0, r.stderr
    assert "--formats wav,txt" in r.stdout and "ffmpeg " in r.stdout
    r = _cli("commands", str(design), "--rate", "44100")
    assert r.returncode == 2 and "48000" in r.stderr


def test_design_summary_lists_the_files_and_what_to_do_next(tmp_path):
    from speaker_rooms import Room, seats, simulate

    room = Room(speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0)], kinds=["main", "main"],
                gains_db=[0.0, 0.0], mics_m=seats((3.1, 2.05, 1.1), 2))  # fmt: skip
    irs = simulate(room, length_s=0.4)
    for p in range(irs.shape[0]):
        sf.write(tmp_path / f"pos{p + 1}.wav", irs[p].T, 48000, subtype="FLOAT")
    out = tmp_path / "filters"
    r = _cli("design", str(tmp_path / "pos1.wav"), str(tmp_path / "pos2.wav"),
             "--rates", "44100,48000", "--taps", "4096", "--out", str(out))  # fmt: skip
    assert r.returncode == 0, r.stderr
    for fs in (44100, 48000):
        assert f"fir/{fs}/left.wav, fir/{fs}/right.wav" in r.stdout
    assert "already inside every filter" in r.stdout
    last = r.stdout.strip().splitlines()[-6:]
    assert last[0] == "Next:" and f"roomcorr apply MUSIC.wav --design {out}" in last[2]
