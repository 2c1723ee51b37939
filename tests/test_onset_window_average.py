"""Onset detection, frequency-dependent windowing and position averaging."""

from __future__ import annotations

import numpy as np
from scipy import signal

from roomcorr.analysis.average import power_average
from roomcorr.analysis.onset import find_onset
from roomcorr.analysis.window import fdw_power, window_lengths_s
from roomcorr.grid import log_grid


def test_onset_of_delayed_filtered_impulse_in_noise():
    fs = 48000
    rng = np.random.default_rng(3)
    h = np.zeros(9600)
    h[480] = 1.0
    # A band-limited (low-passed) arrival: the onset is at the start of its rise.
    b, a = signal.butter(2, 8000, fs=fs)
    h = signal.lfilter(b, a, h) + rng.standard_normal(h.size) * 1e-3
    onset = find_onset(h, fs)
    assert 478 <= onset <= 482


def test_onset_ignores_noise_spike_below_threshold():
    fs = 48000
    h = np.random.default_rng(0).standard_normal(9600) * 1e-3
    h[100] = 0.02  # spike 34 dB below the arrival
    h[2000] = 1.0
    assert abs(find_onset(h, fs) - 2000) < 1.5


def test_window_lengths_follow_cycles():
    f = np.array([10.0, 100.0, 1000.0, 10000.0])
    t = window_lengths_s(f, cycles=15, min_s=0.005, max_s=0.5)
    assert np.allclose(t, [0.5, 0.15, 0.015, 0.005])


def test_fdw_of_pure_impulse_is_flat():
    fs = 48000
    h = np.zeros(24000)
    h[240] = 0.5
    f = log_grid()
    p = fdw_power(h, fs, 240.0, f)
    # |0.5|^2 at every frequency: a delta's spectrum is flat (analytic case).
    assert np.allclose(10 * np.log10(p), 10 * np.log10(0.25), atol=0.05)


def test_fdw_hides_late_reflection_at_high_frequency_only():
    fs = 48000
    h = np.zeros(24000)
    h[240] = 1.0
    h[240 + 480] = 0.9  # reflection 10 ms later: comb with 100 Hz spacing
    f = log_grid()
    db = 10 * np.log10(fdw_power(h, fs, 240.0, f))
    hi = (f > 5000) & (f < 20000)
    lo = (f > 30) & (f < 300)
    # At high frequencies the 5 ms window excludes the reflection: flat.
    assert np.ptp(db[hi]) < 1.0
    # At low frequencies the long window keeps it: the comb's nulls show
    # (|1 + 0.9 e^{-jwT}| ranges from 0.1 to 1.9, i.e. about 25 dB).
    assert np.ptp(db[lo]) > 15


def test_power_average_and_spread():
    m = np.array([[0.0, 0.0], [10 * np.log10(3.0), 0.0]])
    avg, spread = power_average(m)
    # Mean power of 1 and 3 is 2 -> 3.01 dB; identical positions -> no spread.
    assert np.isclose(avg[0], 10 * np.log10(2.0))
    assert spread[1] == 0.0 and spread[0] > 0
    avg_w, _ = power_average(m, np.array([3.0, 1.0]))
    assert np.isclose(avg_w[0], 10 * np.log10((3 * 1 + 1 * 3) / 4))
