"""Tests of roomcorr.design.realise.biquad against the Audio EQ Cookbook, pyfar, numpy and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import freqz, sosfilt

from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise.biquad import Section
from roomcorr.errors import SafetyError

RATES = (44100, 48000, 96000)


def _db_at(c: np.ndarray, f_hz: float, fs: float) -> float:
    # Independent evaluation with scipy.signal.freqz (a0 = 1 restored).
    _, h = freqz(c[:3], [1.0, c[3], c[4]], worN=[f_hz], fs=fs)
    return float(20 * np.log10(abs(h[0])))


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("f0,gain,q", [(40.0, -12.0, 8.0), (1000.0, 3.5, 1.4), (15000.0, -6, 0.5)])
def test_peaking_defining_properties(fs, f0, gain, q):
    # Audio EQ Cookbook: peaking gain at f0 equals the set gain; unity at DC and Nyquist.
    c = bq.coefficients([Section("peaking", f0, gain, q)], fs)[0]
    assert _db_at(c, f0, fs) == pytest.approx(gain, abs=1e-9)
    assert sum(c[:3]) / (1 + c[3] + c[4]) == pytest.approx(1.0, abs=1e-9)
    assert (c[0] - c[1] + c[2]) / (1 - c[3] + c[4]) == pytest.approx(1.0, abs=1e-9)


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("gain", [-9.0, 4.0])
def test_shelf_asymptotes_and_midpoint(fs, gain):
    # Audio EQ Cookbook: shelves reach the set gain at DC (low) / Nyquist (high), 0 dB at the
    # other end, and gain/2 at the midpoint frequency f0 (bilinear pre-warped at f0).
    lo = bq.coefficients([Section("lowshelf", 200.0, gain, bq.SHELF_MAX_Q)], fs)[0]
    hi = bq.coefficients([Section("highshelf", 5000.0, gain, bq.SHELF_MAX_Q)], fs)[0]
    dc = lambda c: 20 * np.log10(abs(sum(c[:3]) / (1 + c[3] + c[4])))  # noqa: E731
    ny = lambda c: 20 * np.log10(abs((c[0] - c[1] + c[2]) / (1 - c[3] + c[4])))  # noqa: E731
    assert dc(lo) == pytest.approx(gain, abs=1e-9)
    assert ny(lo) == pytest.approx(0.0, abs=1e-9)
    assert dc(hi) == pytest.approx(0.0, abs=1e-9)
    assert ny(hi) == pytest.approx(gain, abs=1e-9)
    assert _db_at(lo, 200.0, fs) == pytest.approx(gain / 2, abs=1e-9)
    assert _db_at(hi, 5000.0, fs) == pytest.approx(gain / 2, abs=1e-9)


def test_shelf_q_limit_is_monotonic():
    # Cookbook: S = 1 (Q = 1/sqrt(2)) is the steepest shelf without overshoot.
    f = np.geomspace(10, 23000, 2000)
    for kind, gain in (("lowshelf", 6.0), ("highshelf", -8.0)):
        c = bq.coefficients([Section(kind, 800.0, gain, bq.SHELF_MAX_Q)], 48000)
        h = bq.cascade_response_db(c, f, 48000)
        assert np.min(h) >= min(gain, 0) - 1e-9 and np.max(h) <= max(gain, 0) + 1e-9
    over = bq.coefficients([Section("lowshelf", 800.0, 6.0, 2.0)], 48000)
    assert np.max(bq.cascade_response_db(over, f, 48000)) > 6.01  # the limit matters


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("f0,gain,q", [(63.0, -10.0, 6.0), (2500.0, 3.0, 0.9), (12000.0, -4, 2)])
def test_peaking_matches_pyfar_bell(fs, f0, gain, q):
    # pyfar.dsp.filter.bell, type 'III' ("half pad loss": bandwidth at gain/2) uses the
    # cookbook's analogue prototype (s^2 + s A/Q + 1)/(s^2 + s/(AQ) + 1). Its quality_warp
    # 'cos' pre-warps Q to Q cos(pi f0/fs) before the bilinear transform, while the cookbook
    # keeps Q; so pyfar quality = Q / cos(pi f0/fs) gives the same filter.
    pf = pytest.importorskip("pyfar")
    filt = pf.dsp.filter.bell(None, f0, gain, q / np.cos(np.pi * f0 / fs), bell_type="III",
                              quality_warp="cos", sampling_rate=fs)
    b, a = filt.coefficients[0]
    ours = bq.coefficients([Section("peaking", f0, gain, q)], fs)[0]
    np.testing.assert_allclose(ours, np.r_[b / a[0], a[1:] / a[0]], rtol=0, atol=1e-12)
    f = np.geomspace(10, 0.499 * fs, 400)
    _, h = freqz(b, a, worN=f, fs=fs)
    np.testing.assert_allclose(bq.cascade_response_db(ours[None], f, fs),
                               20 * np.log10(np.abs(h)), atol=1e-8)


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("kind", ["lowshelf", "highshelf"])
@pytest.mark.parametrize("gain", [-12.0, 4.0])
def test_shelves_match_pyfar(fs, kind, gain):
    # pyfar low_shelf/high_shelf, order 2, shelf_type 'III': characteristic frequency at
    # gain/2 (the cookbook midpoint) and Butterworth pole/zero quality 1/sqrt(2), i.e. the
    # cookbook shelf with Q = 1/sqrt(2) (S = 1). Both pre-warp only the frequency.
    pf = pytest.importorskip("pyfar")
    f0 = 150.0 if kind == "lowshelf" else 6000.0
    maker = pf.dsp.filter.low_shelf if kind == "lowshelf" else pf.dsp.filter.high_shelf
    b, a = maker(None, f0, gain, 2, shelf_type="III", sampling_rate=fs).coefficients[0]
    ours = bq.coefficients([Section(kind, f0, gain, bq.SHELF_MAX_Q)], fs)[0]
    f = np.geomspace(10, 0.499 * fs, 400)
    _, h = freqz(b, a, worN=f, fs=fs)
    np.testing.assert_allclose(bq.cascade_response_db(ours[None], f, fs),
                               20 * np.log10(np.abs(h)), atol=1e-8)


def test_analog_prototype_matches_digital_far_below_nyquist():
    # Bilinear transform: the digital response tends to the analogue prototype as f/fs -> 0.
    secs = [Section("peaking", 100.0, -6.0, 4.0), Section("lowshelf", 60.0, 3.0, 0.6),
            Section("highshelf", 300.0, -2.0, 0.5)]
    fs = 96000
    f = np.geomspace(10, 1000, 200)
    dig = bq.cascade_response_db(bq.coefficients(secs, fs), f, fs)
    np.testing.assert_allclose(bq.analog_response_db(secs, f), dig, atol=0.01)
    # ...and cramping near Nyquist is real: a 15 kHz peak at 44.1 kHz is visibly narrower.
    p = [Section("peaking", 15000.0, 4.0, 1.0)]
    f2 = np.array([19000.0])
    cramp = bq.analog_response_db(p, f2) - bq.cascade_response_db(bq.coefficients(p, 44100),
                                                                  f2, 44100)
    assert cramp[0] > 0.5


def test_analog_jacobian_matches_finite_differences():
    # Central differences (a standard numerical-derivative check).
    f = np.geomspace(10, 24000, 300)
    k = np.array([0, 1, 2, 0])
    f0 = np.array([100.0, 200.0, 5000.0, 3000.0])
    g = np.array([-6.0, 3.0, -4.0, 2.0])
    q = np.array([3.0, 0.6, 0.5, 1.2])
    _, jac = bq.analog_db_and_jacobian(k, f0, g, q, f)
    e = 1e-5
    for j, (df, dg, dq) in enumerate([(1, 0, 0), (0, 1, 0), (0, 0, 1)]):
        up = (f0 * 2 ** (e * df), g + e * dg, q * 2 ** (e * dq))
        dn = (f0 * 2 ** (-e * df), g - e * dg, q * 2 ** (-e * dq))
        hp = bq.analog_responses_from_arrays(k, *up, f)
        hm = bq.analog_responses_from_arrays(k, *dn, f)
        np.testing.assert_allclose(jac[:, j], (hp - hm) / (2 * e), atol=1e-5)


def test_pole_radii_match_numpy_roots():
    # numpy.roots of z^2 + a1 z + a2 as an independent pole computation.
    secs = [Section("peaking", 25.0, -15.0, 12.0), Section("highshelf", 9000.0, 4.0, 0.4),
            Section("lowshelf", 80.0, -3.0, 0.7)]
    c = bq.coefficients(secs, 48000)
    ref = [max(abs(np.roots([1.0, row[3], row[4]]))) for row in c]
    np.testing.assert_allclose(bq.pole_radii(c), ref, rtol=1e-12)
    bq.check_stability(c)


def test_check_stability_refuses_poles_at_or_outside_the_margin():
    c = np.array([[1.0, 0.0, 0.0, -1.9, 0.999999999]])  # |p| = sqrt(a2) > 1 - 1e-6
    with pytest.raises(SafetyError, match="stability"):
        bq.check_stability(c)
    with pytest.raises(SafetyError):
        bq.check_stability(np.array([[1.0, 0.0, 0.0, 0.0, 1.01]]))


def test_float32_plain_rounding_of_a_fragile_section_is_caught():
    # 30 Hz, Q 12, -15 dB at 48 kHz: rounding a1 to float32 moves the notch by ~0.05 Hz,
    # which changes the response by ~0.6 dB (measured); the check must refuse it.
    fs = 48000
    c = bq.coefficients([Section("peaking", 30.0, -15.0, 12.0)], fs)
    chk = bq.check_frequencies(fs)
    with pytest.raises(SafetyError, match="32-bit float"):
        bq.check_float32(c, chk, fs)
    # The estimate that steers the fit flags it as fragile too.
    est = bq.float32_sensitivity_db(np.array([0]), np.array([30.0]), np.array([-15.0]),
                                    np.array([12.0]), fs)
    assert est[0] > 0.3


def test_float32_quantised_cascade_is_stable_and_within_tolerance():
    fs = 96000
    secs = [Section("peaking", 45.0, -8.0, 4.0), Section("peaking", 130.0, -5.0, 6.0),
            Section("peaking", 900.0, 3.0, 1.5), Section("lowshelf", 40.0, 3.0, 0.7),
            Section("highshelf", 9000.0, -3.0, 0.5)]
    c = bq.coefficients(secs, fs)
    chk = bq.check_frequencies(fs)
    r = bq.quantise_float32(c, chk, fs)
    assert np.array_equal(r, r.astype(np.float32).astype(float))  # float32-exact
    dev = bq.check_float32(c, chk, fs, rounded=r)
    assert dev < bq.FLOAT32_TOL_DB
    # Independent check: scipy's sosfilt with the float32 coefficients on a sine at 130 Hz
    # (steady state, after the transient) matches the designed gain at 130 Hz to 0.1 dB.
    n = fs * 2
    t = np.arange(n) / fs
    y = sosfilt(bq.to_sos(r.astype(np.float32)).astype(np.float32),
                np.sin(2 * np.pi * 130.0 * t).astype(np.float32))
    amp_db = 20 * np.log10(np.sqrt(2) * np.std(y[n // 2:]))
    assert amp_db == pytest.approx(bq.cascade_response_db(c, [130.0], fs)[0], abs=0.1)


def test_check_float32_rejects_values_that_are_not_float32():
    c = bq.coefficients([Section("peaking", 1000.0, 3.0, 1.0)], 48000)
    with pytest.raises(ValueError):
        bq.check_float32(c, bq.check_frequencies(48000), 48000, rounded=c)


def test_worst_case_gain():
    # A pure gain section: sum |h| = gain. And sum |h| >= max |H| (triangle inequality).
    assert bq.worst_case_gain_db(np.array([[0.5, 0, 0, 0, 0]])) == pytest.approx(
        20 * np.log10(0.5))
    c = bq.coefficients([Section("peaking", 60.0, 4.0, 5.0), Section("peaking", 300, -6, 2)], 48000)
    peak = np.max(bq.cascade_response_db(c, bq.check_frequencies(48000, points_per_octave=96),
                                         48000))
    assert bq.worst_case_gain_db(c) >= peak - 1e-9


def test_section_validation():
    with pytest.raises(ValueError):
        Section("notch", 100.0, -3.0, 1.0)
    with pytest.raises(ValueError):
        bq.coefficients([Section("peaking", 30000.0, 1.0, 1.0)], 48000)
