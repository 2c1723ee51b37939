"""Tests for roomcorr.analysis.smoothing (fractional-octave and variable-width smoothing)."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from roomcorr.analysis.smoothing import (
    VW_NARROW_OCT,
    VW_WIDE_OCT,
    smooth_bins_to_grid,
    smooth_fractional_octave,
    smooth_log_grid,
    variable_width_oct,
)
from roomcorr.grid import log_grid, points_per_octave_of

N_FFT = 2**13
N_BINS = N_FFT // 2 + 1


def _room_like_power(seed: int = 1) -> np.ndarray:
    """Power spectrum of a short invented response: a direct impulse, two damped
    resonances and a seeded decaying noise tail, so it has peaks and notches."""
    rng = np.random.default_rng(seed)
    n = 256
    t = np.arange(n)
    ir = 0.5 * rng.standard_normal(n) * np.exp(-t / 40.0)
    ir[0] += 3.0
    for period, tau in ((60.0, 50.0), (13.0, 20.0)):
        ir += np.sin(2 * np.pi * t / period) * np.exp(-t / tau)
    return np.abs(np.fft.rfft(ir, N_FFT)) ** 2


def _comb_power(delay: int = 100, a: float = 0.8) -> np.ndarray:
    """|1 + a exp(-j w delay)|^2 on the rfft bins: a comb with 14 dB deep notches."""
    h = np.zeros(delay + 1)
    h[0], h[delay] = 1.0, a
    return np.abs(np.fft.rfft(h, N_FFT)) ** 2


def _pyfar_smooth(power: np.ndarray, fraction: float) -> tuple[np.ndarray, float]:
    pf = pytest.importorskip("pyfar")
    sig = pf.Signal(power, 48000, n_samples=N_FFT, domain="freq")
    out, (_, actual_fraction) = pf.dsp.smooth_fractional_octave(sig, fraction)
    return np.real(out.freq_raw[0]), float(actual_fraction)


@pytest.mark.parametrize("make", [_room_like_power, _comb_power], ids=["room", "comb"])
@pytest.mark.parametrize("fraction", [1, 3, 6, 24])
def test_matches_pyfar_where_definitions_match(make, fraction):
    # Reference: pyfar.dsp.smooth_fractional_octave (Tylka, Boren & Choueiri 2017,
    # method 2, boxcar). Matched definitions: pyfar gets the power as its spectrum
    # (it averages whatever magnitude it is given), we use the width pyfar actually
    # used and pyfar's log axis (bin k at k + 1); bins whose window reaches past
    # Nyquist are left out (pyfar pads with the end value, we shrink the window).
    power = make()
    ref, actual = _pyfar_smooth(power, fraction)
    k = np.arange(N_BINS)
    ours = smooth_fractional_octave(power, actual, freq_hz=k + 1.0)
    inside = (k + 1) * 2 ** (0.5 / actual) < N_BINS
    err_db = np.abs(10 * np.log10(ours[inside] / ref[inside]))
    assert err_db.max() < 0.1
    # With true bin frequencies (our default) the two agree from about a hundred bins up.
    ours_true = smooth_fractional_octave(power, actual)
    upper = inside & (k >= 100)
    assert np.abs(10 * np.log10(ours_true[upper] / ref[upper])).max() < 0.1


def test_differs_from_pyfar_at_the_top_edge():
    # Documented difference: within half a window of Nyquist pyfar pads with the last
    # value, we shrink the window; a steep roll-off to Nyquist shows it.
    k = np.arange(N_BINS)
    power = 1.0 / (1.0 + (k / (0.8 * N_BINS)) ** 16)
    ref, actual = _pyfar_smooth(power, 3)
    ours = smooth_fractional_octave(power, actual, freq_hz=k + 1.0)
    edge = (k + 1) * 2 ** (0.5 / actual) >= N_BINS
    assert np.abs(10 * np.log10(ours[edge] / ref[edge])).max() > 0.5


def test_comb_smooths_to_its_mean_power():
    # Parseval: the mean of |1 + a e^{-jwd}|^2 over whole periods is 1 + a^2. From bin
    # 2000 up a third of an octave spans over 460 bins, 22 periods of 20.5 bins; the
    # partial period at the window ends leaves a ripple of at most about
    # 2a * period / (pi * width) = 0.023, i.e. 1.4 % of 1 + a^2.
    a = 0.8
    power = _comb_power(400, a)
    s = smooth_fractional_octave(power, 3)
    k = np.arange(N_BINS)
    sel = (k > 2000) & (k * 2 ** (1 / 6) < N_BINS)
    np.testing.assert_allclose(s[sel], 1 + a**2, rtol=0.015)
    # Unsmoothed, the comb swings from (1-a)^2 to (1+a)^2.
    assert power[sel].min() < 0.05 and power[sel].max() > 3.2


def test_constant_stays_constant():
    for fraction in (1, 3, 6, 48):
        s = smooth_fractional_octave(np.full((2, 3, 1025), 7.5), fraction)
        np.testing.assert_allclose(s, 7.5, rtol=1e-12)
    grid = log_grid()
    ppo = points_per_octave_of(grid)
    c = smooth_log_grid(np.full(grid.size, 0.25), ppo, variable_width_oct(grid))
    np.testing.assert_allclose(c, 0.25, rtol=1e-12)
    f = np.arange(1025) * 24000 / 1024
    g = smooth_bins_to_grid(np.full(1025, 3.0), f, grid, variable_width_oct(grid))
    np.testing.assert_allclose(g, 3.0, rtol=1e-12)


def test_single_line_energy_and_width():
    # A boxcar of total width w octaves with unit area on the log axis (Tylka et al.
    # 2017, eq. for the log-symmetric window): a line at bin k0 (cell k0 -/+ 1/2)
    # becomes a plateau of height ln((k0+1/2)/(k0-1/2)) / (w ln 2) from k0 2^-w/2
    # to k0 2^w/2, and the energy on the log axis, sum(s_k ln(cell ratio)), is kept.
    w = 1 / 3
    k0 = 3000
    power = np.zeros(N_BINS)
    power[k0] = 1.0
    s = smooth_fractional_octave(power, 1 / w)
    k = np.arange(N_BINS)
    cell_log = np.log((k[1:] + 0.5) / np.maximum(k[1:] - 0.5, 0.5))
    line_log = np.log((k0 + 0.5) / (k0 - 0.5))
    # (a Riemann sum of the trapezoid-shaped output over ~700 bins, hence rel=1e-4)
    assert np.sum(s[1:] * cell_log) == pytest.approx(line_log, rel=1e-4)
    nz = np.nonzero(s > 0)[0]
    assert abs(nz[0] - k0 * 2 ** (-w / 2)) <= 1.0
    assert abs(nz[-1] - k0 * 2 ** (w / 2)) <= 1.0
    plateau = s[nz[0] + 2 : nz[-1] - 1]
    np.testing.assert_allclose(plateau, line_log / (w * np.log(2)), rtol=1e-9)


def test_linear_ramp_has_log_symmetric_mean():
    # Analytic: the log-uniform mean of P(f) = a + b f over [f/r, f r] is
    # a + b f (r - 1/r) / (2 ln r). A linear-symmetric window (Hatziantoniou &
    # Mourjopoulos 2000, half-width m(k) bins) would return a + b f itself; the
    # log-symmetric window sits slightly higher, which is the point of Tylka et al.
    a, b = 2.0, 0.01
    k = np.arange(N_BINS, dtype=float)
    s = smooth_fractional_octave(a + b * k, 1.0)
    r = 2**0.5
    sel = (k > 100) & (k * r < N_BINS - 1)
    expect = a + b * k[sel] * (r - 1 / r) / (2 * np.log(r))
    np.testing.assert_allclose(s[sel], expect, rtol=1e-5)
    assert np.all(s[sel] > a + b * k[sel])


def test_dc_passed_through_and_batch_shape():
    rng = np.random.default_rng(3)
    p = rng.random((2, 3, 513))
    s = smooth_fractional_octave(p, 6)
    assert s.shape == p.shape
    np.testing.assert_array_equal(s[..., 0], p[..., 0])
    for i in range(2):
        for j in range(3):
            np.testing.assert_array_equal(s[i, j], smooth_fractional_octave(p[i, j], 6))


def test_quiet_top_survives_loud_bass():
    # Precision: 0 dB below bin 200 and -150 dB above; a plain running-sum
    # difference would bury the top in rounding noise of the bass total.
    power = np.where(np.arange(2**16 + 1) < 200, 1.0, 1e-15)
    s = smooth_fractional_octave(power, 6)
    np.testing.assert_allclose(s[400:], 1e-15, rtol=1e-9)


def test_large_input_no_quadratic_memory():
    # O(N) memory: 2^20 bins with a window of thousands of bins per output. An N-by-N
    # (or N-by-window) intermediate would need terabytes (gigabytes); we allow a
    # small multiple of the input size.
    n = 2**20 + 1
    power = 1.0 + np.cos(np.arange(n) * 0.001) ** 2
    tracemalloc.start()
    try:
        s = smooth_fractional_octave(power, 6)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 30 * power.nbytes
    assert np.all(np.isfinite(s)) and s.shape == power.shape


# --- smooth_log_grid ------------------------------------------------------------------------


def test_log_grid_odd_width_is_a_moving_average():
    # Reference: scipy.ndimage.uniform_filter1d (a plain moving average) for a window
    # of exactly 2m+1 grid points, away from the ends.
    from scipy.ndimage import uniform_filter1d

    rng = np.random.default_rng(7)
    v = rng.random((2, 500))
    ppo = 48.0
    for m in (1, 4, 8):
        width = (2 * m + 1) / ppo
        s = smooth_log_grid(v, ppo, width)
        ref = uniform_filter1d(v, 2 * m + 1, axis=-1)
        np.testing.assert_allclose(s[:, m:-m], ref[:, m:-m], rtol=1e-12)


def _brute_force_log_grid(v: np.ndarray, ppo: float, width: np.ndarray) -> np.ndarray:
    """Direct definition: mean over [i - h, i + h] of the piecewise-constant cells
    [j - 1/2, j + 1/2], window shrunk symmetrically at the ends (O(n^2), test only)."""
    n = v.size
    out = np.empty(n)
    for i in range(n):
        h = min(width[i] * ppo / 2, i + 0.5, n - 0.5 - i)
        if h == 0:
            out[i] = v[i]
            continue
        j = np.arange(n)
        overlap = np.clip(np.minimum(j + 0.5, i + h) - np.maximum(j - 0.5, i - h), 0, None)
        out[i] = np.sum(overlap * v) / (2 * h)
    return out


def test_log_grid_variable_width_matches_definition():
    rng = np.random.default_rng(11)
    grid = log_grid(20.0, 20000.0, 24)
    ppo = points_per_octave_of(grid)
    v = rng.random(grid.size) ** 4
    width = rng.uniform(0.0, 0.8, grid.size)
    np.testing.assert_allclose(
        smooth_log_grid(v, ppo, width), _brute_force_log_grid(v, ppo, width), rtol=1e-10
    )


def test_log_grid_zero_and_sub_cell_width_keep_values():
    # A window no wider than one grid cell lies inside that cell (piecewise constant).
    v = np.random.default_rng(4).random(300)
    np.testing.assert_array_equal(smooth_log_grid(v, 96, 0.0), v)
    np.testing.assert_allclose(smooth_log_grid(v, 96, 1 / 96), v, rtol=1e-12)


def test_log_grid_constant_array_equals_scalar_width():
    rng = np.random.default_rng(5)
    v = rng.random((3, 400))
    fixed = smooth_log_grid(v, 96, 1 / 6)
    var = smooth_log_grid(v, 96, np.full(400, 1 / 6))
    np.testing.assert_array_equal(fixed, var)


def test_log_grid_edges_shrink_symmetrically():
    v = np.arange(50, dtype=float) ** 2
    s = smooth_log_grid(v, 12, 2.0)  # 24 points wide
    assert s[0] == v[0] and s[-1] == v[-1]
    assert s[2] == pytest.approx(np.mean(v[0:5]))  # half-width 2.5 points, cells 0..4
    assert s[-3] == pytest.approx(np.mean(v[-5:]))
    assert s[20] == pytest.approx(_brute_force_log_grid(v, 12, np.full(50, 2.0))[20])


# --- smooth_bins_to_grid --------------------------------------------------------------------


def test_bins_to_grid_equals_smoothing_then_reading_at_bins():
    power = _room_like_power(2)
    fs = 48000
    f = np.arange(N_BINS) * fs / N_FFT
    full = smooth_fractional_octave(power, 6, f)
    at = f[[10, 100, 1000, 3000]]
    np.testing.assert_allclose(
        smooth_bins_to_grid(power, f, at, 1 / 6), full[[10, 100, 1000, 3000]], rtol=1e-12
    )


def test_bins_to_grid_comb_on_log_grid():
    # Parseval as above, now read straight onto the project's log grid; beyond Nyquist
    # the grid holds the value at the last bin.
    a = 0.8
    power = _comb_power(400, a)
    fs = 48000
    f = np.arange(N_BINS) * fs / N_FFT
    grid = log_grid(10.0, 30000.0, 96)
    s = smooth_bins_to_grid(power, f, grid, 1 / 3)
    sel = (grid > 12000) & (grid < 20000)
    np.testing.assert_allclose(s[sel], 1 + a**2, rtol=0.015)
    assert np.all(s[grid > fs / 2] == s[grid > fs / 2][0])


# --- variable_width_oct ---------------------------------------------------------------------


def test_variable_width_rule():
    f = np.array([0.0, 10.0, 50.0, 100.0, np.sqrt(1e5), 1000.0, 5000.0, 24000.0])
    w = variable_width_oct(f)
    np.testing.assert_allclose(w[:4], 1 / 48, rtol=1e-12)
    np.testing.assert_allclose(w[5:], 1 / 8, rtol=1e-12)
    # Midway in log frequency (316 Hz) the log width is midway: geometric mean.
    assert w[4] == pytest.approx(np.sqrt(VW_NARROW_OCT * VW_WIDE_OCT), rel=1e-12)
    fine = np.geomspace(50, 2000, 2000)
    wf = variable_width_oct(fine)
    assert np.all(np.diff(wf) >= 0)
    # Raised cosine in log frequency: the slope of log width against log frequency
    # is 0 at both ends and peaks mid-way at log2(wide/narrow) * (pi / 2) / log2(10).
    slope = np.diff(np.log2(wf)) / np.diff(np.log2(fine))
    assert abs(slope[np.searchsorted(fine, 100.5)]) < 0.02
    assert abs(slope[np.searchsorted(fine, 995.0)]) < 0.02
    assert slope.max() == pytest.approx(
        np.log2(VW_WIDE_OCT / VW_NARROW_OCT) * (np.pi / 2) / np.log2(10), rel=1e-3
    )


def test_variable_width_reduces_to_fixed_width_when_constant():
    rng = np.random.default_rng(9)
    power = rng.random(4097)
    f = np.arange(4097) * 24000 / 4096
    grid = f[1:]
    np.testing.assert_allclose(
        smooth_bins_to_grid(power, f, grid, np.full(grid.size, 1 / 6)),
        smooth_fractional_octave(power, 6, f)[1:],
        rtol=1e-12,
    )


def test_bad_inputs():
    with pytest.raises(ValueError):
        smooth_fractional_octave(np.ones(100), 0)
    with pytest.raises(ValueError):
        smooth_fractional_octave(np.array([1.0, np.nan, 1.0]), 3)
    with pytest.raises(ValueError):
        smooth_fractional_octave(np.ones(10), 3, freq_hz=np.arange(9.0))
    with pytest.raises(ValueError):
        smooth_fractional_octave(np.ones(3), 3, freq_hz=np.array([0.0, 2.0, 1.0]))
    with pytest.raises(ValueError):
        smooth_log_grid(np.ones(10), 12, -1.0)
    with pytest.raises(ValueError):
        smooth_log_grid(np.ones(10), 0, 1.0)
