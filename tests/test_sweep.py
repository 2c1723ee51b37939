"""Tests for roomcorr.measure.sweep (synchronised swept sine)."""

import numpy as np
import pytest
from scipy.signal import hilbert

from roomcorr.measure.sweep import (
    band_taper,
    playback_signal,
    sweep_starts,
    synchronized_sweep,
)

FS = 48000


def test_rate_follows_novak_eq33():
    # Novak, Simon & Lotton, JAES 63(10) 2015, eq. 33: L = round(f1 T / ln(f2/f1)) / f1.
    # 20 * 5 / ln(1000) = 14.476 -> 14, so L = 0.7 s and T = 0.7 ln(1000) = 4.8354 s.
    s = synchronized_sweep(FS, 20.0, 20000.0, 5.0)
    assert s.rate_s == pytest.approx(0.7)
    assert s.duration_s == pytest.approx(0.7 * np.log(1000.0))
    assert s.n_samples == round(0.7 * np.log(1000.0) * FS)


def test_instantaneous_frequency_is_exponential():
    # Farina 2000 / Novak 2015 eq. 32: f(t) = f1 exp(t / L); measured from the analytic
    # signal's phase (scipy.signal.hilbert), away from the ends.
    s = synchronized_sweep(FS, 50.0, 16000.0, 2.0, level_dbfs=0.0)
    x = s.signal()
    phase = np.unwrap(np.angle(hilbert(x)))
    f_inst = np.diff(phase) * FS / (2 * np.pi)
    t = (np.arange(len(f_inst)) + 0.5) / FS
    sel = (t > 0.2) & (t < s.duration_s - 0.2)
    expected = 50.0 * np.exp(t[sel] / s.rate_s)
    assert np.median(np.abs(f_inst[sel] / expected - 1)) < 0.005


def test_harmonics_are_time_shifted_copies():
    # Novak 2015: with f1 L an integer, sin(k phi(t)) = x(t + L ln k) exactly, which places
    # the k-th harmonic impulse response at -L ln k (Farina 2000).
    s = synchronized_sweep(FS, 20.0, 20000.0, 3.0, level_dbfs=0.0, fade_in_s=0.0, fade_out_s=0.0)
    assert x0_is_zero(s)
    t = np.linspace(0.1, 1.0, 200)
    phi = 2 * np.pi * s.f_start_hz * s.rate_s * np.exp(t / s.rate_s)
    for k in range(2, 6):
        shifted = np.sin(2 * np.pi * s.f_start_hz * s.rate_s * np.exp((t + s.rate_s * np.log(k))
                                                                      / s.rate_s))
        np.testing.assert_allclose(np.sin(k * phi), shifted, atol=1e-6)
        assert s.harmonic_lag_s(k) == pytest.approx(-s.rate_s * np.log(k))


def x0_is_zero(s):
    return abs(s.signal()[0]) < 1e-9


def test_level_and_fades():
    s = synchronized_sweep(FS, 20.0, 20000.0, 1.0, level_dbfs=-20.0)
    x = s.signal()
    # -20 dBFS peak = 0.1 of full scale (20 log10)
    assert np.max(np.abs(x)) == pytest.approx(0.1, rel=1e-3)
    assert abs(x[0]) < 1e-12 and abs(x[-1]) < 1e-3


def test_analytic_inverse_matches_dft_of_sweep():
    # Novak 2015 eq. 43 (stationary-phase inverse): X(f) X~(f) = 1 in the band; the DFT of
    # the sweep is computed independently by numpy.
    s = synchronized_sweep(FS, 20.0, 20000.0, 2.0, level_dbfs=-10.0)
    n = 2**18
    prod = np.fft.rfft(s.signal(), n) * s.inverse_spectrum(n)
    f = np.fft.rfftfreq(n, 1 / FS)
    sel = (f > 200) & (f < 10000)
    assert np.median(np.abs(20 * np.log10(np.abs(prod[sel])))) < 0.05
    assert np.median(np.abs(np.angle(prod[sel]))) < 0.01


def test_band_taper_limits():
    f = np.array([5.0, 16.0, 20.0, 1000.0, 20000.0, 23999.0])
    w = band_taper(f, 20.0, 20000.0, FS)
    np.testing.assert_allclose(w[[2, 3, 4]], 1.0)
    assert w[0] == 0.0 and 0 < w[1] < 1 and w[5] < 0.01


def test_playback_layout():
    s = synchronized_sweep(FS, 20.0, 20000.0, 0.5)
    sig = playback_signal(s, 0.25, 0.3, 3)
    starts = sweep_starts(s, 0.25, 0.3, 3)
    period = s.n_samples + round(0.3 * FS)
    assert len(sig) == round(0.25 * FS) + 3 * period
    assert starts == [12000, 12000 + period, 12000 + 2 * period]
    assert np.all(sig[: starts[0]] == 0)
    np.testing.assert_array_equal(sig[starts[1] : starts[1] + s.n_samples], s.signal())


def test_rejects_band_beyond_nyquist():
    with pytest.raises(ValueError):
        synchronized_sweep(FS, 20.0, 30000.0, 1.0)
