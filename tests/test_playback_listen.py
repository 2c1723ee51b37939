"""Loudness (BS.1770 via pyloudnorm), the listening paths and their cross-fade."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
from music_synth import synth_music
from test_playback_render import _hand_design, system_design  # noqa: F401  (module fixture)

from roomcorr.deliver.plan import load_route_plan
from roomcorr.playback.loudness import integrated_lufs, matching_gain_db
from roomcorr.playback.realtime import FADE_S, ListeningPaths
from roomcorr.playback.render import apply_file


def test_ebu_tech_3341_case_1_reads_minus_23_lufs():
    # EBU Tech 3341 test case 1: stereo 1 kHz sine, -23 dBFS (peak) in each channel, reads
    # -23.0 +- 0.1 LUFS. The value is from memory; the test suites of libebur128's bindings
    # (pyebur128) expect -23.0 +- 0.1 for the EBU's own file seq-3341-1-16bit.wav, whose
    # sine peaks at -22.94 dBFS per channel. pyloudnorm's own tests (the version read) check
    # another file. Our 20 s synthesised tone stands for the EBU file.
    fs = 48000
    t = np.arange(20 * fs) / fs
    x = np.vstack([10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * t)] * 2)
    assert integrated_lufs(x, fs) == pytest.approx(-23.0, abs=0.1)
    # EBU Tech 3341 case 2: the same at -33 dBFS reads -33.0 (from memory); 10 dB lower
    assert integrated_lufs(x * 10 ** (-10 / 20), fs) == pytest.approx(-33.0, abs=0.1)


def test_matching_gain_is_the_level_difference_for_a_scaled_copy():
    fs = 48000
    x = synth_music(fs, 5.0)
    # a copy 4.5 dB quieter needs exactly -4.5 dB on the louder one (BS.1770 is linear in power)
    assert matching_gain_db(x * 10 ** (-4.5 / 20), x, fs) == pytest.approx(-4.5, abs=1e-6)


def _blocks(paths: ListeningPaths, x: np.ndarray, switch_at: dict[int, bool] | None = None):
    b = paths.block
    n = -(-x.shape[1] // b)
    xp = np.zeros((x.shape[0], n * b))
    xp[:, : x.shape[1]] = x
    out = []
    for k in range(n):
        if switch_at and k in switch_at:
            paths.set(switch_at[k])
        out.append(paths.process(xp[:, k * b : (k + 1) * b]))
    return np.concatenate(out, axis=1)


def test_both_listening_states_equal_offline_rendering(system_design, tmp_path):  # noqa: F811
    fs = 48000
    plan = load_route_plan(system_design, fs)
    x = synth_music(fs, 2.0)
    sf.write(tmp_path / "m.wav", x.T, fs, subtype="DOUBLE")
    apply_file(tmp_path / "m.wav", system_design, tmp_path / "y.wav", subtype="DOUBLE")
    ref, _ = sf.read(tmp_path / "y.wav", always_2d=True)
    paths = ListeningPaths(plan, uncorrected_gain_db=-3.0, level_db=-6.0)
    y = _blocks(paths, x)
    n = x.shape[1]
    err = np.linalg.norm(y[:, :n] - 10 ** (-6 / 20) * ref[:n].T) / np.linalg.norm(ref[:n])
    assert 20 * np.log10(err) < -120  # the partitioned path is apply's (scipy-checked) rendering
    paths = ListeningPaths(plan, uncorrected_gain_db=-3.0, level_db=-6.0)
    paths.set(False)
    paths.state.position = 0.0
    y = _blocks(paths, x)
    # uncorrected by hand: routes' gains and the trims the player applies, no filters
    unc = 10 ** (-9 / 20) * (plan.mix * plan.trim[:, None]) @ x
    np.testing.assert_allclose(y[:, :n], unc, atol=1e-12)


def test_the_switch_cross_fades_without_a_click(system_design):  # noqa: F811
    fs = 48000
    plan = load_route_plan(system_design, fs)
    x = synth_music(fs, 3.0)
    gain = -4.0
    both = {}
    for state in (True, False):
        p = ListeningPaths(plan, gain, level_db=0.0)
        p.set(state)
        p.state.position = 1.0 if state else 0.0
        both[state] = _blocks(p, x)
    own_change = max(np.abs(np.diff(both[s], axis=1)).max() for s in both)
    p = ListeningPaths(plan, gain, level_db=0.0)
    switch_block = 200  # at 1.07 s, mid-music
    y = _blocks(p, x, {switch_block: False, 400: True})
    jump = np.abs(np.diff(y, axis=1)).max()
    # the figure: no discontinuity above the music's own sample-to-sample change
    assert jump <= own_change
    # the switch takes effect at once and is complete within the fade (well under 100 ms)
    start = switch_block * p.block
    done = start + int(np.ceil(FADE_S * fs))
    np.testing.assert_allclose(y[:, done : done + 1000], both[False][:, done : done + 1000])
    assert not np.allclose(y[:, start + 10], both[True][:, start + 10])
    assert FADE_S < 0.1


def test_listening_paths_line_up_for_a_latency(tmp_path):
    """A mixed-phase design is late by its latency: the uncorrected path waits as long."""
    import json

    design = _hand_design(tmp_path / "d")
    man = json.loads((design / "manifest.json").read_text())
    man["latency"] = {"samples": {"48000": 300}}
    (design / "manifest.json").write_text(json.dumps(man))
    plan = load_route_plan(design, 48000)
    p = ListeningPaths(plan, 0.0, level_db=0.0)
    p.set(False)
    p.state.position = 0.0
    x = np.zeros((2, 1024))
    x[0, 5] = 0.5
    y = _blocks(p, x)
    assert np.flatnonzero(y[0])[0] == 305  # delayed by exactly the latency


@pytest.mark.parametrize("case", ["no design", "rate", "channels"])
def test_listen_refusals_are_one_line_exit_2(system_design, tmp_path, case):  # noqa: F811
    import subprocess
    import sys

    music = tmp_path / "m.wav"
    fs = 96000 if case == "rate" else 48000
    x = synth_music(fs, 1.0)
    sf.write(music, x[0] if case == "channels" else x.T, fs, subtype="FLOAT")
    design = [] if case == "no design" else ["--design", str(system_design)]
    args = ["listen", str(music), *design]
    r = subprocess.run([sys.executable, "-m", "roomcorr", *args], capture_output=True, text=True,
                       cwd=tmp_path, stdin=subprocess.DEVNULL)  # fmt: skip
    assert r.returncode == 2
    errors = [ln for ln in r.stderr.splitlines() if ln.startswith("roomcorr: error")]
    words = {"no design": "--design", "rate": "no filters for 96000 Hz", "channels": "1 channel"}
    assert len(errors) == 1 and words[case] in errors[0] and "Traceback" not in r.stderr
