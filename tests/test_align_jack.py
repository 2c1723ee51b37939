"""Alignment through a real audio server: three loudspeakers at known distances, measured
with ``roomcorr measure --names`` through JACK (dummy backend) and the test room client,
then designed from the measurement folder.

The JACK server gets a name of its own (``JACK_DEFAULT_SERVER``, unless already set), so
this module never meets a server another test run started.
"""

from __future__ import annotations

import os

os.environ.setdefault("JACK_DEFAULT_SERVER", f"roomcorr-align-{os.getpid()}")

import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from jack_fixtures import FS, jack_server, make_room, run_measure  # noqa: E402, F401  (pytest fixtures)
from speaker_rooms import C_M_S, Room, direct_delays_s, simulate  # noqa: E402


def test_measured_loudspeakers_are_aligned(make_room, tmp_path):  # noqa: F811
    """Free field, so the truth is plain: delays from the distances (343.2 m/s, ISO 9613-1
    at 20 °C), levels from the gains over the distances (1/r)."""
    room = Room(
        speakers_m=[(0.5, 1.0, 1.0), (0.9, 2.05, 0.9), (0.2, 3.2, 1.1)],
        kinds=["main"] * 3,
        gains_db=[0.0, -1.7, 0.9],
        mics_m=[(3.0, 2.1, 1.1)],
        free_field=True,
    )
    irs = simulate(room, fs=FS, length_s=0.1)[0] * 0.5
    make_room(
        "roomsim_align",
        {
            "speakers": [{"ir": h.tolist()} for h in irs],
            "loopback": True,
            "noise_rms": 1e-5,
            "seed": 5,
        },
    )
    cfg = tmp_path / "quick.toml"
    cfg.write_text("[measure]\nnoise_s = 0.2\ntail_s = 0.35\ntest_s = 0.2\n")
    out = tmp_path / "session"
    cmd = [sys.executable, "-m", "roomcorr"]
    r = run_measure(
        [
            "--device",
            "roomsim_align",
            "--outputs",
            "1,2,3",
            "--names",
            "left,centre,right",
            "--input",
            "1",
            "--loopback",
            "4,2",
            "--yes",
            "--out",
            str(out),
            "--settings",
            str(cfg),
            "--sweep-seconds",
            "0.7",
            "--repeats",
            "1",
            "--ir-seconds",
            "0.2",
            "--replace",
        ],
        timeout=180,
    )
    assert r.returncode == 0, r.stderr
    assert json.loads((out / "measurement.json").read_text())["settings"]["names"] == [
        "left",
        "centre",
        "right",
    ]
    design = tmp_path / "design"
    d = subprocess.run(
        cmd + ["design", str(out), "--rates", "48000", "--out", str(design)],
        capture_output=True,
        text=True,
        timeout=180,
    )
    assert d.returncode == 0, d.stderr
    man = json.loads((design / "manifest.json").read_text())
    outs = {o["name"]: o for o in man["outputs"]}
    assert list(outs) == ["left", "centre", "right"]  # names from the measurement
    arrival = direct_delays_s(room)[0]
    truth_ms = (arrival.max() - arrival) * 1000
    got_ms = np.array([outs[n]["delay_ms"] for n in ("left", "centre", "right")])
    np.testing.assert_allclose(got_ms, truth_ms, atol=0.02)  # issue 11: 0.02 ms
    dist = arrival * C_M_S
    level = np.array(room.gains_db) - 20 * np.log10(dist)
    got_db = np.array([outs[n]["gain_db"] for n in ("left", "centre", "right")])
    np.testing.assert_allclose(got_db, level.min() - level, atol=0.1)  # issue 11: 0.1 dB
    assert got_ms.min() == pytest.approx(0.0, abs=1e-9)
