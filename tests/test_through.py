"""Measuring through a design's filters (measure.through, app.through), offline parts."""

import numpy as np
import pytest

from roomcorr.app.through import _ranges, through_check
from roomcorr.measure.through import filter_rows

FS = 48000


def test_filter_rows_never_louder_than_the_sweep_level():
    rng = np.random.default_rng(0)
    rows = 0.1 * np.sin(2 * np.pi * 1000 * np.arange(4800) / FS)[None, :]
    boost = np.zeros(64)
    boost[0] = 2.0  # +6 dB: would double the peak
    out, scale = filter_rows(rows, [1], (1,), boost[None, :], -20.0)
    assert np.max(np.abs(out)) == pytest.approx(0.1, rel=1e-6) and scale == pytest.approx(0.5)
    cut = np.zeros(64)
    cut[3] = 0.5
    out, scale = filter_rows(rows, [1], (1,), cut[None, :], -20.0)
    assert scale == 1.0 and np.max(np.abs(out)) == pytest.approx(0.05, rel=1e-3)
    del rng


def test_through_check_finds_where_measurement_and_prediction_differ():
    # a pure delay is flat: through a flat filter the prediction equals the room; a
    # measurement with an extra resonance (peaking biquad, Audio EQ Cookbook, +6 dB at
    # 1 kHz, Q 4) differs by more than 1 dB only around 1 kHz.
    from scipy.signal import lfilter

    room = np.zeros(2048)
    room[100] = 0.5
    fir = np.zeros(256)
    fir[0] = 1.0
    A = 10 ** (6 / 40)
    w0 = 2 * np.pi * 1000 / FS
    alpha = np.sin(w0) / (2 * 4.0)
    b = [1 + alpha * A, -2 * np.cos(w0), 1 - alpha * A]
    a = [1 + alpha / A, -2 * np.cos(w0), 1 - alpha / A]
    measured = lfilter(b, a, np.r_[room, np.zeros(6000)])
    res = through_check(
        measured[None, None, :], room[None, None, :], fir[None, :], FS, (50.0, 15000.0)
    )
    ranges = res["over_limit"][0][0]
    assert len(ranges) == 1 and ranges[0][0] < 1000 < ranges[0][1]
    assert 700 < ranges[0][0] and ranges[0][1] < 1400
    assert res["max_diff_db"][0, 0] == pytest.approx(6.0, abs=0.7)  # smoothed peak


def test_ranges():
    f = np.array([1.0, 2, 3, 4, 5])
    assert _ranges(f, np.array([0, 1, 1, 0, 1], bool)) == [[2.0, 3.0], [5.0, 5.0]]
