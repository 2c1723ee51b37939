"""Tests for roomcorr.design.realise.fir (minimum-phase FIR synthesis from a gain curve)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from roomcorr.design.phase.minphase import minimum_phase
from roomcorr.design.realise.fir import (
    default_n_taps,
    fir_response_db,
    peak_gain_db,
    synthesize_fir,
    tail_window,
    worst_case_gain_db,
)
from roomcorr.grid import interp_log, log_grid

GRID_HZ = log_grid()

# An invented correction: cut a 45 Hz mode, lift a 120 Hz dip, gentle mid and top shaping
PEAKS = [(45.0, -10.0, 5.0), (120.0, 4.0, 2.0), (1000.0, -3.0, 1.0), (8000.0, 2.0, 0.7)]


def _peaking_sos(f0_hz: float, gain_db: float, q: float, fs: float) -> np.ndarray:
    """Peaking biquad, Audio EQ Cookbook (Bristow-Johnson; W3C Note 2021)."""
    a_lin = 10 ** (gain_db / 40)
    w0 = 2 * np.pi * f0_hz / fs
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 + alpha * a_lin, -2 * np.cos(w0), 1 - alpha * a_lin])
    a = np.array([1 + alpha / a_lin, -2 * np.cos(w0), 1 - alpha / a_lin])
    return np.r_[b / a[0], a / a[0]]


def _cookbook_curve(fs_design: float) -> tuple[np.ndarray, np.ndarray]:
    """The PEAKS cascade designed at fs_design and its gain in dB on GRID_HZ."""
    sos = np.array([_peaking_sos(f, g, q, fs_design) for f, g, q in PEAKS])
    _, resp = scipy.signal.sosfreqz(sos, worN=GRID_HZ, fs=fs_design)
    return sos, 20 * np.log10(np.abs(resp))


def test_default_n_taps_examples_and_rule():
    # rule from the docstring: shortest power of two with fs/N <= f_low/6, at least 4096
    assert default_n_taps(48000, 20) == 32768  # 48000*12/20 = 28800 -> 32768
    assert default_n_taps(44100, 20) == 32768  # 26460 -> 32768
    assert default_n_taps(96000, 20) == 65536  # 57600 -> 65536
    assert default_n_taps(48000, 400) == 4096  # 1440 -> floor of 4096
    assert default_n_taps(48000, 30) == 32768  # 19200 -> 32768
    assert default_n_taps(48000, 60) == 16384  # 9600 -> 16384
    for fs in (8000, 44100, 48000, 88200, 96000, 192000):
        for f_low in (5.0, 10.0, 20.0, 25.0, 50.0, 100.0, 1000.0):
            n = default_n_taps(fs, f_low)
            assert n & (n - 1) == 0 and n >= 4096
            assert fs / n <= f_low / 12
            assert n == 4096 or fs / (n // 2) > f_low / 12  # shortest
    with pytest.raises(ValueError, match="f_low_hz"):
        default_n_taps(48000, 0)
    with pytest.raises(ValueError, match="fs"):
        default_n_taps(-1, 20)


def test_flat_curve_gives_unit_impulse():
    # analytic: |H| = 1 has cepstrum 0, so the minimum-phase filter is δ[n]
    for fs in (44100, 48000, 96000):
        h = synthesize_fir(GRID_HZ, np.zeros_like(GRID_HZ), fs, 4096)
        expected = np.zeros(4096)
        expected[0] = 1.0
        np.testing.assert_allclose(h, expected, atol=1e-12)


def test_constant_gain_gives_scaled_impulse():
    # analytic: a constant -6 dB is the impulse scaled by 10**(-6/20)
    h = synthesize_fir(GRID_HZ, np.full_like(GRID_HZ, -6.0), 48000, 4096)
    assert h[0] == pytest.approx(10 ** (-6 / 20), abs=1e-12)
    np.testing.assert_allclose(h[1:], 0.0, atol=1e-12)


@pytest.mark.parametrize("fs", [44100, 48000, 96000])
def test_synthesised_filter_follows_curve(fs):
    # the curve is an Audio EQ Cookbook cascade evaluated by scipy (designed at
    # 192 kHz so its shape is nearly free of bilinear warping up to 24 kHz)
    _, curve_db = _cookbook_curve(192000)
    n_taps = default_n_taps(fs, 20)
    h = synthesize_fir(GRID_HZ, curve_db, fs, n_taps)
    assert h.shape == (n_taps,) and h.dtype == np.float64
    f = GRID_HZ[(GRID_HZ >= 20) & (GRID_HZ <= 20000)]
    err = fir_response_db(h, fs, f) - interp_log(f, GRID_HZ, curve_db)
    assert np.max(np.abs(err)) < 0.1


def test_matches_cookbook_impulse_response_at_48k():
    # cookbook peaking filters are minimum phase (poles and zeros inside the
    # unit circle), so the FIR synthesised from their magnitude must equal
    # their own impulse response (scipy.signal.sosfilt), not just its magnitude
    fs = 48000
    sos, curve_db = _cookbook_curve(fs)
    n_taps = default_n_taps(fs, 20)
    h = synthesize_fir(GRID_HZ, curve_db, fs, n_taps)
    ref = scipy.signal.sosfilt(sos, np.r_[1.0, np.zeros(n_taps - 1)])
    np.testing.assert_allclose(h, ref, atol=1e-4 * np.max(np.abs(ref)))


def test_synthesised_filter_is_minimum_phase():
    _, curve_db = _cookbook_curve(192000)
    fs = 48000
    n_taps = default_n_taps(fs, 20)
    h = synthesize_fir(GRID_HZ, curve_db, fs, n_taps)
    # energy concentrated at the start
    assert np.sum(h[: n_taps // 10] ** 2) / np.sum(h**2) > 0.999
    # taking the minimum phase again changes nothing (it is its own min-phase version)
    np.testing.assert_allclose(minimum_phase(h), h, atol=1e-6 * np.max(np.abs(h)))


def test_curve_held_outside_grid():
    # a step in gain at the grid ends: bins below the grid take the first
    # value, bins above take the last (DC and Nyquist included)
    grid = log_grid(100.0, 10000.0, 24)
    gain = np.linspace(-3.0, 5.0, grid.size)
    fs = 48000
    h = synthesize_fir(grid, gain, fs, 8192)
    dc_db = 20 * np.log10(abs(np.sum(h)))
    nyq_db = 20 * np.log10(abs(np.sum(h * (-1.0) ** np.arange(h.size))))
    assert dc_db == pytest.approx(-3.0, abs=0.05)
    assert nyq_db == pytest.approx(5.0, abs=0.05)


def test_tail_window_shape():
    w = tail_window(1000)
    np.testing.assert_array_equal(w[:750], 1.0)
    assert np.all(np.diff(w[750:]) < 0) and 0 < w[-1] < 1e-4
    # half-Hann: 0.5 at the middle of the fade (Hann definition, common practice)
    assert w[750 + 125 - 1] == pytest.approx(0.5, abs=0.01)


def test_fir_response_db_against_direct_dtft():
    # direct evaluation of H(f) = sum h[n] exp(-j 2 pi f n / fs) (DTFT definition)
    rng = np.random.default_rng(11)
    h = rng.standard_normal(37)
    fs = 44100
    f = np.array([0.0, 17.0, 440.0, 1234.5, 10000.0, 22050.0])
    n = np.arange(h.size)
    direct = np.abs(np.exp(-2j * np.pi * np.outer(f, n) / fs) @ h)
    np.testing.assert_allclose(fir_response_db(h, fs, f), 20 * np.log10(direct), atol=1e-9)


def test_peak_gain_of_cookbook_peak():
    # Audio EQ Cookbook: the peaking filter's gain at f0 equals the set gain,
    # and it is the maximum of the response
    fs = 48000
    sos = np.array([_peaking_sos(1000.0, 6.0, 2.0, fs)])
    h = scipy.signal.sosfilt(sos, np.r_[1.0, np.zeros(4095)])
    assert peak_gain_db(h, fs) == pytest.approx(6.0, abs=0.01)
    # outside the band the peak is not seen
    assert peak_gain_db(h, fs, 20.0, 200.0) < 0.5
    # f_hi above Nyquist is limited to Nyquist, no error
    assert peak_gain_db(h, fs, 20.0, 40000.0) == pytest.approx(6.0, abs=0.01)


def test_worst_case_bounds_peak_gain():
    # triangle inequality: |H(f)| = |sum h e^{-j..}| <= sum |h|
    rng = np.random.default_rng(5)
    fs = 48000
    for _ in range(5):
        gains = rng.uniform(-12, 6, size=4)
        freqs = np.exp(rng.uniform(np.log(30), np.log(15000), size=4))
        curve = np.zeros_like(GRID_HZ)
        for f0, g in zip(freqs, gains, strict=True):
            curve += g * np.exp(-0.5 * (np.log2(GRID_HZ / f0) / 0.3) ** 2)
        h = synthesize_fir(GRID_HZ, curve, fs, 4096)
        assert worst_case_gain_db(h) >= peak_gain_db(h, fs, 0.0, fs / 2) - 1e-9
    # equality for an impulse; a known sum for a small filter
    assert worst_case_gain_db(np.r_[1.0, np.zeros(9)]) == pytest.approx(0.0, abs=1e-12)
    assert worst_case_gain_db(np.array([0.5, -0.5, 1.0])) == pytest.approx(20 * np.log10(2.0))


def test_same_curve_same_filter():
    _, curve_db = _cookbook_curve(192000)
    a = synthesize_fir(GRID_HZ, curve_db, 48000, 4096)
    b = synthesize_fir(GRID_HZ, curve_db, 48000, 4096)
    np.testing.assert_array_equal(a, b)


def test_rejects_bad_curves():
    with pytest.raises(ValueError, match="same length"):
        synthesize_fir(GRID_HZ, np.zeros(3), 48000, 4096)
    with pytest.raises(ValueError, match="finite"):
        synthesize_fir(GRID_HZ, np.full_like(GRID_HZ, np.nan), 48000, 4096)
    with pytest.raises(ValueError, match="increasing"):
        synthesize_fir(GRID_HZ[::-1], np.zeros_like(GRID_HZ), 48000, 4096)
    with pytest.raises(ValueError, match="n_taps"):
        synthesize_fir(GRID_HZ, np.zeros_like(GRID_HZ), 48000, 0)


def test_peak_gain_finds_peak_between_bins():
    # a rectangular-windowed sinusoid has a main lobe fs/n wide; with f0 half
    # way between the 8x zero-padded bins the sampled maximum is low by about
    # 0.05 dB. Reference: the DTFT definition evaluated directly on a fine grid.
    fs, n = 48000, 4096
    bin_hz = fs / (8 * n)
    f0 = 683.5 * bin_hz
    h = np.cos(2 * np.pi * f0 * np.arange(n) / fs) / (n / 2)
    f = np.linspace(f0 - 2.0, f0 + 2.0, 401)
    direct = np.abs(np.exp(-2j * np.pi * np.outer(f, np.arange(n)) / fs) @ h)
    true_db = 20 * np.log10(np.max(direct))
    sampled_db = 20 * np.log10(np.max(np.abs(np.fft.rfft(h, 8 * n))))
    assert sampled_db < true_db - 0.02  # the bins alone would miss it
    assert peak_gain_db(h, fs) == pytest.approx(true_db, abs=1e-3)


def test_peak_gain_at_band_edge():
    # h = [0.5, -0.5]: |H(f)| = sin(pi f / fs), rising to Nyquist (analytic),
    # so the peak inside 20 Hz .. 20 kHz is at the upper edge
    fs = 48000
    h = np.array([0.5, -0.5])
    expected = 20 * np.log10(np.sin(np.pi * 20000 / fs))
    assert peak_gain_db(h, fs) == pytest.approx(expected, abs=1e-9)
    assert peak_gain_db(h, fs, 20.0, 1000.0) == pytest.approx(
        20 * np.log10(np.sin(np.pi * 1000 / fs)), abs=1e-9
    )
