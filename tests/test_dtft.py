"""roomcorr.analysis.dtft against scipy's freqz and an analytic case."""

from __future__ import annotations

import numpy as np
from scipy.signal import freqz

from roomcorr.analysis.dtft import BLOCK, dtft


def test_equals_scipy_freqz_at_arbitrary_frequencies():
    # reference: scipy.signal.freqz with an array of frequencies (Horner's rule per response)
    rng = np.random.default_rng(3)
    h = rng.standard_normal((2, 3, 3 * BLOCK + 123)) * np.exp(-np.arange(3 * BLOCK + 123) / 900)
    f = np.concatenate([[0.0], 17.0 * 2.0 ** (np.arange(150) / 24.0), [24000.0]])
    got = dtft(h, f, 48000)
    assert got.shape == (2, 3, f.size)
    for i in range(2):
        for k in range(3):
            ref = freqz(h[i, k], worN=f, fs=48000)[1]
            np.testing.assert_allclose(got[i, k], ref, rtol=0, atol=1e-10 * np.abs(ref).max())


def test_delayed_impulse_is_a_pure_phase():
    # analytic: the DTFT of delta[n - d] is exp(-j 2 pi f d / fs), magnitude 1
    fs, d = 44100, 5000
    h = np.zeros(7000)
    h[d] = 1.0
    f = np.geomspace(10.0, 20000.0, 97)
    np.testing.assert_allclose(dtft(h, f, fs), np.exp(-2j * np.pi * f * d / fs), atol=1e-9)


def test_short_sequence_shorter_than_a_block():
    # the sum by hand: h = [1, 2] gives 1 + 2 exp(-j w)
    f = np.array([0.0, 1000.0, 12000.0])
    w = 2 * np.pi * f / 48000
    np.testing.assert_allclose(dtft(np.array([1.0, 2.0]), f, 48000), 1 + 2 * np.exp(-1j * w))
