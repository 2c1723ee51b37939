"""Tests for roomcorr.design.phase.minphase (cepstral minimum phase)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from roomcorr.design.phase.minphase import (
    fft_length,
    fold_window,
    magnitude_error_db,
    minimum_phase,
    minimum_phase_spectrum,
)

FS = 48000

# Zeros inside the unit circle, placed by hand: a polynomial with only these
# zeros is minimum phase by definition (Oppenheim & Schafer, 3rd ed., 5.6).
ZEROS_INSIDE = [0.9 * np.exp(0.3j), 0.9 * np.exp(-0.3j), 0.5, -0.7]


def _poly(zeros) -> np.ndarray:
    return np.real(np.poly(zeros))


def _dense_error_db(h_a: np.ndarray, h_b: np.ndarray, n_fft: int, range_db: float = 60.0):
    """Max |dB difference| of two responses on a dense grid, within range_db of b's peak."""
    mag_b = np.abs(np.fft.rfft(h_b, n_fft))
    return magnitude_error_db(h_a, mag_b, n_fft, range_db)


def _modal_room(n: int, t60_s: float) -> np.ndarray:
    """Invented small room: direct sound after 120 samples plus six damped low modes."""
    rng = np.random.default_rng(3)
    h = np.zeros(n)
    delay = 120
    h[delay] = 1.0
    t = np.arange(n - delay) / FS
    for f0 in (38.0, 55.0, 71.0, 96.0, 130.0, 170.0):
        phase = rng.uniform(0, 2 * np.pi)
        h[delay:] += 0.05 * np.exp(-t * 6.9 / t60_s) * np.sin(2 * np.pi * f0 * t + phase)
    return h


def _peaking_sos(f0_hz: float, gain_db: float, q: float) -> np.ndarray:
    """Peaking biquad, Audio EQ Cookbook (Bristow-Johnson; W3C Note 2021)."""
    a_lin = 10 ** (gain_db / 40)
    w0 = 2 * np.pi * f0_hz / FS
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 + alpha * a_lin, -2 * np.cos(w0), 1 - alpha * a_lin])
    a = np.array([1 + alpha / a_lin, -2 * np.cos(w0), 1 - alpha / a_lin])
    return np.r_[b / a[0], a / a[0]]


def _cascade_ir(n: int) -> np.ndarray:
    sos = np.array([_peaking_sos(80.0, 6.0, 5.0), _peaking_sos(2000.0, -8.0, 2.0)])
    return scipy.signal.sosfilt(sos, np.r_[1.0, np.zeros(n - 1)])


def test_fold_window_values_and_even_part():
    # Oppenheim & Schafer eq. 13.42b: 2u[n] - δ[n], weight 1 at 0 and at N/2 (N even)
    np.testing.assert_array_equal(fold_window(8), [1, 2, 2, 2, 1, 0, 0, 0])
    np.testing.assert_array_equal(fold_window(7), [1, 2, 2, 2, 0, 0, 0])
    # the folded cepstrum must keep the even part c[n]: w[n] + w[-n mod N] == 2
    for n in (1, 2, 7, 8, 33, 64):
        w = fold_window(n)
        np.testing.assert_array_equal(w + np.roll(w[::-1], 1), 2.0)


def test_spectrum_keeps_magnitude_and_matches_hilbert_phase():
    # the minimum phase is minus the Hilbert transform of ln|H| (Oppenheim &
    # Schafer 13.5.1); scipy.signal.hilbert computes that transform independently
    n_fft = 1024
    h = _modal_room(256, 0.05)
    mag_full = np.abs(np.fft.fft(h, n_fft))
    mag = mag_full[: n_fft // 2 + 1]
    spec = minimum_phase_spectrum(mag, n_fft)
    np.testing.assert_allclose(np.abs(spec), mag, rtol=1e-10)
    phase_ref = -np.imag(scipy.signal.hilbert(np.log(mag_full)))[: n_fft // 2 + 1]
    np.testing.assert_allclose(np.angle(spec * np.exp(-1j * phase_ref)), 0.0, atol=1e-10)


def test_spectrum_flat_and_zero_input():
    # flat magnitude: ln 1 = 0, cepstrum 0, spectrum 1 (analytic)
    np.testing.assert_allclose(minimum_phase_spectrum(np.ones(9), 16), 1.0, atol=1e-15)
    # an all-zero magnitude is floored: finite output, no warnings
    with np.errstate(all="raise"):
        out = minimum_phase_spectrum(np.zeros(9), 16)
    assert np.all(np.isfinite(out))
    with pytest.raises(ValueError, match="bins"):
        minimum_phase_spectrum(np.ones(8), 16)
    with pytest.raises(ValueError, match="non-negative"):
        minimum_phase_spectrum(-np.ones(9), 16)


def test_fft_length_is_power_of_two_at_least_oversample_n():
    for n in (1, 5, 100, 4096, 5000):
        for o in (1, 3, 8):
            m = fft_length(n, o)
            assert m >= o * n and m & (m - 1) == 0 and m // 2 < o * n


def test_minimum_phase_polynomial_is_unchanged():
    # analytic: all zeros inside the unit circle, so the result is the input
    h = _poly(ZEROS_INSIDE)
    np.testing.assert_allclose(minimum_phase(h, oversample=64), h, atol=1e-12)
    # default 8x: cepstral aliasing of the 0.9 zeros (0.9**64 ~ 1e-3, divided by n) remains
    np.testing.assert_allclose(minimum_phase(h), h, atol=1e-4)


def test_mixed_phase_zeros_are_reflected():
    # analytic: a zero z outside the unit circle is replaced by 1/conj(z) and
    # the gain by |z| (Oppenheim & Schafer 5.6, all-pass decomposition)
    zeros_out = [1.6 * np.exp(2j), 1.6 * np.exp(-2j), -2.5]
    h = _poly(ZEROS_INSIDE + zeros_out)
    reflected = [1 / np.conj(z) for z in zeros_out]
    expected = _poly(ZEROS_INSIDE + reflected) * np.prod(np.abs(zeros_out))
    np.testing.assert_allclose(minimum_phase(h, oversample=64), expected, atol=1e-11)
    np.testing.assert_allclose(minimum_phase(h), expected, atol=1e-4 * np.max(expected))


def test_magnitude_within_0p01_db():
    zeros_out = [1.6 * np.exp(2j), 1.6 * np.exp(-2j), -2.5]
    cases = [
        _poly(ZEROS_INSIDE + zeros_out),
        _modal_room(4096, 0.1),
        # two Audio EQ Cookbook peaking filters (+6 dB at 80 Hz, -8 dB at 2 kHz), delayed
        np.r_[np.zeros(300), _cascade_ir(7892)],
    ]
    for h in cases:
        err = _dense_error_db(minimum_phase(h), h, 16 * fft_length(h.size))
        assert err < 0.01, err


def test_error_bound_option_doubles_fft_until_met():
    # a faster decay in this invented room leaves zeros near the unit circle:
    # 8x is not enough there, the max_error_db option must fix it
    h = _modal_room(4096, 0.04)
    dense = 64 * 4096
    assert _dense_error_db(minimum_phase(h), h, dense) > 0.1
    errors = [_dense_error_db(minimum_phase(h, o), h, dense) for o in (8, 16, 32, 64)]
    assert all(b < a for a, b in zip(errors, errors[1:], strict=False))  # aliasing falls with N
    assert _dense_error_db(minimum_phase(h, max_error_db=0.01), h, dense) < 0.01


def test_no_energy_before_peak():
    # a pure delay has a unit impulse as minimum-phase equivalent (analytic);
    # the delayed room response must come out with its peak first
    h = _modal_room(4096, 0.1)
    h_min = minimum_phase(h)
    peak = int(np.argmax(np.abs(h_min)))
    before = np.sum(h_min[:peak] ** 2) / np.sum(h_min**2)
    assert before <= 1e-6  # -60 dB
    assert peak < 5


def test_matches_scipy_homomorphic_full_magnitude():
    # scipy.signal.minimum_phase(half=False), SciPy >= 1.14, same even FFT length;
    # scipy adds 1e-7 * min|H| before the log, hence the tolerance
    h = _modal_room(4096, 0.1)
    n_fft = fft_length(h.size)
    ref = scipy.signal.minimum_phase(h, method="homomorphic", half=False, n_fft=n_fft)
    np.testing.assert_allclose(minimum_phase(h), ref, atol=1e-6 * np.max(np.abs(ref)))


def test_matches_pyfar_and_scipy_on_analytic_symmetric_case():
    # pyfar first replaces the phase by a linear phase, so compare on a
    # symmetric input with non-negative amplitude: h = g * reversed(g) has
    # |H| = |G|^2, and its minimum-phase equivalent is g * g (analytic)
    pyfar = pytest.importorskip("pyfar")
    g = _poly(ZEROS_INSIDE)
    h = np.convolve(g, g[::-1])
    expected = np.convolve(g, g)
    n_fft = 8192
    ours = minimum_phase(h, oversample=n_fft // h.size)
    assert fft_length(h.size, n_fft // h.size) == n_fft
    ref_pyfar = pyfar.dsp.minimum_phase(pyfar.Signal(h, FS), n_fft=n_fft, truncate=False)
    ref_scipy = scipy.signal.minimum_phase(h, method="homomorphic", half=False, n_fft=n_fft)
    np.testing.assert_allclose(ours, expected, atol=1e-10)
    np.testing.assert_allclose(ref_pyfar.time[0], expected, atol=1e-8)
    np.testing.assert_allclose(ref_scipy, expected, atol=1e-5)


def test_batch_shape_matches_single():
    rng = np.random.default_rng(7)
    h = rng.standard_normal((2, 3, 64)) * np.exp(-np.arange(64) / 8)
    out = minimum_phase(h)
    assert out.shape == h.shape and out.dtype == np.float64
    for i in range(2):
        for j in range(3):
            np.testing.assert_allclose(out[i, j], minimum_phase(h[i, j]), atol=1e-13)


def test_rejects_complex_and_bad_oversample():
    with pytest.raises(ValueError, match="real"):
        minimum_phase(np.ones(4, dtype=complex))
    with pytest.raises(ValueError, match="oversample"):
        minimum_phase(np.ones(4), oversample=0)
