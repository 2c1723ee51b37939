"""Safety rules: the exported peak gain stays at or below the ceiling from DC to Nyquist."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from roomcorr.design.realise.fir import synthesize_fir
from roomcorr.design.realise.safety import CEILING_TOLERANCE_DB, PEAK_BAND, apply_safety
from roomcorr.errors import SafetyError
from roomcorr.grid import log_grid

GRID = log_grid()


def dense_peak_db(h: np.ndarray, pad: int = 64) -> float:
    """Largest |H| in dB over every bin of a 64x zero-padded FFT, DC and Nyquist included.

    Independent of roomcorr's peak search: samples of the DTFT (numpy's FFT)
    can only under-estimate the true maximum, so a sample above the ceiling
    proves a breach (analytic: |H(e^jw)| at the bin frequencies is the DTFT).
    """
    mag = np.abs(np.fft.rfft(h, pad * len(h)))
    return float(20 * np.log10(np.max(mag)))


def _curve(nodes_hz: list[float], nodes_db: list[float]) -> np.ndarray:
    order = np.argsort(nodes_hz)
    return np.interp(np.log(GRID), np.log(np.asarray(nodes_hz)[order]), np.asarray(nodes_db)[order])


def test_gain_above_20_khz_counts():
    # +3 dB above 20 kHz, 0 dB below: the peak lies outside 20 Hz..20 kHz and must still
    # be brought to the ceiling (the FIR's response there is the curve's, ~ +3 dB)
    gain = np.where(GRID > 20500.0, 3.0, 0.0)
    firs = {48000: synthesize_fir(GRID, gain, 48000, 4096)[None, :]}
    out, pre, stats = apply_safety(firs, ceiling_db=0.0, max_boost_db=4.0)
    assert pre < -2.5
    assert dense_peak_db(out[48000][0]) <= CEILING_TOLERANCE_DB
    assert stats[0].peak_gain_db <= CEILING_TOLERANCE_DB
    assert PEAK_BAND == "DC to Nyquist"


def test_gain_below_20_hz_counts():
    gain = np.where(GRID < 16.0, 3.0, 0.0)
    firs = {44100: synthesize_fir(GRID, gain, 44100, 8192)[None, :]}
    out, pre, _ = apply_safety(firs, ceiling_db=-1.0, max_boost_db=4.0)
    assert pre < -3.0
    assert dense_peak_db(out[44100][0]) <= -1.0 + CEILING_TOLERANCE_DB


def test_boost_below_20_hz_is_refused_above_the_cap():
    # a +6 dB boost at 12 Hz is excursion the loudspeaker pays for: above a 4 dB cap it is
    # refused even though 20 Hz..20 kHz holds no boost at all
    gain = np.where(GRID < 14.0, 6.0, 0.0)
    firs = {48000: synthesize_fir(GRID, gain, 48000, 16384)[None, :]}
    with pytest.raises(SafetyError, match="boost"):
        apply_safety(firs, ceiling_db=0.0, max_boost_db=4.0)


@pytest.mark.parametrize("bad", [float("nan"), float("inf")])
def test_non_finite_limits_are_refused(bad):
    firs = {48000: synthesize_fir(GRID, np.zeros_like(GRID), 48000, 1024)[None, :]}
    with pytest.raises(SafetyError):
        apply_safety(firs, ceiling_db=bad, max_boost_db=4.0)
    with pytest.raises(SafetyError):
        apply_safety(firs, ceiling_db=0.0, max_boost_db=bad)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(
    nodes_hz=st.lists(st.floats(10.0, 24000.0), min_size=2, max_size=8, unique=True),
    nodes_db=st.lists(st.floats(-12.0, 6.0), min_size=8, max_size=8),
    fs=st.sampled_from([44100, 48000, 96000]),
    n_taps=st.sampled_from([1024, 2048, 4096]),
    ceiling_db=st.floats(-6.0, 0.0),
)
def test_exported_peak_never_exceeds_the_ceiling(nodes_hz, nodes_db, fs, n_taps, ceiling_db):
    # property (DESIGN.md, safety invariants): whatever the curve, no exported filter's
    # gain anywhere from DC to Nyquist exceeds the ceiling
    gain = _curve(nodes_hz, nodes_db[: len(nodes_hz)])
    h = np.stack([synthesize_fir(GRID, gain, fs, n_taps), synthesize_fir(GRID, -gain, fs, n_taps)])
    out, pre, stats = apply_safety({fs: h}, ceiling_db=ceiling_db, max_boost_db=12.0)
    assert pre <= 0.0
    for ch in range(2):
        assert dense_peak_db(out[fs][ch]) <= ceiling_db + CEILING_TOLERANCE_DB
    for s in stats:
        assert s.peak_gain_db <= ceiling_db + CEILING_TOLERANCE_DB
