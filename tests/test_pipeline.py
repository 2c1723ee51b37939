"""The whole design on the demo room and on synthetic sets."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import REPO
from scipy.ndimage import maximum_filter1d

from roomcorr.analysis.average import power_average
from roomcorr.analysis.balance import steady_balance_db
from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.analysis.window import fdw_power
from roomcorr.audio_io import read_ir_set
from roomcorr.design.realise.fir import fir_response_db
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings, design_from_dict


@pytest.fixture(scope="module")
def demo_design():
    irs, fs, _ = read_ir_set([REPO / "measurements_demo"])
    return run_design(irs, fs, Settings(design=design_from_dict({"sample_rates": [48000]})))


def _corrected_average_db(result, fs: int) -> np.ndarray:
    """Power average over positions of measurement * filter, 1/6-octave smoothed.

    The convolution is done in the frequency domain: each position's
    frequency-dependent-windowed power spectrum times the filter's |H|^2 (the
    window judges the room's reflections; it must not truncate the filter's
    own, deliberate impulse response). The windowed level's broad trend above
    the modal range is exchanged for the steady state's, as the design does
    (roomcorr.analysis.balance). The filter's pre-gain is removed so the
    result compares with the target's level.
    """
    h = result.firs[fs] * 10 ** (-result.pre_gain_db / 20)
    f = result.freq_hz
    out = []
    for ch in result.channels:
        h_db = fir_response_db(h[ch.index], fs, f)
        per_pos = []
        for p in range(result.irs.shape[0]):
            onset = ch.arrival_s[p] * result.fs_in
            ir = result.irs[p, ch.index]
            power = fdw_power(ir, result.fs_in, onset, f)
            level_db = 10 * np.log10(smooth_log_grid(power, 96, 1 / 6))
            shift_db = steady_balance_db(ir, result.fs_in, onset, f, level_db) - level_db
            filtered = smooth_log_grid(power * 10 ** (h_db / 10), 96, 1 / 6)
            per_pos.append(10 * np.log10(filtered) + shift_db)
        out.append(power_average(np.array(per_pos))[0])
    return np.array(out)


def test_corrected_response_meets_target(demo_design):
    """Inside the band the corrected response is within ±1.5 dB of the target,
    except where a cut reached the cut cap (excluded) or the design documents
    a deliberate shortfall: boost withheld (deep dips, position disagreement,
    cap; ``boost_withheld_db``) or correction held back by the listening-area
    rules (``held_back_db``). There the deviation may exceed 1.5 dB by no more
    than the documented amount (taken as its largest value within 1/6 octave,
    the reach of the evaluation smoothing)."""
    r = demo_design
    fs = 48000
    corrected = _corrected_average_db(r, fs)
    f = r.freq_hz
    checked = 0
    for ch, got in zip(r.channels, corrected, strict=True):
        lo, hi = ch.band_hz
        inband = (f >= lo * 2**0.5) & (f <= hi / 2**0.5)  # leave the edge fades
        limited = ch.raw_correction_db < -r.settings.design.max_cut_db
        grow = int(96 / 6)
        limited = np.convolve(limited.astype(float), np.ones(2 * grow + 1), "same") > 0
        documented = maximum_filter1d(ch.boost_withheld_db + ch.held_back_db, 2 * grow + 1)
        ok = inband & ~limited
        # with alignment on (the default for two channels) the level trim is in the filter
        trim = r.system.trim_db[ch.index] if r.system is not None and r.system.baked else 0.0
        err = np.abs(got - (ch.target_db + trim)) - documented
        assert ok.sum() > 150  # over 1.5 octaves of the band checked per channel
        assert np.max(err[ok]) <= 1.5, f"{ch.name}: {np.max(err[ok]):.2f} dB"
        checked += ok.sum()
    assert checked > 350


def test_demo_dips_are_left_alone(demo_design):
    # The invented room has cancellations; some boost must have been withheld,
    # and no filter boosts beyond the cap.
    assert any(ch.boost_withheld_db.max() > 3 for ch in demo_design.channels)
    for s in demo_design.stats:
        assert s.max_boost_db <= demo_design.settings.design.max_boost_db + 0.3
        assert s.peak_gain_db <= 0.01


def test_filter_response_matches_correction_curve(demo_design):
    r = demo_design
    for ch in r.channels:
        h = r.firs[48000][ch.index] * 10 ** (-r.pre_gain_db / 20)
        m = (r.freq_hz > 30) & (r.freq_hz < 16000)
        got = fir_response_db(h, 48000, r.freq_hz[m])
        # alignment (on by default for two channels) adds the channel's level trim
        trim = r.system.trim_db[ch.index] if r.system is not None and r.system.baked else 0.0
        assert np.max(np.abs(got - (ch.correction_db[m] + trim))) < 0.5


def test_each_rate_synthesised_with_same_duration(ir_set):
    irs, fs = ir_set
    r = run_design(irs, fs, Settings(design=design_from_dict({"taps": 8192})))
    assert {k: v.shape[1] for k, v in r.firs.items()} == {44100: 7526, 48000: 8192, 96000: 16384}
    # Same curve at every rate: the responses agree below 16 kHz.
    f = r.freq_hz[(r.freq_hz > 100) & (r.freq_hz < 16000)]
    a = fir_response_db(r.firs[44100][0], 44100, f)
    b = fir_response_db(r.firs[96000][0], 96000, f)
    assert np.max(np.abs(a - b)) < 0.3


def test_common_pre_gain_keeps_balance(ir_set):
    irs, fs = ir_set
    irs = irs.copy()
    irs[:, 1] *= 0.5  # right speaker 6 dB quieter: balance must survive
    r = run_design(irs, fs, Settings())
    assert max(s.peak_gain_db for s in r.stats) <= 0.01
    assert r.pre_gain_db <= 0.0


def test_flat_system_gets_flat_filter():
    fs = 48000
    h = np.zeros((2, 1, 24000))
    h[:, :, 200] = 0.5
    r = run_design(h, fs, Settings(design=design_from_dict({"sample_rates": [48000]})))
    for ch in r.channels:
        assert np.max(np.abs(ch.correction_db)) < 0.01
    fir = r.firs[48000][0]
    assert abs(fir[0] - 1.0) < 1e-3 and np.max(np.abs(fir[1:])) < 1e-3
