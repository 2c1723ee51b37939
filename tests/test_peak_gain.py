"""The peak gain every safety check rests on, against scipy's frequency response.

``peak_gain_db`` looks at a dense FFT (at least eight times the filter length, a
length pocketfft transforms fast) and refines the local maxima near the top with a
chirp-z zoom, skipping those that Bernstein's inequality shows cannot reach higher.
``full_band_peak_gain_db`` adds a memo keyed by the taps and leaves out leading and
trailing zeros. The reference here is ``scipy.signal.freqz`` on a grid 64 times
finer than the filter length, refined again around its maximum (an independent
evaluation of the same DTFT).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import freqz

from roomcorr.design.realise.fir import dense_fft_length, peak_gain_db
from roomcorr.design.realise.safety import (
    apply_safety,
    forget_peak_gains,
    full_band_peak_gain_db,
    full_band_peak_gains_db,
)

FS = 48000


def _reference_peak_db(h: np.ndarray, fs: float) -> float:
    """Maximum of |H| from DC to Nyquist by scipy.signal.freqz: a grid 64x finer than the
    filter length, then 2001 points across the best cell (the independent reference)."""
    n = 64 * h.size
    f, resp = freqz(h, worN=n, fs=fs, include_nyquist=True)
    k = int(np.argmax(np.abs(resp)))
    lo, hi = f[max(k - 1, 0)], f[min(k + 1, f.size - 1)]
    _, fine = freqz(h, worN=np.linspace(lo, hi, 2001), fs=fs)
    return float(20 * np.log10(max(np.abs(resp).max(), np.abs(fine).max())))


def _resonant(n: int, f0: float, r: float, rng) -> np.ndarray:
    """A decaying resonance at a frequency between FFT bins, plus some noise."""
    t = np.arange(n)
    h = r**t * np.cos(2 * np.pi * f0 / FS * t)
    return h / np.abs(h).sum() * 3.0 + 1e-3 * rng.standard_normal(n)


@pytest.mark.parametrize("n", [257, 1000, 4097, 12345])
def test_peak_gain_matches_scipy_freqz(n):
    # scipy.signal.freqz is the reference (an independent DTFT evaluation)
    rng = np.random.default_rng(n)
    for h in (
        _resonant(n, 1000.0 + np.pi, 0.999, rng),
        _resonant(n, 23999.0, 0.99, rng),  # a peak near Nyquist
        rng.standard_normal(n) * np.exp(-np.arange(n) / (n / 6)),
    ):
        got = peak_gain_db(h, FS, 0.0, FS / 2)
        assert got == pytest.approx(_reference_peak_db(h, FS), abs=2e-3)


@pytest.mark.parametrize("n", [2, 3, 6, 7, 2049])  # 2049: an odd dense FFT length
def test_a_peak_at_dc_or_nyquist_is_found_at_the_band_edge(n):
    # all taps alike peak at DC (their sum), alternating taps at Nyquist (their
    # alternating sum), for even and odd lengths (odd dense FFT lengths have no Nyquist
    # bin); scipy's freqz at those two frequencies is the reference
    for h in (np.full(n, 0.5), 0.5 * (-1.0) ** np.arange(n)):
        want = 20 * np.log10(np.abs(freqz(h, worN=[0.0, FS / 2], fs=FS)[1]).max())
        assert peak_gain_db(h, FS, 0.0, FS / 2) == pytest.approx(want, abs=1e-9)
        # and a band whose edges are not DC and Nyquist still takes them as given
        inner = peak_gain_db(h, FS, 1000.0, 20000.0)
        grid = np.linspace(1000, 20000, 200001)  # 0.1 Hz apart
        ref = 20 * np.log10(np.abs(freqz(h, worN=grid, fs=FS)[1]).max())
        assert inner == pytest.approx(ref, abs=2e-3)


def test_dense_fft_length_is_fine_enough_and_fast():
    # at least 8 taps' worth of bins per tap (bin spacing fs / (8 n) or finer), and a
    # 7-smooth length (scipy.fft.next_fast_len's definition)
    for n in (1, 257, 65897, 131794):
        m = dense_fft_length(n)
        assert m >= 8 * n and m >= 1 << 14
        for p in (2, 3, 5, 7, 11):
            while m % p == 0:
                m //= p
        assert m == 1


def test_zeros_around_a_filter_change_nothing_and_the_memo_agrees():
    rng = np.random.default_rng(3)
    h = _resonant(3000, 777.7, 0.998, rng)
    forget_peak_gains()
    bare = full_band_peak_gain_db(h, FS)
    padded = np.concatenate([np.zeros(123), h, np.zeros(4567)])
    assert full_band_peak_gain_db(padded, FS) == bare  # a delay: the same magnitude
    forget_peak_gains()
    assert full_band_peak_gain_db(padded, FS) == pytest.approx(_reference_peak_db(h, FS), abs=2e-3)
    # the batch on threads gives the same numbers as one at a time
    firs = {
        FS: np.stack([padded, 0.5 * padded, padded[::-1]]),
        44100: np.stack([h, h[::-1], 2 * h]),
    }
    forget_peak_gains()
    batch = full_band_peak_gains_db(firs)
    forget_peak_gains()
    for (fs, ch), value in batch.items():
        assert value == full_band_peak_gain_db(firs[fs][ch], fs)


def test_apply_safety_remembers_the_scaled_peaks_exactly_enough():
    # after the common pre-gain, the scaled filter's peak measured afresh agrees with
    # the remembered one (the pre-gain added) to rounding
    rng = np.random.default_rng(5)
    firs = {FS: np.stack([_resonant(2000, 400.3, 0.998, rng), _resonant(2000, 90.1, 0.999, rng)])}
    forget_peak_gains()
    out, pre, stats = apply_safety(firs, 0.0, 12.0)
    assert pre < 0.0
    for s in stats:
        remembered = full_band_peak_gain_db(out[FS][s.channel], FS)
        forget_peak_gains()
        fresh = full_band_peak_gain_db(out[FS][s.channel], FS)
        assert remembered == pytest.approx(fresh, abs=1e-9)
        assert s.peak_gain_db == pytest.approx(_reference_peak_db(out[FS][s.channel], FS), abs=2e-3)
