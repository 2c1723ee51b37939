"""Checks of roomcorr.analysis.decay against analytic decays, Sabine, ISO 3382-1 and IEC 61260-1."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import sosfreqz

from roomcorr.analysis import decay

FS = 48000


def _sabine_t60(volume_m3: float, absorption_m2: float) -> float:
    # Sabine: T60 = 0.161 V / A (Kuttruff, Room Acoustics)
    return 0.161 * volume_m3 / absorption_m2


def _decaying_noise(t60_s: float, seed: int, dur_s: float = 2.0, noise_db: float | None = None):
    """Gaussian noise whose power falls 60 dB in t60_s, optionally plus a steady noise floor."""
    rng = np.random.default_rng(seed)
    n = int(dur_s * FS)
    t = np.arange(n) / FS
    h = rng.standard_normal(n) * 10.0 ** (-3.0 * t / t60_s)
    if noise_db is not None:
        h = h + rng.standard_normal(n) * 10.0 ** (noise_db / 20.0)
    return h


# An invented room: 60 m3 with 16 m2 of absorption area.
T60_ROOM = _sabine_t60(60.0, 16.0)  # 0.60 s


def test_broadband_t60_matches_sabine_within_5_percent():
    h = _decaying_noise(T60_ROOM, seed=11)
    curve = decay.schroeder_decay(h, FS)
    values, valid = decay.decay_parameters(curve)
    for name in ("edt", "t20", "t30"):
        # the decay is exponential by construction, so every range sees the Sabine T60
        assert values[name] == pytest.approx(T60_ROOM, rel=0.05), name
        assert valid[name]


def test_noise_floor_compensation_recovers_t30():
    # peak-to-noise about 50 dB: enough for T30 (needs 45 dB, ISO 3382-1 from memory)
    h = _decaying_noise(T60_ROOM, seed=12, noise_db=-50.0)
    comp = decay.decay_parameters(decay.schroeder_decay(h, FS, compensate=True))[0]
    plain = decay.decay_parameters(decay.schroeder_decay(h, FS, compensate=False))[0]
    assert comp["t30"] == pytest.approx(T60_ROOM, rel=0.05)
    # without compensation the integrated noise bends the curve and T30 comes out far too long
    assert plain["t30"] > 1.3 * T60_ROOM


def test_noise_floor_check_flags_t30_when_range_too_close_to_noise():
    h = _decaying_noise(T60_ROOM, seed=13, noise_db=-40.0)
    curve = decay.schroeder_decay(h, FS)
    values, valid = decay.decay_parameters(curve)
    assert curve.dynamic_range_db == pytest.approx(40.0, abs=2.0)
    # ISO 3382-1 (from memory): noise at least 10 dB below the range end -> T20 ok (needs 35 dB),
    # T30 not (needs 45 dB)
    assert valid["t20"] and not valid["t30"]
    assert values["t20"] == pytest.approx(T60_ROOM, rel=0.05)


def test_truncation_point_where_decay_meets_noise():
    # decay of 60 dB per 0.6 s meets a -50 dB floor after 0.5 s (straight-line geometry)
    h = _decaying_noise(T60_ROOM, seed=14, noise_db=-50.0)
    curve = decay.schroeder_decay(h, FS)
    assert curve.truncation_s == pytest.approx(0.5, abs=0.05)
    assert np.all(np.isnan(curve.edc_db[int(curve.truncation_s * FS) + 1 :]))


def _piecewise_edc(breaks_db, t60s):
    """A decay curve made of straight segments: segment k falls at 60 dB per t60s[k]."""
    t = np.arange(int(3.0 * FS)) / FS
    edc = np.empty_like(t)
    level, t0, k = 0.0, 0.0, 0
    for i, ti in enumerate(t):
        cur = level - 60.0 * (ti - t0) / t60s[k]
        if k < len(breaks_db) and cur <= breaks_db[k]:
            level, t0 = breaks_db[k], ti
            k += 1
            cur = level
        edc[i] = cur
    return t, edc


def test_iso_3382_evaluation_ranges():
    # ISO 3382-1: T20 uses -5..-25 dB and T30 -5..-35 dB. The curve below falls fast
    # (T = 0.15 s) to -5 dB, steadily (T = 0.6 s) to -35 dB,
    # then slowly (T = 3 s). Only the stated ranges give 0.6 s.
    t, edc = _piecewise_edc([-5.0, -35.0], [0.15, 0.6, 3.0])
    assert decay.decay_time(t, edc, -5.0, -25.0) == pytest.approx(0.6, rel=0.01)
    assert decay.decay_time(t, edc, -5.0, -35.0) == pytest.approx(0.6, rel=0.01)
    # a range reaching into the slow tail (-5..-45) or the fast start (0..-20) would not
    assert decay.decay_time(t, edc, -5.0, -45.0) > 0.7
    assert decay.decay_time(t, edc, 0.0, -20.0) < 0.585  # about 0.571 s
    # EDT: 0..-10 dB. Fast first 10 dB (T = 0.3 s), then T = 0.9 s
    t, edc = _piecewise_edc([-10.0], [0.3, 0.9])
    assert decay.decay_time(t, edc, 0.0, -10.0) == pytest.approx(0.3, rel=0.01)
    assert decay.decay_time(t, edc, -5.0, -25.0) > 0.5
    # the range must be reached, otherwise NaN
    t, edc = _piecewise_edc([], [0.6])
    assert np.isnan(decay.decay_time(t[: FS // 4], edc[: FS // 4], -5.0, -35.0))


def test_octave_band_centres_follow_iec_61260():
    c = decay.octave_band_centres(63, 8000)
    # IEC 61260-1 base-10: f_m = 1000 * 10**(3x/10); x = 1 gives 1995.26 Hz (REFERENCES.md)
    assert len(c) == 8
    assert c[5] == pytest.approx(1995.26, abs=0.01)
    assert c[0] == pytest.approx(1000 * 10 ** (-12 / 10), rel=1e-12)
    assert [decay.nominal_label(f) for f in c] == [
        "63", "125", "250", "500", "1k", "2k", "4k", "8k"
    ]


def test_band_filter_edges_minus_3_db():
    fc = 1000.0
    sos = decay.octave_band_sos(fc, FS)
    g = 10 ** (3 / 10)
    f = np.array([fc, fc * g**-0.5, fc * g**0.5])
    _, h = sosfreqz(sos, worN=f, fs=FS)
    db = 20 * np.log10(np.abs(h))
    # Butterworth: unity in the passband centre (geometric), -3.01 dB at the band edges (scipy)
    assert db[0] == pytest.approx(0.0, abs=0.1)
    assert db[1] == pytest.approx(-3.01, abs=0.05)
    assert db[2] == pytest.approx(-3.01, abs=0.05)


@pytest.mark.parametrize("fc", [63.0, 1000.0, 8000.0])
def test_third_octave_band_edges_minus_3_db(fc):
    # IEC 61260-1: third-octave edges at fc * G ** (+-1/6); Butterworth -3.01 dB there (scipy)
    sos = decay.band_sos(fc, FS, fraction=3)
    g = 10 ** (3 / 10)
    f = np.array([fc, fc * g ** (-1 / 6), fc * g ** (1 / 6)])
    _, h = sosfreqz(sos, worN=f, fs=FS)
    db = 20 * np.log10(np.abs(h))
    assert db[0] == pytest.approx(0.0, abs=0.1)
    assert db[1:] == pytest.approx([-3.01, -3.01], abs=0.05)


def test_third_octave_bands_follow_iec_61260():
    bands = decay.band_decay(_ir_for_bands(), FS, fraction=3)
    # nominal third-octave labels 63 Hz to 8 kHz (IEC 61260-1 Annex E)
    assert [b.label for b in bands][:4] == ["63", "80", "100", "125"]
    assert len(bands) == 22 and bands[-1].label == "8k"
    with pytest.raises(ValueError):
        decay.band_decay(_ir_for_bands(), FS, fraction=2)


def _ir_for_bands() -> np.ndarray:
    rng = np.random.default_rng(5)
    t = np.arange(FS // 2) / FS
    return rng.standard_normal(t.size) * 10 ** (-3 * t / 0.4)


def test_octave_band_t30_recovered():
    h = _decaying_noise(T60_ROOM, seed=15, noise_db=-60.0)
    bands = decay.octave_band_decay(h, FS)
    assert [b.label for b in bands][0] == "63" and len(bands) == 8
    for b in bands:
        if b.centre_hz >= 900:  # wide bands: B*T large, estimate tight
            assert b.t30_s == pytest.approx(T60_ROOM, rel=0.05), b.label
        else:  # narrow low bands fluctuate more for random decays (common practice)
            assert b.t30_s == pytest.approx(T60_ROOM, rel=0.2), b.label
        assert b.valid["t30"]


def test_bands_above_nyquist_are_skipped():
    h = _decaying_noise(0.4, seed=16, dur_s=1.0)
    bands = decay.octave_band_decay(h[::3], FS / 3)  # 16 kHz: the 8 kHz band does not fit
    assert bands[-1].label == "4k"


def test_decay_map_finds_the_long_ringing_mode():
    # two damped sinusoids: 45 Hz with T60 = 1.0 s and 120 Hz with T60 = 0.2 s, plus a short
    # diffuse tail; a damped sinusoid's level falls exactly 60 dB per T60 (analytic)
    n = int(1.5 * FS)
    t = np.arange(n) / FS
    rng = np.random.default_rng(17)
    h = (
        np.sin(2 * np.pi * 45 * t) * 10 ** (-3 * t / 1.0)
        + np.sin(2 * np.pi * 120 * t) * 10 ** (-3 * t / 0.2)
        + 0.1 * rng.standard_normal(n) * 10 ** (-3 * t / 0.15)
    )
    m = decay.low_frequency_decay_map(h, FS)
    assert m.level_db.shape == (len(m.time_s), len(m.freq_hz))
    assert m.freq_hz[0] >= 20 and m.freq_hz[-1] <= 300
    modes = decay.ringing_modes(m)
    f0, t0 = modes[0]
    assert f0 == pytest.approx(45, abs=1.5)
    assert t0 == pytest.approx(1.0, rel=0.1)
    others = {round(f) for f, _ in modes}
    assert any(abs(f - 120) < 2 for f in others)


def test_all_zero_response_is_rejected():
    with pytest.raises(ValueError):
        decay.schroeder_decay(np.zeros(1000), FS)


def test_band_width_and_filter_limit():
    # IEC 61260-1 (base 10): octave bandwidth 0.7046 f_m, third-octave 0.2308 f_m (computed
    # from the band edges G ** (+-1/2b)); a band is filter-limited where B T < 16
    # (Jacobsen 1987, from memory).
    assert decay.band_width_hz(1000.0, 1) == pytest.approx(704.6, abs=0.1)
    assert decay.band_width_hz(1000.0, 3) == pytest.approx(230.8, abs=0.1)
    assert decay.filter_limited(63.0, 3, 0.3)  # B T = 4.4
    assert not decay.filter_limited(1000.0, 1, 0.3)  # B T = 211
    assert not decay.filter_limited(63.0, 3, float("nan"))
