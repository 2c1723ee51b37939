"""Timing markers and clock drift (roomcorr.measure.timing), offline."""

import numpy as np
import pytest
import scipy.signal

from roomcorr.measure import timing as tm
from roomcorr.measure.deconvolve import band_energy_error_db
from roomcorr.measure.session import analyse_recording, capture_signal, sweep_layout
from roomcorr.measure.settings import MeasureSettings
from roomcorr.measure.sweep import Sweep

FS = 48000


def drifted(x, drift_ppm, extra=0):
    """Reference resampling for the simulated clock: scipy.signal.resample (Fourier method)
    to exactly round(n (1 + drift)) samples; returns the signal and the drift it really has."""
    x = np.r_[x, np.zeros(extra)]
    n = len(x)
    n2 = int(round(n * (1 + drift_ppm * 1e-6)))
    return scipy.signal.resample(x, n2), (n2 / n - 1) * 1e6


def test_relative_delay_of_a_shifted_noise_burst():
    # Fourier shift theorem: a delay of tau samples is the phase -2 pi f tau
    rng = np.random.default_rng(1)
    a = rng.standard_normal(4096)
    f = np.fft.rfftfreq(8192)
    b = np.fft.irfft(np.fft.rfft(a, 8192) * np.exp(-2j * np.pi * f * 0.3125), 8192)[:4096]
    assert tm.relative_delay(a[200:3800], b[200:3800], FS, 100, 16000) == pytest.approx(
        0.3125, abs=2e-3
    )


def test_plan_puts_markers_around_the_sweeps():
    ms = MeasureSettings(sweep_s=1.0, noise_s=0.2, tail_s=0.35, repeats=2)
    lay = sweep_layout(ms)
    sig, outs = capture_signal(lay, 2)
    assert outs == [2, 1]  # sweeps on output 2, markers on the reference (output 1)
    sw, mk = sig
    assert not np.any(sw * mk)  # never both at once
    marker = tm.Marker.from_dict(lay["marker"])
    assert np.max(np.abs(mk)) == pytest.approx(10 ** (ms.level_dbfs / 20), rel=1e-3)
    # the markers are not taken for a sweep and vice versa: found exactly where played
    plan = tm.capture_plan(Sweep.from_dict(lay["sweep"]), ms.noise_s, ms.tail_s, ms.repeats, marker)
    t = tm.locate_markers(sw + mk, plan, marker)
    assert t.found and t.offset_samples == pytest.approx(0.0, abs=0.05)


@pytest.mark.parametrize("drift_ppm", [100.0, -150.0, 0.0])
def test_ten_second_sweep_with_drift_gives_the_same_ir_as_without(drift_ppm):
    # Issue acceptance: a 10 s sweep with 100 ppm of drift gives the same impulse response
    # as without. The drifted recording is made by Fourier resampling (scipy), the
    # correction uses resample_poly; the reference is the same room without drift.
    ms = MeasureSettings(sweep_s=10.0, noise_s=0.3, tail_s=0.5, ir_s=0.3, repeats=1)
    lay = sweep_layout(ms)
    sig, _ = capture_signal(lay, 1)
    h = np.zeros(3000)
    h[300] = 0.5
    h[700] = -0.2
    h[300:] += (
        0.01 * np.random.default_rng(3).standard_normal(2700) * np.exp(-np.arange(2700) / 400)
    )
    clean = np.r_[np.zeros(3000), scipy.signal.fftconvolve(sig[0], h)]
    rng = np.random.default_rng(4)
    rec, true_ppm = drifted(clean, drift_ppm, extra=2000)
    rec = rec + 1e-6 * rng.standard_normal(len(rec))
    ir, fig, gates = analyse_recording(rec, None, lay)
    ir0, _, _ = analyse_recording(clean + 1e-6 * rng.standard_normal(len(clean)), None, lay)
    assert fig["drift_ppm"] == pytest.approx(true_ppm, abs=0.2)
    assert all(g.passed for g in gates), [g.message for g in gates if not g.passed]
    # same impulse response: difference energy 40 dB below it, 50 Hz to 15 kHz
    assert band_energy_error_db(ir, ir0, FS, 50, 15000) < -40
    if drift_ppm:  # ...while leaving the drift in smears the top octaves (1 ms over 10 s)
        lay_off = dict(lay, marker=None)
        n0 = 3000
        plain = rec[n0 + 0 :]
        ir_raw, _, _ = analyse_recording(
            np.r_[plain, np.zeros(5000)], None, dict(lay_off, noise_s=ms.noise_s)
        )
        assert band_energy_error_db(ir_raw, ir0, FS, 50, 15000) > -40


def test_drift_above_the_limit_fails_its_gate():
    ms = MeasureSettings(
        sweep_s=1.0, noise_s=0.3, tail_s=0.4, ir_s=0.2, repeats=1, max_drift_ppm=100.0
    )
    lay = sweep_layout(ms)
    sig, _ = capture_signal(lay, 1)
    h = np.zeros(200)
    h[100] = 0.5
    clean = np.r_[np.zeros(1000), scipy.signal.fftconvolve(sig[0], h)]
    rec, true_ppm = drifted(clean, 400.0, extra=1000)
    _, fig, gates = analyse_recording(
        rec + 1e-6 * np.random.default_rng(0).standard_normal(len(rec)), None, lay
    )
    assert fig["drift_ppm"] == pytest.approx(true_ppm, abs=0.5)
    failed = [g for g in gates if not g.passed]
    assert [g.name for g in failed] == ["clock_drift"] and "ppm" in failed[0].message


def test_correct_drift_length_and_identity():
    x = np.random.default_rng(0).standard_normal(48000)
    assert len(tm.correct_drift(x, 100.0)) == pytest.approx(48000 / 1.0001, abs=1)
    np.testing.assert_array_equal(tm.correct_drift(x, 0.0), x)
