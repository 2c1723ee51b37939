"""Linkwitz-Riley crossovers and the subwoofer integration search."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.signal import butter, sosfreqz

from roomcorr.design.realise.fir import peak_gain_db, synthesize_fir
from roomcorr.design.system.crossover import (
    DELAY_STEP_S,
    SHARED_CUT_SHARE,
    SLOPES_DB_OCT,
    SMOOTHING_OCT,
    apply_crossover,
    crossover_candidates,
    linkwitz_riley_response,
    linkwitz_riley_sos,
    region_mask,
    search_grid_hz,
    search_integration,
    shared_cut_db,
)
from roomcorr.grid import log_grid

FS = 48000
F = np.geomspace(10, 20000, 2000)


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
@pytest.mark.parametrize("slope", SLOPES_DB_OCT)
def test_response_equals_scipy_sosfreqz_of_the_butterworth_sections(fs, slope):
    # the analytic response (the bilinear transform's frequency map applied to the analog
    # Butterworth prototype) against scipy's sosfreqz of scipy's butter sections, squared
    f = np.geomspace(5.0, 0.49 * fs, 500)
    for fc in (35.0, 80.0, 141.0, 3000.0):
        n = slope // 12
        pair = linkwitz_riley_response(f, fc, fs, slope)
        for kind, got in zip(("lowpass", "highpass"), pair, strict=True):
            _, want = sosfreqz(butter(n, fc, kind, fs=fs, output="sos"), worN=f, fs=fs)
            np.testing.assert_allclose(got, want**2, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("fc", [40.0, 80.0, 150.0, 2500.0])
def test_lr4_and_lr8_sum_to_an_all_pass(fc):
    # Linkwitz, JAES 24(1), 1976: LP + HP of a Linkwitz-Riley crossover is an
    # all-pass (flat magnitude); the bilinear transform keeps that property.
    for slope in (24, 48):
        lp, hp = linkwitz_riley_response(F, fc, FS, slope)
        np.testing.assert_allclose(np.abs(lp + hp), 1.0, atol=1e-9)


def test_lr2_sums_flat_with_one_half_inverted():
    # Linkwitz 1976: the 2nd-order outputs are 180 degrees apart; LP - HP is an all-pass.
    lp, hp = linkwitz_riley_response(F, 100.0, FS, 12)
    np.testing.assert_allclose(np.abs(lp - hp), 1.0, atol=1e-9)
    lp0, hp0 = linkwitz_riley_response(np.array([100.0]), 100.0, FS, 12)
    assert abs(lp0[0] + hp0[0]) < 1e-9  # in phase they cancel at the crossover


@pytest.mark.parametrize("slope", SLOPES_DB_OCT)
def test_each_half_is_minus_6_db_at_the_crossover(slope):
    # Linkwitz 1976: each output is a squared Butterworth, |H(fc)|^2 = (1/sqrt 2)^2 = -6.02 dB
    fc = 90.0
    lp, hp = linkwitz_riley_response(np.array([fc]), fc, FS, slope)
    assert 20 * np.log10(abs(lp[0])) == pytest.approx(-6.0206, abs=1e-3)
    assert 20 * np.log10(abs(hp[0])) == pytest.approx(-6.0206, abs=1e-3)


def test_lr4_outputs_are_in_phase():
    # Linkwitz 1976: the 4th-order low- and high-pass outputs are in phase at every frequency
    lp, hp = linkwitz_riley_response(F, 120.0, FS, 24)
    np.testing.assert_allclose(np.angle(lp * np.conj(hp)), 0.0, atol=1e-6)


def test_sections_are_butterworth_twice():
    # scipy's Butterworth design squared is the Linkwitz-Riley definition
    lp_sos, hp_sos = linkwitz_riley_sos(70.0, FS, 24)
    _, b = sosfreqz(butter(2, 70.0, "low", fs=FS, output="sos"), worN=F, fs=FS)
    _, l4 = sosfreqz(lp_sos, worN=F, fs=FS)
    np.testing.assert_allclose(l4, b**2, rtol=1e-9, atol=1e-12)
    _, hb = sosfreqz(butter(2, 70.0, "high", fs=FS, output="sos"), worN=F, fs=FS)
    _, h4 = sosfreqz(hp_sos, worN=F, fs=FS)
    np.testing.assert_allclose(h4, hb**2, rtol=1e-9, atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    fc=st.floats(20.0, 300.0),
    slope=st.sampled_from(SLOPES_DB_OCT),
    fs=st.sampled_from([44100, 48000, 96000]),
)
def test_a_crossover_never_boosts(fc, slope, fs):
    lp, hp = linkwitz_riley_response(F[F < fs / 2], fc, fs, slope)
    assert np.max(np.abs(lp)) <= 1 + 1e-12 and np.max(np.abs(hp)) <= 1 + 1e-12


def test_crossover_in_a_correction_filter_adds_no_boost():
    # a correction with a 4 dB boost at 60 Hz and a cut: the crossover only takes away
    grid = log_grid()
    corr = 4 * np.exp(-0.5 * (np.log2(grid / 60) / 0.3) ** 2) - 6 * (grid > 2000)
    h = synthesize_fir(grid, corr, FS, 16384)
    lp, hp = linkwitz_riley_sos(80.0, FS, 24)
    for sos in (lp, hp):
        assert peak_gain_db(apply_crossover(h, sos), FS) <= peak_gain_db(h, FS) + 0.01


def test_candidates_are_twelfth_octaves_across_the_range():
    c = crossover_candidates((50.0, 150.0))
    assert c[0] == 50.0 and c[-1] == pytest.approx(150.0)
    assert np.allclose(np.diff(np.log2(c)), np.log2(3) / (c.size - 1))
    assert np.all(np.diff(np.log2(c)) <= 1 / 12 + 1e-12)


@pytest.mark.parametrize("slope, polarity", [(24, 1), (48, 1), (12, -1)])
def test_search_recovers_a_known_delay_and_polarity(slope, polarity):
    """Analytic case: flat main and flat subwoofer in free field, the subwoofer 6 ms
    late. (6 ms is nearly half a period at the crossover, a deep cancellation
    as measured.) The best sum puts the subwoofer back in time (a 6 ms advance relative to
    the mains), in phase for LR4/LR8 and inverted for LR2 (Linkwitz 1976); the sum is
    then an all-pass (flat)."""
    f = search_grid_hz((60.0, 100.0))
    late_s = 0.006
    main = np.ones((1, 1, f.size), dtype=complex)
    sub = np.exp(-2j * np.pi * f * late_s)[None, :]
    res = search_integration(main, sub, main, sub, f, FS, (60.0, 100.0), slope)
    assert res.sub_polarity == polarity
    assert res.sub_delay_s == pytest.approx(-late_s, abs=DELAY_STEP_S / 2 + 1e-12)
    assert res.rms_dev_db < 0.02 and res.centre_dip_db < 0.05
    assert res.baseline_rms_dev_db > 1.0  # the late subwoofer alone leaves a dip
    assert res.n_candidates == crossover_candidates((60.0, 100.0)).size * 201 * 2


def _bumped_sums(f, n_sums, n_bumped, fc, height_db=3.0):
    """Flat sums; the first ``n_bumped`` carry a +height dB plateau 1/3 octave wide at fc."""
    level = np.zeros((n_sums, f.size))
    plateau = np.abs(np.log2(f / fc)) <= 1 / 6
    level[:n_bumped, plateau] = height_db
    return level, plateau


def test_shared_cut_takes_a_shared_plateau_down_to_the_mean():
    # analytic: a +3 dB plateau over 1/3 of the 2-octave region raises each sum's mean by
    # 3 * share of region points; the cut brings the plateau down to that mean, nothing else
    fc = 90.0
    f = search_grid_hz((50.0, 150.0))
    level, plateau = _bumped_sums(f, 10, 10, fc)
    mask = region_mask(f, fc)
    mean = 3.0 * plateau[mask].mean()
    cut = shared_cut_db(f, level, fc, 15.0)
    np.testing.assert_allclose(cut[plateau], -(3.0 - mean), atol=1e-9)
    assert np.all(cut[~plateau] == 0.0)
    # never deeper than the cut limit, never a boost
    deep = shared_cut_db(f, 4 * level, fc, 1.0)
    assert deep.min() == pytest.approx(-1.0) and deep.max() == 0.0


def test_shared_cut_needs_nearly_every_sum_to_agree():
    fc = 90.0
    f = search_grid_hz((50.0, 150.0))
    n = 10
    few = int(np.floor((1 - SHARED_CUT_SHARE) * n))  # a peak that too few sums show
    level, _ = _bumped_sums(f, n, few, fc)
    assert np.all(shared_cut_db(f, level, fc, 15.0) == 0.0)


def test_shared_cut_fades_out_beyond_the_region():
    # a peak at the region's top edge: the cut falls to 0 within SMOOTHING_OCT above 2 fc
    fc = 100.0
    f = search_grid_hz((50.0, 150.0))
    level = np.where(np.abs(np.log2(f / 200.0)) <= 1 / 12, 4.0, 0.0)[None].repeat(5, 0)
    cut = shared_cut_db(f, level, fc, 15.0)
    assert cut.min() < -3.0
    assert np.all(cut[f >= 200.0 * 2**SMOOTHING_OCT * (1 + 1e-9)] == 0.0)
    assert np.all(np.diff(cut[f >= 200.0]) >= -1e-12)  # rising monotonically to 0


def test_search_with_a_shared_cut_keeps_the_choice_and_includes_the_cut():
    """The same peak in both paths at every position: the shared cut is designed after
    the choice, so delay, polarity and crossover stay; the figures include the cut and
    the reported sums are smoother (the cut multiplies each sum exactly)."""
    f = search_grid_hz((60.0, 100.0))
    peak = 1 + 0.6 * np.exp(-0.5 * (np.log2(f / 110.0) / 0.08) ** 2)
    main = (peak * np.ones((2, 3, 1))).astype(complex)
    sub = peak * np.exp(-2j * np.pi * f * 0.004) * np.ones((3, 1))
    plain = search_integration(main, sub, main, sub, f, FS, (60.0, 100.0), 24)
    cut = search_integration(main, sub, main, sub, f, FS, (60.0, 100.0), 24, max_cut_db=15.0)
    assert plain.shared_cut_db is None
    assert (cut.crossover_hz, cut.sub_delay_s, cut.sub_polarity) == (
        plain.crossover_hz,
        plain.sub_delay_s,
        plain.sub_polarity,
    )
    assert cut.shared_cut_db.min() < -1.0 and cut.shared_cut_db.max() == 0.0
    assert cut.rms_dev_db < 0.5 * plain.rms_dev_db
    # the reported sums are the plain ones with the cut added (dB), up to the smoothing
    inside = region_mask(f, cut.crossover_hz)
    diff = cut.summed_after_db - plain.summed_after_db - cut.shared_cut_db
    assert np.max(np.abs(diff[..., inside])) < 0.5
