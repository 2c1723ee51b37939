"""Tests of roomcorr.design.realise.iir_fit.

Recovery of known biquads, safety invariants, cramping.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise import iir_fit as fit
from roomcorr.design.realise.biquad import Section
from roomcorr.errors import SafetyError, SettingsError
from roomcorr.grid import log_grid

FREQ = log_grid()
BAND = (30.0, 15000.0)
IN_BAND = (FREQ >= BAND[0]) & (FREQ <= BAND[1])

# A correction made of known cookbook sections (analytic case: a 10-section cascade can
# represent it exactly, so a good fit must get close).
KNOWN = [
    Section("peaking", 45.0, -9.0, 6.0),
    Section("peaking", 120.0, -6.0, 3.0),
    Section("peaking", 800.0, 2.5, 1.5),
    Section("lowshelf", 60.0, 3.0, 0.6),
    Section("highshelf", 6000.0, -3.0, 0.7),
    Section("peaking", 2500.0, -4.0, 2.0),
]


@pytest.fixture(scope="module")
def known_design():
    target = bq.analog_response_db(KNOWN, FREQ)
    design = fit.design_iir_curves(
        FREQ, [(0, "left", target, np.zeros_like(FREQ), BAND)], (44100, 48000, 96000),
        fit.FitLimits(fs_max=96000.0),
    )
    return target, design


def test_recovers_known_biquads(known_design):
    # Required: < 0.5 dB RMS against a curve built from known biquads, at every rate.
    target, design = known_design
    ch = design.channels[0]
    h = bq.analog_response_db(ch.sections_analog, FREQ)
    assert np.sqrt(np.mean((h - target)[IN_BAND] ** 2)) < 0.5
    for s in design.stats:
        assert s.rms_error_db < 0.5, s
        m = IN_BAND & (FREQ < 0.49 * s.fs)
        dig = bq.cascade_response_db(ch.coeffs[s.fs], FREQ[m], s.fs)
        assert np.sqrt(np.mean((dig - target[m]) ** 2)) == pytest.approx(s.rms_error_db)
    # The deep 45 Hz mode cut is found where it was put.
    f0s = [x.f0_hz for x in ch.sections_analog if x.kind == "peaking" and x.gain_db < -3]
    assert min(abs(np.log2(np.array(f0s) / 45.0))) < 0.05


def test_known_design_is_safe_and_reported(known_design):
    _, design = known_design
    fit.check_iir_safety(design)
    assert design.pre_gain_db <= 0.0
    for s in design.stats:
        assert s.peak_gain_db <= design.ceiling_db + 1e-9
        assert s.max_boost_db <= 4.0 + fit.BOOST_TOL_DB
        assert s.max_pole_radius <= 1 - bq.POLE_MARGIN
        assert s.float32_deviation_db < 0.1
        assert s.n_sections <= 10
        # sum |h| >= max |H| (triangle inequality)
        assert s.worst_case_gain_db >= s.peak_gain_db - 1e-6
    for ch in design.channels:
        for fs, c in ch.coeffs.items():
            assert np.array_equal(c, c.astype(np.float32).astype(float))
            assert all(x.f0_hz <= 0.45 * fs for x in ch.sections[fs])


def test_high_sections_are_refitted_against_cramping():
    # A 14 kHz boost at 44.1 kHz: cookbook coefficients from the analogue parameters are
    # narrower than the analogue prototype (bilinear cramping); the per-rate refit must
    # follow the analogue response more closely than the unmodified parameters do.
    secs = [Section("peaking", 14000.0, -6.0, 0.8)]
    fs = 44100
    f = FREQ[(FREQ > 5000) & (FREQ < 19000)]
    goal = bq.analog_response_db(secs, f)
    naive = bq.cascade_response_db(bq.coefficients(secs, fs), f, fs)
    s_fs, c, _ = fit.realise(secs, fs, fit.FitLimits(), f)
    refit = bq.cascade_response_db(c, f, fs)
    assert np.max(np.abs(naive - goal)) > 1.0
    assert np.max(np.abs(refit - goal)) < 0.5 * np.max(np.abs(naive - goal))
    assert s_fs[0].f0_hz != secs[0].f0_hz


def test_boost_cap_holds_when_the_curve_asks_for_more():
    # Two overlapping boosts, each within the cap, whose sum would exceed it.
    target = bq.analog_response_db(
        [Section("peaking", 300.0, 6.0, 1.0), Section("peaking", 420.0, 6.0, 1.0)], FREQ)
    d = fit.design_iir_curves(FREQ, [(0, "mono", target, np.zeros_like(FREQ), BAND)], (48000,),
                              fit.FitLimits(n_sections=6, max_boost_db=3.0, fs_max=48000.0))
    c = d.channels[0].coeffs[48000]
    dense = bq.check_frequencies(48000, points_per_octave=192)
    assert np.max(bq.cascade_response_db(c, dense, 48000)) <= 3.0 + fit.BOOST_TOL_DB
    assert all(s.gain_db <= 3.0 + 1e-9 for s in d.channels[0].sections[48000])


def test_pre_gain_brings_peak_to_ceiling():
    target = bq.analog_response_db([Section("peaking", 1000.0, 3.0, 1.0)], FREQ)
    d = fit.design_iir_curves(FREQ, [(0, "mono", target, np.zeros_like(FREQ), BAND)], (48000,),
                              fit.FitLimits(n_sections=3, fs_max=48000.0), ceiling_db=-1.0)
    s = d.stats[0]
    assert s.cascade_peak_db == pytest.approx(3.0, abs=0.1)
    # pre-gain = ceiling - peak, less the documented 0.001 dB peak-search allowance
    assert d.pre_gain_db == pytest.approx(-1.0 - s.cascade_peak_db - fit.PEAK_MARGIN_DB)
    assert s.peak_gain_db == pytest.approx(-1.0 - fit.PEAK_MARGIN_DB)


def test_ceiling_above_zero_needs_allow_gain():
    target = np.zeros_like(FREQ)
    with pytest.raises(SafetyError, match="allow_gain"):
        fit.design_iir_curves(FREQ, [(0, "mono", target, target, BAND)], (48000,),
                              fit.FitLimits(), ceiling_db=2.0)


def test_bad_ranges_are_settings_errors():
    with pytest.raises(SettingsError, match="iir_q_range"):
        fit.FitLimits(q_range=(2.0, 1.0)).validated()
    with pytest.raises(SettingsError, match="iir_freq_range_hz"):
        fit.FitLimits(freq_range_hz=(100.0, 50.0)).validated()
    with pytest.raises(SettingsError, match="iir_gain_range_db"):
        fit.FitLimits(gain_range_db=(5.0, 6.0), max_boost_db=4.0).validated()


def test_spread_weighting_trades_accuracy_where_positions_disagree():
    # Where spread is large, the fit should care less: a dip only there is followed less.
    target = bq.analog_response_db([Section("peaking", 2000.0, -8.0, 4.0),
                                    Section("peaking", 100.0, -8.0, 4.0)], FREQ)
    spread = np.where(np.abs(np.log2(FREQ / 2000.0)) < 0.5, 30.0, 0.0)
    lim = fit.FitLimits(n_sections=1, fs_max=48000.0)
    secs = fit.fit_sections(FREQ, target, 1 / (1 + spread), BAND, lim)
    assert abs(np.log2(secs[0].f0_hz / 100.0)) < 0.1
    secs = fit.fit_sections(FREQ, target, np.ones_like(FREQ), BAND, lim)
    assert len(secs) == 1


def test_flat_curve_needs_no_sections():
    secs = fit.fit_sections(FREQ, np.zeros_like(FREQ), np.ones_like(FREQ), BAND, fit.FitLimits())
    assert secs == []


def test_fragile_low_sections_are_made_float32_safe():
    # A narrow deep 22 Hz cut at 96 kHz cannot be rounded to float32 plainly (see
    # test_biquad); the realised section must pass the float32 proof.
    secs = [Section("peaking", 22.0, -15.0, 12.0)]
    s_fs, c, dev = fit.realise(secs, 96000, fit.FitLimits(), FREQ[FREQ < 200])
    assert dev < bq.FLOAT32_TOL_DB
    bq.check_float32(bq.coefficients(s_fs, 96000), bq.check_frequencies(96000), 96000, rounded=c)


@st.composite
def random_curve(draw):
    n = draw(st.integers(1, 5))
    curve = np.zeros_like(FREQ)
    for _ in range(n):
        f0 = draw(st.floats(25.0, 15000.0))
        g = draw(st.floats(-15.0, 12.0))
        w = draw(st.floats(0.05, 2.0))  # octaves
        curve += g * np.exp(-0.5 * (np.log2(FREQ / f0) / w) ** 2)
    cap = draw(st.sampled_from([0.0, 2.0, 4.0, 6.0]))
    ceiling = draw(st.sampled_from([0.0, -3.0]))
    return np.clip(curve, -15.0, cap), cap, ceiling


@settings(max_examples=8, deadline=None, derandomize=True, database=None,
          phases=[Phase.explicit, Phase.generate], print_blob=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(random_curve())
def test_property_no_cascade_exceeds_ceiling_or_cap(args):
    # Safety invariant (DESIGN.md): for any curve, no exported cascade exceeds its ceiling or
    # boost cap, every pole stays inside the margin, float32 rounding changes < 0.1 dB.
    curve, cap, ceiling = args
    d = fit.design_iir_curves(
        FREQ, [(0, "mono", curve, np.zeros_like(FREQ), BAND)], (44100, 96000),
        fit.FitLimits(n_sections=5, max_boost_db=cap, gain_range_db=(-15.0, 6.0), fs_max=96000.0),
        ceiling_db=ceiling,
    )
    for ch in d.channels:
        for fs, c in ch.coeffs.items():
            dense = bq.check_frequencies(fs, points_per_octave=96)
            h = bq.cascade_response_db(c, dense, fs)
            assert np.max(h, initial=0.0) <= cap + fit.BOOST_TOL_DB
            assert np.max(h) + d.pre_gain_db <= ceiling + 1e-6
            assert all(s.gain_db <= cap + 1e-9 for s in ch.sections[fs])
            assert np.all(bq.pole_radii(c) <= 1 - bq.POLE_MARGIN)
            bq.check_float32(c, dense, fs, rounded=c)
