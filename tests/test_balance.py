"""Steady-state balance: the modal range's detail from the long window."""

from __future__ import annotations

import numpy as np

import roomcorr.analysis.balance as balance
from roomcorr.analysis.balance import steady_balance_db, steady_balance_set
from roomcorr.analysis.smoothing import smooth_log_grid, variable_width_oct
from roomcorr.analysis.window import fdw_power
from roomcorr.grid import log_grid, points_per_octave_of

F = log_grid()
FS = 48000


def _windowed_db(ir: np.ndarray, onset: float) -> np.ndarray:
    # What the pipeline hands over: the 15-cycle windowed power, variable smoothing.
    power = fdw_power(ir, FS, onset, F)
    return 10 * np.log10(smooth_log_grid(power, points_per_octave_of(F), variable_width_oct(F)))


def test_a_room_mode_keeps_its_steady_state_height(monkeypatch):
    # One room mode, an exponentially decaying sine h(t) = exp(-d t) sin(w0 t)
    # with T60 = 0.6 s (d = 3 ln 10 / T60). Its steady-state (Laplace) response
    # at w0 is w0 / (d^2 + 2j d w0), about 1 / (2 d) (analytic), times fs for
    # the sampled response. The 15-cycle window (150 ms at 100 Hz) stops while
    # the mode still rings and reads the peak lower; the design must see the
    # height a listener hears in the steady state.
    f0, t60 = 100.0, 0.6
    d = 3 * np.log(10) / t60
    t = np.arange(int(1.5 * FS)) / FS
    onset = 240
    ir = np.zeros(t.size)
    ir[onset:] = np.exp(-d * t[: t.size - onset]) * np.sin(2 * np.pi * f0 * t[: t.size - onset])
    w0 = 2 * np.pi * f0
    expect_db = 20 * np.log10(FS * abs(w0 / (d**2 + 2j * d * w0)))
    k = int(np.argmin(np.abs(F - f0)))
    windowed = _windowed_db(ir, onset)
    got = steady_balance_db(ir, FS, onset, F, windowed)
    # 1/48-octave smoothing (1.4 Hz) of a mode 3.7 Hz wide (d / pi) and the
    # long window ending after 0.5 s take a few tenths of a dB off the top.
    assert abs(got[k] - expect_db) < 0.5
    monkeypatch.setattr(balance, "MODAL_DETAIL_HZ", None)
    old = steady_balance_db(ir, FS, onset, F, windowed)
    assert old[k] < expect_db - 1.0  # the windowed detail alone reads it low (not vacuous)


def test_above_the_modal_range_the_windowed_detail_stays(monkeypatch):
    # Above MODAL_DETAIL_HZ the result is the windowed level with the long
    # window's 1-octave trend, exactly as without the modal detail.
    rng = np.random.default_rng(5)
    n = FS // 2
    ir = rng.standard_normal(n) * np.exp(-np.arange(n) / (0.05 * FS))
    ir[100] += 30.0
    windowed = _windowed_db(ir, 100.0)
    got = steady_balance_db(ir, FS, 100.0, F, windowed)
    above = F >= balance.MODAL_DETAIL_HZ[1]
    monkeypatch.setattr(balance, "MODAL_DETAIL_HZ", None)
    plain = steady_balance_db(ir, FS, 100.0, F, windowed)
    assert np.allclose(got[above], plain[above])


def test_without_modal_detail_the_set_keeps_the_windowed_detail(monkeypatch):
    # steady_balance_set(..., modal_detail=False) (used with a subwoofer) is the
    # balance without the modal range's long-window detail, position by position.
    rng = np.random.default_rng(9)
    n = FS // 2
    irs = rng.standard_normal((2, 1, n)) * np.exp(-np.arange(n) / (0.1 * FS))
    irs[:, :, 200] += 20.0
    arrival = np.full((2, 1), 200.0 / FS)
    windowed = np.stack([[_windowed_db(irs[p, 0], 200.0)] for p in range(2)])
    off = steady_balance_set(irs, FS, F, windowed, arrival, modal_detail=False)
    on = steady_balance_set(irs, FS, F, windowed, arrival)
    monkeypatch.setattr(balance, "MODAL_DETAIL_HZ", None)
    plain = steady_balance_set(irs, FS, F, windowed, arrival)
    assert np.allclose(off, plain)
    assert not np.allclose(on, plain)  # the switch matters (not vacuous)
