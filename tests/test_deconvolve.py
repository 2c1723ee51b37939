"""Tests for roomcorr.measure.deconvolve against analytic cases and scipy convolution."""

import numpy as np
import pytest
from scipy.signal import fftconvolve

from roomcorr.measure.deconvolve import (
    band_energy_error_db,
    deconvolve,
    fractional_shift,
    harmonic_distortion,
    iec_band_centres,
    peak_lag,
    split_harmonics,
)
from roomcorr.measure.sweep import synchronized_sweep

FS = 48000


def invented_room(n=4800, delay=300, seed=7):
    """A direct sound, one reflection and a decaying diffuse tail (seeded)."""
    rng = np.random.default_rng(seed)
    h = np.zeros(n)
    h[delay] = 0.6
    h[delay + 170] = -0.25
    m = n - delay
    h[delay:] += 0.02 * rng.standard_normal(m) * np.exp(-np.arange(m) / 500)
    return h


@pytest.mark.parametrize("method", ["division", "analytic"])
def test_recovers_known_ir(method):
    # Reference: the recording is made with scipy.signal.fftconvolve; deconvolution must
    # give back the known response. Sweep band edges are excluded from the strict check
    # (the measurement's band limit rings beyond the window there).
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, -20.0)
    h = invented_room()
    y = fftconvolve(s.signal(), h)
    got = deconvolve(y, s, method=method)[: len(h)]
    limit = -45.0 if method == "division" else -40.0
    assert band_energy_error_db(got, h, FS, 100.0, 16000.0) < limit
    assert band_energy_error_db(got, h, FS, 1000.0, 8000.0) < -50.0


def test_two_inverses_agree():
    # The analytic inverse (Novak 2015 eq. 43) and division by the DFT are independent
    # derivations; they must agree in the middle of the band.
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, -20.0)
    y = fftconvolve(s.signal(), invented_room())
    a = deconvolve(y, s, method="analytic")[:4800]
    b = deconvolve(y, s, method="division")[:4800]
    assert band_energy_error_db(a, b, FS, 300.0, 10000.0) < -40.0


def test_harmonic_lag_is_minus_l_ln_k():
    # Farina, AES 2000: the k-th harmonic response arrives L ln k before the linear one.
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, -6.0)
    x = s.signal()
    y = np.r_[np.zeros(200), x + 0.5 * x**2]
    h = deconvolve(y, s)
    n = len(h)
    expected = 200 - s.rate_s * np.log(2) * FS
    region = np.arange(int(expected) - 400, int(expected) + 400) % n
    found = region[np.argmax(np.abs(h[region]))]
    lag = found - n if found > n // 2 else found
    assert abs(lag - expected) <= 1.0


def test_second_order_distortion_level():
    # For y = x + a x^2 and x = A sin(phi): x^2 = A^2/2 (1 - cos 2 phi), so the 2nd harmonic
    # amplitude is a A^2 / 2, i.e. a A / 2 relative to the fundamental (trig identity).
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, -20.0)
    a = 2.0
    x = s.signal()
    y = np.r_[np.zeros(100), x + a * x**2]
    split = split_harmonics(deconvolve(y, s), s, 4800, 5)
    f, hd = harmonic_distortion(split, FS, 20.0, 20000.0)
    sel = (f >= 200) & (f <= 5000)
    expected = 20 * np.log10(a * s.amplitude / 2)
    # 0.5 dB: the DC part of x^2 (a pulse a A^2/2 as long as the sweep) leaks a little into
    # the lowest bands
    np.testing.assert_allclose(hd[0, sel], expected, atol=0.5)
    assert np.nanmax(hd[1:, sel]) < expected - 30


def test_third_order_distortion_level():
    # sin^3 = (3 sin - sin 3)/4: y = x + b x^3 gives a 3rd harmonic b A^3 / 4 over a
    # fundamental A (1 + 3 b A^2 / 4) (trig identity).
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, -10.0)
    b = 3.0
    x = s.signal()
    A = s.amplitude
    y = np.r_[np.zeros(100), x + b * x**3]
    split = split_harmonics(deconvolve(y, s), s, 4800, 5)
    f, hd = harmonic_distortion(split, FS, 20.0, 20000.0)
    sel = (f >= 200) & (f <= 5000)
    expected = 20 * np.log10((b * A**2 / 4) / (1 + 3 * b * A**2 / 4))
    np.testing.assert_allclose(hd[1, sel], expected, atol=0.3)


def test_peak_lag_parabola_vertex():
    # Samples of a parabola: the 3-point interpolation returns the exact vertex.
    n = np.arange(20.0)
    h = 1.0 - 0.01 * (n - 7.3) ** 2
    assert peak_lag(h) == pytest.approx(7.3)


def test_fractional_shift_by_halves_equals_roll():
    rng = np.random.default_rng(1)
    h = rng.standard_normal(256)
    twice = fractional_shift(fractional_shift(h, 0.5), 0.5)
    # two half-sample delays of a real signal equal a one-sample circular shift except at
    # the Nyquist bin; compare without it
    ref = np.roll(h, 1)
    spec_err = np.fft.rfft(twice - ref)[:-1]
    assert np.max(np.abs(spec_err)) < 1e-9
    np.testing.assert_allclose(fractional_shift(h, 3.0), np.roll(h, 3), atol=1e-12)


def test_iec_band_centres():
    # IEC 61260-1:2014 base-10 mid-bands: third-octave x = -10 is exactly 100 Hz and
    # octave x = 1 is 1995.26 Hz (values from REFERENCES).
    third = iec_band_centres(3, 90, 110)
    assert third[0] == pytest.approx(100.0, rel=1e-12)
    octave = iec_band_centres(1, 1500, 2500)
    assert octave[0] == pytest.approx(1995.26, abs=0.01)


def test_unknown_method():
    s = synchronized_sweep(FS, 20.0, 20000.0, 0.5)
    with pytest.raises(ValueError):
        deconvolve(np.zeros(1000), s, method="guess")


def test_exact_up_to_the_measurement_band_limit():
    # Against scipy.signal.fftconvolve: the deconvolution equals the known response seen
    # through the sweep's own band limit G = X * X^-1 to rounding error; what remains in
    # test_recovers_known_ir near the band edges is that band limit cut by the window.
    import scipy.fft

    from roomcorr.measure.deconvolve import inverse_spectrum

    s = synchronized_sweep(FS, 20.0, 20000.0, 1.0, -20.0)
    x = s.signal()
    h = invented_room()
    got = deconvolve(fftconvolve(x, h), s)
    n = len(got)
    g = scipy.fft.rfft(x, n) * inverse_spectrum(s, n)
    seen = scipy.fft.irfft(scipy.fft.rfft(h, n) * g, n)
    assert band_energy_error_db(got[:4800], seen[:4800], FS, 20.0, 20000.0) < -120
    f = np.fft.rfftfreq(n, 1 / FS)
    in_band = (f >= 20.0) & (f <= 20000.0)
    np.testing.assert_allclose(np.abs(g[in_band]), 1.0, atol=1e-5)  # flat inside the band
