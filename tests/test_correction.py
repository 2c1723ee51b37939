"""Correction curve and safety invariants, including property-based tests."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.design.curve.correction import DIP_REFUSE_DB, align_target, correction_curve
from roomcorr.design.curve.target import auto_band, band_fade, target_from_points, target_from_table
from roomcorr.design.realise.fir import default_n_taps, peak_gain_db, synthesize_fir
from roomcorr.design.realise.safety import apply_safety, common_pre_gain_db
from roomcorr.errors import SettingsError
from roomcorr.grid import log_grid

F = log_grid()


def _response(rng: np.random.Generator, n_nulls: int, null_depth_db: float) -> np.ndarray:
    """A random smooth response with narrow deep nulls (in dB on the grid)."""
    x = np.log2(F / 1000)
    db = sum(rng.normal(0, 3) * np.cos(k * x + rng.uniform(0, 6)) for k in range(1, 6))
    for _ in range(n_nulls):
        fc = np.exp(rng.uniform(np.log(30), np.log(15000)))
        width = rng.uniform(0.02, 0.15)
        db = db - null_depth_db * np.exp(-0.5 * (np.log2(F / fc) / width) ** 2)
    return db


def test_peak_is_cut_fully_dip_is_not_filled():
    x = np.log2(F / 100)
    measured = 8 * np.exp(-0.5 * (np.log2(F / 60) / 0.05) ** 2)  # +8 dB mode at 60 Hz
    measured -= 20 * np.exp(-0.5 * (np.log2(F / 300) / 0.03) ** 2)  # -20 dB null at 300 Hz
    measured += 0 * x
    spread = np.zeros_like(F)
    target = np.zeros_like(F)
    c = correction_curve(F, measured, spread, target, (20, 20000), 4.0, 15.0)
    i60, i300 = np.argmin(abs(F - 60)), np.argmin(abs(F - 300))
    assert np.isclose(c.correction_db[i60], -8.0, atol=0.01)  # peak cut fully
    assert c.correction_db[i300] < 0.5  # null left alone
    assert c.boost_withheld_db[i300] > 15


def test_shallow_broad_dip_is_boosted_up_to_cap():
    measured = -3 * np.exp(-0.5 * (np.log2(F / 2000) / 1.0) ** 2)  # broad 3 dB sag
    c = correction_curve(F, measured, np.zeros_like(F), np.zeros_like(F), (20, 20000), 4.0, 15)
    i = np.argmin(abs(F - 2000))
    assert np.isclose(c.correction_db[i], 3.0, atol=0.2)


def test_spread_refuses_boost():
    measured = -3 * np.exp(-0.5 * (np.log2(F / 2000) / 1.0) ** 2)
    spread = np.full_like(F, 8.0)  # positions disagree by 8 dB
    c = correction_curve(F, measured, spread, np.zeros_like(F), (20, 20000), 4.0, 15)
    assert c.correction_db.max() <= 1e-12


def test_outside_band_fades_to_zero():
    measured = np.full_like(F, -10.0)
    c = correction_curve(F, measured, np.zeros_like(F), np.zeros_like(F), (100, 1000), 4.0, 15)
    assert np.all(c.correction_db[F < 100 / 2**0.5] == 0)
    assert np.all(c.correction_db[F > 1000 * 2**0.5] == 0)
    assert np.all(np.abs(np.diff(c.correction_db)) < 0.5)  # no step at the edges


def test_band_fade_shape():
    w = band_fade(F, (100, 1000), 0.5)
    assert w[np.argmin(abs(F - 500))] == 1.0
    # Raised cosine: half way through the fade the weight is 0.5.
    assert np.isclose(w[np.argmin(abs(F - 100 / 2**0.25))], 0.5, atol=0.03)


def test_tilt_target_slope():
    t = target_from_table(F, {"tilt_db_per_octave": -0.7, "tilt_pivot_hz": 1000}, "t")
    assert np.isclose(t[np.argmin(abs(F - 1000))], 0.0, atol=0.01)
    assert np.isclose(t[np.argmin(abs(F - 2000))], -0.7, atol=0.01)


@pytest.mark.parametrize(
    "table",
    [
        {"tilt_db_per_octave": float("nan")},  # NaN passes a bare abs(x) > 3 test
        {"bass_shelf_db": float("inf")},
        {"tilt_db_per_octave": 3.5},
        {"bass_shelf_hz": 0.0},
        {"tilt_pivot_hz": "1000"},
        {"points": [[float("nan"), 1.0]]},
        {"points": [[1000.0, float("nan")]]},
        {"points": [[5.0, 1.0]]},  # below the design grid (10 Hz)
        {"points": [[30000.0, 1.0]]},  # above it (24 kHz)
        {"points": [[1000.0, 25.0]]},  # beyond the point gain limit
        {"points": [[1000.0, 1.0], [1000.0, 2.0]]},  # the same frequency twice
        {"points": [[1000.0, True]]},
        {"points": [[1000.0]]},
        {"points": "1000 1"},
        {"points": [[100.0 + k, 0.0] for k in range(65)]},
    ],
)
def test_target_table_values_are_checked(table):
    with pytest.raises(SettingsError):
        target_from_table(F, table, "t")


def test_target_points_alone_are_the_curve_files_interpolation():
    # A flat table with points is exactly the target of a frequency/dB text file
    # (interp_log, ends held): the app's dragged points and a curve file agree bit for bit.
    pts = [[2000.0, -1.5], [60.0, 3.0], [500.0, 0.5]]
    table = target_from_table(
        F, {"tilt_db_per_octave": 0.0, "bass_shelf_db": 0.0, "points": pts}, "t"
    )
    arr = np.array(sorted(pts))
    assert np.array_equal(table, target_from_points(F, arr[:, 0], arr[:, 1]))
    # linear in log frequency between points (the definition), held beyond the ends
    mid = np.argmin(abs(F - np.sqrt(60.0 * 500.0)))
    assert table[mid] == pytest.approx(1.75, abs=0.02)
    assert np.all(table[F <= 60.0] == 3.0) and np.all(table[F >= 2000.0] == -1.5)


def test_auto_band_finds_rolloff():
    # A 4th-order high-pass at 50 Hz and a 4th-order low-pass at 12 kHz
    # (Butterworth magnitudes |H|^2 = 1/(1 + (f/fc)^8), analytic): the -6 dB
    # points are at fc * (10^0.6 - 1)^(-1/8) and fc * (10^0.6 - 1)^(1/8).
    hp = 10 * np.log10(1 / (1 + (50 / F) ** 8))
    lp = 10 * np.log10(1 / (1 + (F / 12000) ** 8))
    lo, hi = auto_band(F, hp + lp)
    k = (10**0.6 - 1) ** (1 / 8)
    step = 2 ** (1 / 96)
    assert 50 / k / step <= lo <= 50 / k * step
    assert 12000 * k / step <= hi <= 12000 * k * step


def test_align_target_median():
    avg = np.full_like(F, 75.0)
    t = align_target(F, avg, np.zeros_like(F), (20, 20000))
    assert np.allclose(t, 75.0)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31),
    n_nulls=st.integers(0, 6),
    depth=st.floats(0, 40),
    boost=st.floats(0, 12),
    cut=st.floats(0, 40),
    tilt=st.floats(-3, 3),
    shelf=st.floats(-10, 10),
)
def test_caps_hold_for_any_input(seed, n_nulls, depth, boost, cut, tilt, shelf):
    rng = np.random.default_rng(seed)
    measured = _response(rng, n_nulls, depth)
    spread = np.abs(rng.normal(0, 2, F.size))
    target = target_from_table(F, {"tilt_db_per_octave": tilt, "bass_shelf_db": shelf}, "t")
    target = align_target(F, measured, target, (30, 16000))
    c = correction_curve(F, measured, spread, target, (30, 16000), boost, cut)
    assert c.correction_db.max() <= boost + 1e-9
    assert c.correction_db.min() >= -cut - 1e-9
    # Deep narrow dips never receive boost.
    env = 10 * np.log10(smooth_log_grid(10 ** (measured / 10), 96, 1.0))
    deep = env - measured >= DIP_REFUSE_DB
    assert np.all(c.correction_db[deep] <= 1e-9)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31),
    depth=st.floats(0, 40),
    boost=st.floats(0, 12),
    ceiling=st.floats(-12, 0),
)
def test_exported_filters_respect_ceiling_and_cap(seed, depth, boost, ceiling):
    rng = np.random.default_rng(seed)
    measured = _response(rng, 4, depth)
    target = align_target(F, measured, np.zeros_like(F), (25, 18000))
    c = correction_curve(F, measured, np.zeros_like(F), target, (25, 18000), boost, 20)
    firs = {
        fs: np.stack([synthesize_fir(F, c.correction_db, fs, default_n_taps(fs, 25.0))])
        for fs in (44100, 96000)
    }
    out, pre, stats = apply_safety(firs, ceiling, boost)
    for fs, h in out.items():
        assert peak_gain_db(h[0], fs) <= ceiling + 0.011
    for s in stats:
        assert s.max_boost_db <= boost + 0.3
        assert s.worst_case_gain_db >= s.peak_gain_db - 1e-6  # triangle inequality


def test_pre_gain_is_common_and_never_positive():
    assert common_pre_gain_db([3.0, -1.0], 0.0) == -3.0
    assert common_pre_gain_db([-2.0, -1.0], 0.0) == 0.0
    assert common_pre_gain_db([1.0], 2.0) == 0.0
