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
    # then slowly (T = 3 s). Only the stated ranges give 0.6 s. (decay_time now takes the
    # range by name, as pyrato's regression does; -5..-45 dB is pyrato's T40.)
    t, edc = _piecewise_edc([-5.0, -35.0], [0.15, 0.6, 3.0])
    assert decay.decay_time(t, edc, "t20") == pytest.approx(0.6, rel=0.01)
    assert decay.decay_time(t, edc, "t30") == pytest.approx(0.6, rel=0.01)
    # a range reaching into the slow tail (-5..-45) or starting in the fast part (EDT) would not
    assert decay.decay_time(t, edc, "t40") > 0.7
    assert decay.decay_time(t, edc, "edt") < 0.5
    # EDT: 0..-10 dB. Fast first 10 dB (T = 0.3 s), then T = 0.9 s; pyrato's -0.1..-10.1 dB
    # range takes 0.1 dB of the slow part, about 0.3 % longer here
    t, edc = _piecewise_edc([-10.0], [0.3, 0.9])
    assert decay.decay_time(t, edc, "edt") == pytest.approx(0.3, rel=0.01)
    assert decay.decay_time(t, edc, "t20") > 0.5
    # the range must be reached, otherwise NaN (pyrato alone would fit to the nearest point)
    t, edc = _piecewise_edc([], [0.6])
    assert np.isnan(decay.decay_time(t[: FS // 4], edc[: FS // 4], "t30"))


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


# --- ISO 3382-1 analytic cases -------------------------------------------------------------
# An energy impulse response e(t) = sum_i A_i exp(-t / tau_i) has the Schroeder curve
# S(t) = sum_i A_i tau_i exp(-t / tau_i) (Schroeder 1965: backward integral of e), so the
# ISO 3382-1 regressions (EDT 0..-10 dB, T20 -5..-25 dB, T30 -5..-35 dB, extrapolated to
# -60 dB) have an exact answer: the least-squares line through S in dB over the range.
# The response is sqrt(e) with random signs (its square is e exactly) plus white noise.


def _analytic_decay(t60s, levels_db, noise_db, seed=1, dur_s=2.5):
    t = np.arange(int(dur_s * FS)) / FS
    taus = [t60 / (6.0 * np.log(10.0)) for t60 in t60s]  # 60 dB of energy per T60
    amps = [10.0 ** (lv / 10.0) for lv in levels_db]
    e = sum(a * np.exp(-t / tau) for a, tau in zip(amps, taus, strict=True))
    s = sum(a * tau * np.exp(-t / tau) for a, tau in zip(amps, taus, strict=True))
    s_db = 10.0 * np.log10(s / s[0])
    exact = {}
    for name, (hi, lo) in decay.RANGES_DB.items():
        sel = (s_db <= hi) & (s_db >= lo)
        exact[name] = -60.0 / np.polyfit(t[sel], s_db[sel], 1)[0]
    rng = np.random.default_rng(seed)
    h = np.sqrt(e) * np.where(rng.random(t.size) < 0.5, -1.0, 1.0)
    h = h + rng.standard_normal(t.size) * 10.0 ** (noise_db / 20.0)
    return h, exact


@pytest.mark.parametrize("t60", [0.3, 0.6, 1.2])
def test_single_slope_analytic_case(t60):
    # single slope: every range gives T60 itself (ISO 3382-1 definitions)
    h, exact = _analytic_decay([t60], [0.0], noise_db=-80.0)
    values, valid = decay.decay_parameters(decay.schroeder_decay(h, FS))
    for name in ("edt", "t20", "t30"):
        assert exact[name] == pytest.approx(t60, rel=1e-3)
        assert values[name] == pytest.approx(exact[name], rel=0.01 if name != "edt" else 0.05)
        assert valid[name]


# (T60 early, T60 late, late level dB, noise dB): knees at different depths; the noise
# floor 50 to 80 dB down, always at least 10 dB below the end of the T30 range
DOUBLE_SLOPES = [
    (0.3, 1.0, -15.0, -80.0),
    (0.2, 0.8, -10.0, -70.0),
    (0.2, 1.0, -20.0, -50.0),
    (0.3, 1.5, -25.0, -55.0),
    (0.2, 1.0, -15.0, -50.0),
]


@pytest.mark.parametrize(("t_early", "t_late", "late_db", "noise_db"), DOUBLE_SLOPES)
def test_double_slope_analytic_case(t_early, t_late, late_db, noise_db):
    # The figure: T20 and T30 within 1 %, EDT within 5 % of the exact regression.
    # Measured (pyrato Chu-Lundeby curve): T20 within 0.3 %, T30 within 0.8 %, EDT within
    # 1.1 % (pyrato's EDT range is -0.1..-10.1 dB). roomcorr's earlier own curve read T20
    # 2.2 % and T30 7.8 % short on the third case (see docs/explanation/decay-times.md).
    h, exact = _analytic_decay([t_early, t_late], [0.0, late_db], noise_db)
    values, valid = decay.decay_parameters(decay.schroeder_decay(h, FS))
    assert values["t20"] == pytest.approx(exact["t20"], rel=0.01)
    assert values["t30"] == pytest.approx(exact["t30"], rel=0.01)
    assert values["edt"] == pytest.approx(exact["edt"], rel=0.05)
    assert all(valid.values())
    # the double slope really shows: T30 and EDT differ from T20 by more than the tolerance
    assert abs(exact["t30"] / exact["t20"] - 1) > 0.02 or abs(exact["edt"] / exact["t20"] - 1) > 0.1


def test_late_knee_close_to_the_noise_is_the_known_limit():
    # Late decay starting 25 dB down with the noise 50 dB down (48 dB below the envelope peak):
    # the late slope is seen over barely 15 dB before the noise. T20 stays within 2.5 %; T30 is
    # about 7 % short (the late slope is estimated from a short stretch; measured). The old
    # roomcorr curve read T20 8 % and T30 21 % short on this case.
    h, exact = _analytic_decay([0.2, 1.2], [0.0, -25.0], -50.0)
    values, _ = decay.decay_parameters(decay.schroeder_decay(h, FS))
    assert values["t20"] == pytest.approx(exact["t20"], rel=0.025)
    assert values["t30"] == pytest.approx(exact["t30"], rel=0.10)


def test_pyrato_computes_the_curve():
    # the compensated curve is pyrato's Chu-Lundeby curve, sample for sample, after our start
    pf = pytest.importorskip("pyfar")
    ra = pytest.importorskip("pyrato")
    h, _ = _analytic_decay([0.3, 1.0], [0.0, -15.0], -60.0)
    curve = decay.schroeder_decay(h, FS)
    ref = ra.edc.energy_decay_curve_chu_lundeby(
        pf.Signal(h[curve.start_index :], FS), time_shift=False
    ).time[0]
    finite = np.isfinite(curve.edc_db)
    np.testing.assert_allclose(curve.edc_db[finite], 10 * np.log10(ref[finite]), atol=1e-9)
    assert "pyrato" in decay.decay_method()


@pytest.mark.parametrize("fc", [250.0, 500.0, 1000.0, 2000.0])
def test_agrees_with_pyroomacoustics_on_an_image_source_room(fc):
    # Independent code: pyroomacoustics' image-source room (an invented 6 x 4.5 x 2.8 m room,
    # absorption 0.25) and its measure_rt60 (Schroeder integral, straight line from -5 dB over
    # 20 or 30 dB). The noise 70 dB down is far below both ranges, so the two must agree:
    # measured within 0.5 % (T20) and 2 % (T30) in these octaves.
    pra = pytest.importorskip("pyroomacoustics")
    from scipy.signal import sosfilt

    fs = 16000
    room = pra.ShoeBox([6.0, 4.5, 2.8], fs=fs, materials=pra.Material(0.25), max_order=40,
                       air_absorption=False)
    room.add_source([1.5, 1.2, 1.4])
    room.add_microphone([4.1, 3.0, 1.2])
    room.compute_rir()
    h = np.asarray(room.rir[0][0], dtype=float)
    rng = np.random.default_rng(1)
    h = h / np.abs(h).max() + 10 ** (-70 / 20) * rng.standard_normal(h.size)
    centre = decay.octave_band_centres(fc / 1.4, fc * 1.4)[0]
    band = sosfilt(decay.band_sos(centre, fs), h)
    values, valid = decay.decay_parameters(decay.schroeder_decay(band, fs, centre_hz=centre))
    assert values["t20"] == pytest.approx(pra.experimental.measure_rt60(band, fs, 20), rel=0.02)
    assert values["t30"] == pytest.approx(pra.experimental.measure_rt60(band, fs, 30), rel=0.03)
    assert valid["t20"] and valid["t30"]
