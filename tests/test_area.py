"""Listening-area design: bass limit, band edges, cross-validation, caps.

Module under test: roomcorr.design.curve.area.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.design.curve.area import (
    ASSUMED_SPEAKER_LOW_HZ,
    agreement_limits,
    apply_bass_limit,
    cross_validate,
    design_channel,
    measured_rolloff_hz,
)
from roomcorr.design.curve.correction import DIP_REFUSE_DB
from roomcorr.design.curve.target import target_from_table
from roomcorr.grid import log_grid

F = log_grid()
MID = (F >= 200) & (F <= 2000)


def butterworth_hp_db(freq_hz: np.ndarray, fc_hz: float, order: int) -> np.ndarray:
    """|H|^2 of a Butterworth high-pass in dB: -10 log10(1 + (fc/f)^(2n)) (analytic)."""
    return -10 * np.log10(1 + (fc_hz / freq_hz) ** (2 * order))


def butterworth_lp_db(freq_hz: np.ndarray, fc_hz: float, order: int) -> np.ndarray:
    """|H|^2 of a Butterworth low-pass in dB (analytic)."""
    return -10 * np.log10(1 + (freq_hz / fc_hz) ** (2 * order))


def modes_db(freq_hz: np.ndarray, modes: list[tuple[float, float, float]]) -> np.ndarray:
    """Peaks (+dB) and dips (-dB) of Gaussian shape in log frequency: (f, gain, width_oct)."""
    out = np.zeros_like(freq_hz)
    for f0, gain, width in modes:
        out += gain * np.exp(-0.5 * (np.log2(freq_hz / f0) / width) ** 2)
    return out


def positions(base_db: np.ndarray, n: int, seed: int, jitter_db: float = 0.7) -> np.ndarray:
    """``n`` positions: the base response plus seeded, smooth position-to-position differences."""
    rng = np.random.default_rng(seed)
    x = np.log2(F / 100)
    out = []
    for _ in range(n):
        wiggle = sum(
            rng.normal(0, jitter_db) * np.cos(k * x + rng.uniform(0, 6)) for k in (3, 5, 8)
        )
        out.append(base_db + wiggle)
    return np.array(out)


# --------------------------------------------------------------------------- bass limit


def _room_gain_speaker(fc_hz: float) -> np.ndarray:
    # A closed box's 2nd-order high-pass (analytic Butterworth, Q = 0.71) in a
    # small room whose pressure-chamber gain rises 12 dB/octave below 40 Hz
    # (common practice: a sealed room below its lowest mode), and modes above.
    room_gain = 10 * np.log10(1 + (40.0 / F) ** 4)
    room = modes_db(F, [(48, 6, 0.05), (71, -8, 0.04), (95, 5, 0.05), (150, 4, 0.06)])
    return butterworth_hp_db(F, fc_hz, 2) + room_gain + room + butterworth_lp_db(F, 16000, 2)


def test_bass_drive_never_raised_below_a_known_corner():
    fc = 60.0
    measured = positions(_room_gain_speaker(fc), 5, seed=3)
    flat = np.zeros_like(F)
    for stated in (None, fc):
        plan = design_channel(F, measured, flat, speaker_low_hz=stated)
        mid_median = float(np.median(plan.correction_db[MID]))
        below = F < fc
        # The rule itself: below the limit the gain never exceeds its midrange median.
        assert np.max(plan.correction_db[below]) <= mid_median + 1e-9
        assert plan.speaker_low_hz >= fc
        assert plan.speaker_low_how == ("stated" if stated else "assumed")


def test_bass_drive_on_simulated_room_with_room_gain():
    # End to end through the exported 48 kHz filter on the evaluation room with
    # a leaky pressure chamber lifting the bass below an 80 Hz loudspeaker
    # corner (roomcorr/evaluation/scenarios.json, "den-room-gain").
    from roomcorr.design.realise.fir import fir_response_db
    from roomcorr.evaluation.metrics import bass_drive_db
    from roomcorr.evaluation.simulate import evaluation_room
    from roomcorr.pipeline import run_design
    from roomcorr.settings import Settings, design_from_dict

    room = evaluation_room("den-room-gain")
    result = run_design(
        room.measured, room.fs, Settings(design_from_dict({"sample_rates": [48000]}))
    )
    for ch, fc in zip(result.channels, room.corner_hz, strict=True):
        h_db = fir_response_db(result.firs[48000][ch.index], 48000, F)
        # 0.3 dB: the FIR's allowed ripple around its curve (design/realise/safety.py).
        assert bass_drive_db(h_db, F, fc) <= 0.3


def test_bass_limit_caps_at_midrange_median():
    corr = np.where(F < 100, 5.0, -2.0)
    out = apply_bass_limit(F, corr, 80.0)
    assert np.all(out[F < 80] == -2.0)
    assert np.all(out[F >= 80] == corr[F >= 80])


def test_rolloff_found_for_a_steep_high_pass_not_for_a_boundary_dip():
    # A 4th-order Butterworth high-pass at 120 Hz: the -6 dB point is at
    # 120 (10^0.6 - 1)^(-1/8) Hz (analytic), and it keeps falling below.
    hp = butterworth_hp_db(F, 120.0, 4)
    wide = 10 * np.log10(smooth_log_grid(10 ** (hp / 10), 96, 1.0))
    got = measured_rolloff_hz(F, wide)
    assert got is not None and 90 < got < 125
    # A boundary cancellation (broad dip that recovers below) is no roll-off.
    dip = modes_db(F, [(110, -12, 0.25)])
    wide = 10 * np.log10(smooth_log_grid(10 ** (dip / 10), 96, 1.0))
    assert measured_rolloff_hz(F, wide) is None


# --------------------------------------------------------------------------- band edges


def _step_db(corr_db: np.ndarray, edge_hz: float) -> float:
    """Largest change of the 1/3-octave-smoothed correction over 1/3 octave near ``edge_hz``."""
    c3 = smooth_log_grid(corr_db, 96, 1 / 3)
    near = np.flatnonzero((F >= edge_hz / 2**0.5) & (F <= edge_hz * 2**0.5))
    span = 32  # 1/3 octave on the 1/96-octave grid
    return float(max(abs(c3[i + span // 2] - c3[i - span // 2]) for i in near))


def test_band_edges_without_step_for_flat_and_tilted_targets():
    # A vented box (4th-order high-pass at 45 Hz), a 2nd-order treble roll-off
    # at 14 kHz and a loudspeaker whose in-room treble falls 1.5 dB/octave above
    # 1 kHz (analytic curves), with modes in the bass.
    tilt = np.where(F > 1000, -1.5 * np.log2(F / 1000), 0.0)
    base = (
        butterworth_hp_db(F, 45.0, 4)
        + butterworth_lp_db(F, 14000.0, 2)
        + tilt
        + modes_db(F, [(110, 6, 0.05), (160, -5, 0.05), (230, 4, 0.05)])
    )
    measured = positions(base, 4, seed=11, jitter_db=0.4)
    for table in ({}, {"tilt_db_per_octave": -0.8}):
        target = target_from_table(F, table, "test")
        plan = design_channel(F, measured, target)
        lo, hi = plan.band_hz
        for edge in (lo, hi):
            assert _step_db(plan.correction_db, edge) <= 1.0, (table, edge)
        # Outside the band the correction is one constant (the neutral level; the
        # bass cap follows the finished curve's midrange median, which may sit a
        # few hundredths of a dB from it).
        outside = (F < lo / 2**0.6) | (F > hi * 2**0.6)
        assert np.ptp(plan.correction_db[outside & (F > 12)]) < 0.1


# --------------------------------------------------------------------------- cross-validation


def test_cross_validation_flags_a_position_in_a_deep_cancellation():
    base = modes_db(F, [(55, 5, 0.05), (90, -4, 0.05), (140, 6, 0.05)])
    measured = positions(base, 5, seed=5, jitter_db=0.5)
    measured[2] += modes_db(F, [(72, -20, 0.06)])  # position 3 sits in a null at 72 Hz
    target = np.full_like(F, float(np.median(measured[:, MID])))
    _, pred = cross_validate(F, measured, target, (30.0, 16000.0), 35.0, 4.0, 15.0)
    assert pred is not None
    assert [g["position"] for g in pred.flagged] == [2]
    assert abs(np.log2(pred.flagged[0]["freq_hz"] / 72)) < 0.1
    assert pred.flagged[0]["depth_db"] > 10


def test_cross_validation_needs_three_positions():
    measured = positions(np.zeros_like(F), 2, seed=1)
    strength, pred = cross_validate(F, measured, np.zeros_like(F), (30, 16000), 40, 4, 15)
    assert pred is None and np.all(strength == 1.0)


def test_cross_validation_keeps_cuts_of_a_modal_peak_every_position_shares():
    # Analytic case: a resonance at 120 Hz that every position shows (5 to
    # 7.5 dB high) next to a dip at 150 Hz the positions disagree on (some
    # want a boost, some a cut). The leave-one-out runs then halve that
    # region; the halving may scale what the positions disagree on (boosts),
    # but the peak stands out at every seat, so its cut stays whole: the
    # same, in the modal range, as a design without any shrinking.
    heights, dips = [7.0, 6.0, 7.5, 5.0, 6.5], [-4.0, 2.0, -5.0, 3.0, -4.0]
    base = butterworth_hp_db(F, 30.0, 2)
    measured = positions(base, 5, seed=3, jitter_db=0.5) + np.array(
        [
            modes_db(F, [(120.0, h, 0.04), (150.0, d, 0.04)])
            for h, d in zip(heights, dips, strict=True)
        ]
    )
    shrunk = design_channel(F, measured, np.zeros_like(F))
    whole = design_channel(F, measured, np.zeros_like(F), shrink=False)
    assert shrunk.prediction is not None
    halved = [(a, b) for a, b, s in shrunk.prediction.strength if s < 1.0]
    assert any(a <= 120.0 < b or a <= 150.0 < b for a, b in halved)  # the test is not vacuous
    peak = (F < 212.0) & (whole.correction_db <= -3.0)
    assert np.count_nonzero(peak) >= 5
    assert np.allclose(shrunk.correction_db[peak], whole.correction_db[peak], atol=0.1)
    # ... while the boosts of the halved regions are never larger than unshrunk.
    boost = (F < 300.0) & (whole.correction_db > 0)
    assert np.all(shrunk.correction_db[boost] <= whole.correction_db[boost] + 1e-9)


def test_agreement_keeps_only_what_most_positions_want():
    # Four positions want +3, +3, +3 and -1 dB: 75 % agree on at least +3 dB of
    # boost interpolated at the 25th percentile (numpy's linear quantile): 2 dB.
    measured = np.array([[-3.0], [-3.0], [-3.0], [1.0]]) * np.ones((1, F.size))
    boost, cut = agreement_limits(measured, np.zeros_like(F), 0.75)
    assert np.allclose(boost, np.quantile([3, 3, 3, -1], 0.25))
    assert np.allclose(cut, 0.0)


# --------------------------------------------------------------------------- invariants


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31),
    depth=st.floats(0, 40),
    boost=st.floats(0, 12),
    cut=st.floats(0, 40),
    tilt=st.floats(-3, 3),
    stated=st.one_of(st.none(), st.floats(20, 200)),
)
def test_caps_bass_limit_and_dip_refusal_hold_for_any_input(seed, depth, boost, cut, tilt, stated):
    rng = np.random.default_rng(seed)
    base = butterworth_hp_db(F, rng.uniform(30, 90), 2) + modes_db(
        F,
        [(rng.uniform(30, 15000), -depth, rng.uniform(0.02, 0.1)) for _ in range(3)]
        + [(rng.uniform(30, 300), rng.uniform(-10, 10), 0.05) for _ in range(4)],
    )
    measured = positions(base, int(rng.integers(1, 6)), seed=seed)
    target = target_from_table(F, {"tilt_db_per_octave": tilt}, "t")
    plan = design_channel(
        F, measured, target, speaker_low_hz=stated, max_boost_db=boost, max_cut_db=cut
    )
    c = plan.correction_db
    assert c.max() <= boost + 1e-9
    assert c.min() >= -cut - 1e-9
    limit = plan.speaker_low_hz
    assert limit >= (stated if stated is not None else ASSUMED_SPEAKER_LOW_HZ)
    assert np.all(c[F < limit] <= np.median(c[MID]) + 1e-9)
    # Deep narrow dips of the average (DIP_REFUSE_DB below its 1-octave power
    # envelope) inside the band never receive boost.
    avg = plan.average_db
    env = 10 * np.log10(smooth_log_grid(10 ** (avg / 10), 96, 1.0))
    lo, hi = plan.band_hz
    deep = (env - avg >= DIP_REFUSE_DB) & (F >= lo) & (F <= hi)
    assert np.all(c[deep] <= 1e-9)


def test_prediction_reaches_summary_manifest_and_curves_file(tmp_path):
    import json

    from conftest import REPO

    from roomcorr.audio_io import read_ir_set
    from roomcorr.deliver.export import load_design_curves, write_design
    from roomcorr.pipeline import run_design
    from roomcorr.report.summary import summary_sentences
    from roomcorr.settings import Settings, design_from_dict

    irs, fs, _ = read_ir_set([REPO / "measurements_demo"])
    result = run_design(irs, fs, Settings(design_from_dict({"sample_rates": [48000]})))
    write_design(result, tmp_path / "out")
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    for ch, entry in zip(result.channels, manifest["channels"], strict=True):
        assert entry["speaker_low_hz"] == pytest.approx(ch.speaker_low_hz, abs=0.01)
        assert entry["speaker_low_found_by"] in ("stated", "measured", "assumed")
        assert entry["cv_predicted_db"] == pytest.approx(ch.prediction.predicted_db, abs=0.01)
    text = " ".join(summary_sentences(load_design_curves(tmp_path / "out"), 4.0))
    assert "at seats you did not measure, expect the bass" in text
    assert "never raises the bass above its midrange level" in text
