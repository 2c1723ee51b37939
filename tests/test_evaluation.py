"""Evaluation rooms, figures of merit, and the fast subset of the quality benchmark."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import firwin, minimum_phase

from roomcorr.evaluation.metrics import (
    bass_drive_db,
    broadband_db,
    peak_db,
    pre_ringing_db,
    ripple_db,
    steady_state_db,
)
from roomcorr.evaluation.simulate import (
    PERTURB_CORNER_HZ,
    PERTURB_DIMS,
    evaluation_room,
    load_scenarios,
    perturbed_scenarios,
    scenario_names,
)
from roomcorr.grid import log_grid

F = log_grid()


# --------------------------------------------------------------------------- figures


def test_ripple_and_peak_of_a_sinusoid_over_log_frequency():
    # A sine of amplitude A over whole periods of the band: RMS about its mean is
    # A / sqrt(2); the part above the median (0) is a half-wave, RMS A / 2 (analytic).
    corner = 40.0
    lo, hi = 1.25 * corner, 300.0
    a = 6.0
    level = a * np.sin(2 * np.pi * 3 * np.log2(F / lo) / np.log2(hi / lo))
    assert ripple_db(level, F, corner) == pytest.approx(a / np.sqrt(2), rel=0.02)
    assert peak_db(level, F, corner) == pytest.approx(a / 2, rel=0.03)


def test_broadband_ignores_a_straight_line_over_log_frequency():
    line = 3.0 - 1.2 * np.log2(F / 1000)
    assert broadband_db(line, F) < 1e-9
    wave = line + 2.0 * np.cos(2 * np.pi * 2 * np.log2(F / 300) / np.log2(8000 / 300))
    # A cosine over whole periods is orthogonal to a constant and to a line, so
    # the fit leaves it whole: RMS 2 / sqrt(2) (analytic).
    assert broadband_db(wave, F) == pytest.approx(np.sqrt(2), rel=0.05)


def test_bass_drive_of_a_low_shelf():
    # +5 dB below 30 Hz, 0 dB in the midrange: drive +5 dB for a 60 Hz corner.
    gain = np.where(F < 30, 5.0, 0.0)
    assert bass_drive_db(gain, F, 60.0) == pytest.approx(5.0)
    assert bass_drive_db(-gain, F, 60.0) == pytest.approx(0.0)


def test_pre_ringing_linear_versus_minimum_phase():
    # scipy: a linear-phase high-pass rings symmetrically before its centre
    # tap; its minimum-phase counterpart peaks at once and has nothing before.
    h_lin = firwin(2001, 1000, fs=48000, pass_zero=False)
    assert pre_ringing_db(h_lin, 48000) > -60
    h_min = minimum_phase(h_lin, method="homomorphic")
    assert pre_ringing_db(h_min, 48000) < -60


def test_steady_state_of_an_impulse_is_flat():
    x = np.zeros(4800)
    x[100] = 1.0
    level = steady_state_db(x, 48000, F[(F > 20) & (F < 20000)], 1 / 6)
    assert np.max(np.abs(level)) < 1e-6


# --------------------------------------------------------------------------- corpus


def test_scenarios_cover_the_required_cases():
    rooms = load_scenarios()
    assert len(rooms) >= 6
    corners = []
    for r in rooms:
        assert 4 <= len(r["measured"]) <= 6
        assert len(r["held_out"]) == 6
        for off in r["held_out"]:
            assert 0.25 <= float(np.linalg.norm(off)) <= 0.45
        corners += [s["hp_hz"] for s in r["speakers"]]
    assert min(corners) >= 35 and max(corners) <= 80
    assert any(r["leak_hz"] for r in rooms)  # a room with pressure-chamber gain


def test_simulation_is_deterministic_and_has_the_first_axial_mode():
    a = evaluation_room("study")
    b = evaluation_room("study")
    assert np.array_equal(a.measured, b.measured)
    assert a.measured.shape[:2] == (4, 2) and a.held_out.shape[:2] == (6, 2)
    # Rayleigh: the first width mode c / (2 Ly) (Kuttruff, ch. 3) is a peak
    # of the position average for a loudspeaker near the side wall.
    ly = a.scenario["dims_m"][1]
    f1 = 343.0 / (2 * ly)
    level = steady_state_db(a.measured[:, 0], a.fs, F, 1 / 48).mean(axis=0)
    near = (F > f1 / 2**0.5) & (F < f1 * 2**0.5)
    assert level[near].max() - np.median(level[near]) > 3


# --------------------------------------------------------------------------- fast subset


@pytest.fixture(scope="module")
def study_score():
    from roomcorr.evaluation.score import score_roomcorr

    return score_roomcorr(evaluation_room("study"))


def test_quality_invariants_on_a_small_room(study_score):
    s = study_score
    assert np.max(s.bass_drive_db) <= 1.0
    assert np.max(s.peak_gain_db) <= 0.01
    assert np.max(s.pre_ringing_db) <= -60
    for seats in ("measured", "held_out"):
        assert s.delta("broadband_db", seats) <= 0.1
        assert s.ratio("ripple_db", seats) < 1.0
    assert s.ratio("peak_db", "held_out") <= 1.0  # no boom added where not measured
    assert s.worst_seat_ratio("ripple_db", "held_out") <= 1.05


def test_prediction_is_not_optimistic(study_score):
    # The leave-one-position-out prediction must not promise less variation at
    # unmeasured seats than the held-out seats get (0.5 dB slack).
    for (_, predicted), (_, actual) in zip(
        study_score.info["prediction"], study_score.info["held_out_variation"], strict=True
    ):
        assert predicted >= actual - 0.5


def test_scenario_names_are_unique():
    names = scenario_names()
    assert len(set(names)) == len(names)


def test_perturbed_rooms_are_seeded_and_inside_their_bounds():
    a, b = perturbed_scenarios(), perturbed_scenarios()
    assert a == b and len(a) == 2 * len(scenario_names())
    assert len({s["name"] for s in a}) == len(a)
    bases = {s["name"]: s for s in load_scenarios()}
    for s in a:
        base = bases[s["name"].rsplit("-", 1)[0]]
        ratio = np.asarray(s["dims_m"]) / np.asarray(base["dims_m"])
        assert np.all(ratio >= PERTURB_DIMS[0] - 1e-3) and np.all(ratio <= PERTURB_DIMS[1] + 1e-3)
        corner = s["speakers"][0]["hp_hz"]
        assert PERTURB_CORNER_HZ[0] - 0.01 <= corner <= PERTURB_CORNER_HZ[1] + 0.01
        assert s["held_out"] == base["held_out"]  # still 25 to 45 cm from the centre
        dims = np.asarray(s["dims_m"])
        for spk in s["speakers"]:
            assert np.all(np.asarray(spk["pos_m"]) > 0) and np.all(np.asarray(spk["pos_m"]) < dims)
        seats = np.asarray(s["seat_m"]) + np.asarray(s["measured"] + s["held_out"])
        assert np.all(seats > 0) and np.all(seats < dims)
