"""Tests for roomcorr.measure.quality, measure settings and the offline session analysis."""

import json

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import fftconvolve

from roomcorr.errors import SafetyError, SettingsError
from roomcorr.measure import quality as q
from roomcorr.measure.session import (
    analyse_recording,
    capture_signal,
    deconvolve_file,
    make_sweep,
    sweep_layout,
)
from roomcorr.measure.settings import MeasureSettings

FS = 48000


def test_octave_centres_iec():
    # IEC 61260-1:2014 base-10 octave mid-bands 1000 * 10**(0.3 x), x = -4..3
    c = q.octave_centres_hz(63, 8000)
    np.testing.assert_allclose(c, 1000 * 10 ** (0.3 * np.arange(-4, 4)))
    assert c[0] == pytest.approx(63.1, abs=0.05) and c[-1] == pytest.approx(7943.3, abs=0.1)


def test_band_snr_matches_analytic_white_noise_case():
    # A sine of amplitude A has power A^2/2 (while the sweep is in the band); white noise of
    # variance s^2 has power s^2 * B / (fs/2) in a band of width B (Parseval).
    s = make_sweep(MeasureSettings(sweep_s=4.0, level_dbfs=-20.0))
    rng = np.random.default_rng(5)
    sigma = 1e-3
    noise = sigma * rng.standard_normal(FS)
    rec = s.signal() + sigma * rng.standard_normal(s.n_samples)
    snr = q.band_snr_db(rec, noise, FS, s.f_start_hz, s.f_end_hz)
    for fm, val in snr.items():
        if 125 <= fm <= 4000:
            bw = fm * (10**0.15 - 10**-0.15)
            expected = 10 * np.log10((s.amplitude**2 / 2) / (sigma**2 * bw / (FS / 2)))
            assert val == pytest.approx(expected, abs=1.0), fm


def test_peak_and_clipping():
    x = np.array([0.0, 0.5, -0.25])
    assert q.peak_dbfs(x) == pytest.approx(20 * np.log10(0.5))  # -6.02 dB
    assert q.clipped_samples(np.array([0.1, 0.999, -1.0, 0.97]), -0.1) == 2


def test_arrival_snr_noise_only_versus_impulse():
    # Extreme value of n Gaussian samples is about sqrt(2 ln n) sigma (from memory):
    # a disconnected speaker stays far below the 25 dB limit; an impulse is far above.
    rng = np.random.default_rng(2)
    noise = rng.standard_normal(40000)
    assert q.arrival_snr_db(noise, 12000, slice(12000, 40000)) < 16
    h = noise * 1e-3
    h[300] = 1.0
    assert q.arrival_snr_db(h, 12000, slice(12000, 40000)) > 55


def test_repeat_disagreement_formula():
    # Two repeats h and h + e: mean h + e/2, each differs by e/2 -> |e|^2/4 / |h + e/2|^2.
    h = np.zeros(100)
    h[10] = 1.0
    e = np.zeros(100)
    e[20] = 0.2
    got = q.repeat_disagreement_db(np.array([h, h + e]))
    expected = 10 * np.log10(0.01 / (1.0 + 0.01))
    assert got == pytest.approx(expected)
    assert q.repeat_disagreement_db(h[None, :]) == float("-inf")


GOOD = {
    "clipped_samples": 0,
    "peak_dbfs": -12.0,
    "min_snr_db": 50.0,
    "dc_offset": 0.0,
    "stream_problems": 0,
    "arrival_snr_db": 70.0,
    "repeat_disagreement_db": -45.0,
}
LIMITS = sweep_layout(MeasureSettings())["limits"]


@pytest.mark.parametrize(
    ("key", "value", "gate"),
    [
        ("clipped_samples", 3, "clipping"),
        ("peak_dbfs", -70.0, "input_level"),
        ("min_snr_db", 5.0, "snr"),
        ("dc_offset", 0.05, "dc_offset"),
        ("stream_problems", 2, "buffers"),
        ("arrival_snr_db", 12.0, "arrival"),
        ("repeat_disagreement_db", -6.0, "repeats_agree"),
    ],
)
def test_each_gate_fails_alone(key, value, gate):
    assert all(g.passed for g in q.evaluate_gates(GOOD, LIMITS))
    gates = q.evaluate_gates(dict(GOOD, **{key: value}), LIMITS)
    assert [g.name for g in gates if not g.passed] == [gate]
    with pytest.raises(q.QualityGateError, match="--force"):
        q.raise_on_failure(gates, "position 1")


def test_level_cap_and_settings_validation():
    MeasureSettings().validate()
    with pytest.raises(SafetyError, match="allow-loud"):
        MeasureSettings(level_dbfs=-3.0).validate()
    MeasureSettings(level_dbfs=-3.0, allow_loud=True).validate()
    with pytest.raises(SafetyError):
        MeasureSettings(level_dbfs=1.0, allow_loud=True).validate()
    with pytest.raises(SettingsError, match="unknown"):
        MeasureSettings.from_dict({"sweep_len": 3})
    with pytest.raises(SettingsError):
        MeasureSettings(f_end_hz=30000.0).validate()
    with pytest.raises(SettingsError):
        MeasureSettings(outputs=(1, 2), loopback=(2, 2)).validate()
    ms = MeasureSettings(outputs=(1, 3), loopback=(4, 2), repeats=3)
    assert MeasureSettings.from_dict(ms.to_dict()) == ms


def simulated_recording(ms, h, latency, a2=0.0, noise=1e-5, dc=0.0, seed=0):
    """Offline stand-in for the audio path: latency + room + noise (seeded)."""
    sig, _outs = capture_signal(sweep_layout(ms), ms.outputs[0])  # sweeps (+ markers)
    play = sig.sum(axis=0)
    n = len(play)
    rng = np.random.default_rng(seed)
    sent = np.r_[np.zeros(latency), play][:n]
    mic = fftconvolve(sent + a2 * sent**2, h)[:n] + noise * rng.standard_normal(n) + dc
    return mic, sent


MS = MeasureSettings(sweep_s=1.0, noise_s=0.3, tail_s=0.4, ir_s=0.25, repeats=2, loopback=(3, 2))


def test_offline_analysis_removes_latency_and_recovers_ir():
    h = np.zeros(2400)
    h[250] = 0.5
    h[400] = 0.2
    mic, lb = simulated_recording(MS, h, latency=777)
    ir, fig, gates = analyse_recording(mic, lb, sweep_layout(MS))
    assert all(g.passed for g in gates), [g.message for g in gates if not g.passed]
    assert fig["latency_s"] * FS == pytest.approx(777, abs=0.01)
    assert fig["arrival_s"] * FS == pytest.approx(250, abs=0.05)
    ref = np.r_[h, np.zeros(len(ir) - len(h))]
    from roomcorr.measure.deconvolve import band_energy_error_db

    assert band_energy_error_db(ir, ref, FS, 100, 16000) < -40


def test_offline_analysis_without_loopback_or_markers_keeps_latency_and_says_so():
    h = np.zeros(100)
    h[50] = 0.5
    ms = MeasureSettings(sweep_s=1.0, noise_s=0.3, tail_s=0.4, ir_s=0.25, repeats=1, markers=False)
    mic, _ = simulated_recording(ms, h, latency=500, dc=0.05)
    _, fig, gates = analyse_recording(mic, None, sweep_layout(ms))
    assert fig["latency_s"] is None and "no loopback" in fig["latency_note"]
    assert fig["arrival_s"] * FS == pytest.approx(550, abs=0.05)
    assert [g.name for g in gates if not g.passed] == ["dc_offset"]


@pytest.mark.parametrize("latency", [0, 500, 2401])
def test_offline_analysis_with_markers_puts_the_reference_at_the_lead(latency):
    # The measured loudspeaker is the reference: whatever the latency, its arrival lands
    # at lead_s (10 ms) in the impulse response (timing.py's common origin).
    h = np.zeros(100)
    h[50] = 0.5
    ms = MeasureSettings(sweep_s=1.0, noise_s=0.3, tail_s=0.4, ir_s=0.25, repeats=1)
    mic, _ = simulated_recording(ms, h, latency=latency)
    _, fig, gates = analyse_recording(mic, None, sweep_layout(ms))
    assert fig["latency_s"] is None and "timing reference" in fig["latency_note"]
    assert fig["arrival_s"] == pytest.approx(0.010, abs=0.05 / FS)
    assert abs(fig["drift_ppm"]) < 0.1
    assert all(g.passed for g in gates), [g.message for g in gates if not g.passed]


def test_deconvolve_file_round_trip(tmp_path):
    h = np.zeros(300)
    h[120] = 0.4
    mic, lb = simulated_recording(MS, h, latency=300, a2=0.5)
    wav = tmp_path / "rec.wav"
    sf.write(wav, np.array([mic, lb]).T.astype(np.float32), FS, subtype="FLOAT")
    settings = tmp_path / "sweep.json"
    settings.write_text(json.dumps({"sweep_settings": sweep_layout(MS)}))
    dest, fig, gates = deconvolve_file(wav, settings)
    data, fs = sf.read(dest)
    assert fs == FS and np.argmax(np.abs(data)) == 120
    rec = json.loads(dest.with_suffix(".json").read_text())
    hd2 = np.array([v for v in rec["figures"]["harmonic_distortion"]["orders"]["2"] if v])
    # y = x + a x^2: 2nd harmonic a A / 2 relative to the fundamental (trig identity)
    expected = 20 * np.log10(0.5 * 10 ** (MS.level_dbfs / 20) / 2)
    assert np.median(hd2) == pytest.approx(expected, abs=0.5)
    from roomcorr.errors import InputFileError, OutputError

    with pytest.raises(OutputError):
        deconvolve_file(wav, settings)
    not_sweep = tmp_path / "other.json"
    not_sweep.write_text(json.dumps({"design": {}}))
    with pytest.raises(InputFileError, match="sweep settings"):
        deconvolve_file(wav, not_sweep, tmp_path / "x.wav")


@pytest.mark.parametrize("offset", [12345, -2000])
def test_deconvolve_file_aligns_a_recording_made_elsewhere(tmp_path, offset):
    # A recorder started 0.26 s early (offset > 0) or 42 ms late (offset < 0): with the
    # loopback as reference, the aligned result has the room's own delay.
    h = np.zeros(300)
    h[120] = 0.4
    mic, lb = simulated_recording(MS, h, latency=300)
    both = np.array([mic, lb]).T
    rng = np.random.default_rng(9)
    if offset > 0:
        both = np.vstack([1e-5 * rng.standard_normal((offset, 2)), both])
    else:
        both = both[-offset:]
    wav = tmp_path / "elsewhere.wav"
    sf.write(wav, both.astype(np.float32), FS, subtype="FLOAT")
    settings = tmp_path / "sweep.json"
    settings.write_text(json.dumps({"sweep_settings": sweep_layout(MS)}))
    dest, fig, gates = deconvolve_file(wav, settings, align=True)
    assert fig["arrival_s"] * FS == pytest.approx(120, abs=0.05)
    assert "aligned" in fig
    assert all(g.passed for g in gates)


def test_levels_of_a_sine_and_of_noise_bands():
    from roomcorr.measure import levels as lv

    t = np.arange(FS) / FS
    # AES17: a full-scale sine reads 0 dBFS; amplitude 0.05 reads 20 log10(0.05)
    assert lv.rms_dbfs(np.sin(2 * np.pi * 997 * t)) == pytest.approx(0.0, abs=1e-3)
    x = 0.05 * np.sin(2 * np.pi * 1000 * t)
    assert lv.rms_dbfs(x) == pytest.approx(20 * np.log10(0.05), abs=1e-3)
    sens, frac = lv.sensitivity_from_calibrator(
        x + 1e-4 * np.random.default_rng(0).standard_normal(FS), FS
    )
    assert sens == pytest.approx(20 * np.log10(0.05), abs=0.01) and frac > 0.99
    # 94 dB SPL = 1 Pa (20 uPa reference): a tone at the sensitivity reads 94 dB SPL
    assert lv.to_spl(sens, sens) == 94.0 and lv.PA_DB_SPL == pytest.approx(
        20 * np.log10(1 / 20e-6), abs=1e-4
    )
    # Parseval: white noise's octave bands add up to its total level (bands cover
    # 22 Hz .. 22.6 kHz, nearly all of 0 .. 24 kHz: within 0.5 dB)
    noise = np.random.default_rng(1).standard_normal(8 * FS)
    bands = lv.octave_levels_dbfs(noise, FS, q.octave_centres_hz(31.5, 16000.0))
    total = 10 * np.log10(sum(10 ** (v / 10) for v in bands.values()))
    assert total == pytest.approx(lv.rms_dbfs(noise), abs=0.5)
    # white noise: each octave holds power in proportion to its width (+3 dB per octave;
    # from 125 Hz up, where a band holds enough periodogram bins for +-0.3 dB)
    vals = [bands[k] for k in sorted(bands)]
    assert np.diff(vals)[2:] == pytest.approx(3.01, abs=0.3)
    assert [lv.nominal_label(f) for f in sorted(bands)][:3] == ["31.5", "63", "125"]


def test_sensitivity_from_a_calibration_file_header(tmp_path):
    from roomcorr.errors import InputFileError
    from roomcorr.measure.levels import sensitivity_from_file

    good = tmp_path / "mic.txt"
    good.write_text(
        "# invented measurement microphone\n# sensitivity_dbfs = -31.5\n20 -0.5\n1000 0.0\n"
    )
    assert sensitivity_from_file(good) == -31.5
    bad = tmp_path / "nohead.txt"
    bad.write_text("20 -0.5\n# sensitivity_dbfs = -31.5\n")  # only the header counts
    with pytest.raises(InputFileError, match="sensitivity_dbfs"):
        sensitivity_from_file(bad)


@pytest.mark.parametrize("value", [20.0, -200.0, float("nan"), 0.0])
def test_absurd_microphone_sensitivity_is_refused(value):
    with pytest.raises(SettingsError, match="not plausible"):
        MeasureSettings(mic_sensitivity_dbfs=value).validate()
