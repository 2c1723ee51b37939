"""Tests of roomcorr.analysis.compare against analytic cases and a synthetic room model."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from roomcorr.analysis import compare as cmp
from roomcorr.app.compare import fir_response_db
from roomcorr.grid import log_grid

FS = 48000

# ---------------------------------------------------------------------------
# A small physical model of our own: a shoebox room (5.0 x 4.0 x 2.6 m) with
# rigid-ish walls (pressure reflection factor 0.6), direct sound plus the six
# first-order image sources (Allen & Berkley, JASA 65(4), 1979, image method),
# spherical spreading 1/r, delay r/c, each arrival a band-limited fractional
# delay (Kaiser-windowed sinc). The loudspeaker adds a 2nd-order high-pass at
# 50 Hz and a 2nd-order low-pass at 18 kHz; a seeded noise floor at -90 dB.
# ---------------------------------------------------------------------------
ROOM_M = np.array([5.0, 4.0, 2.6])
BETA = 0.6


def _frac_impulse(n: int, delay_samples: float, gain: float) -> np.ndarray:
    out = np.zeros(n)
    half = 48
    i0 = int(np.floor(delay_samples))
    k = np.arange(i0 - half, i0 + half + 1)
    t = k - delay_samples
    w = np.kaiser(k.size, 8.0)
    ok = (k >= 0) & (k < n)
    out[k[ok]] += gain * (np.sinc(t) * w)[ok]
    return out


def _images(src: np.ndarray) -> list[tuple[np.ndarray, float]]:
    out = [(src.copy(), 1.0)]
    for axis in range(3):
        lo = src.copy()
        lo[axis] = -src[axis]
        hi = src.copy()
        hi[axis] = 2 * ROOM_M[axis] - src[axis]
        out += [(lo, BETA), (hi, BETA)]
    return out


def room_ir(src, mic, c, gain=1.0, n=int(0.4 * FS), seed=0) -> np.ndarray:
    from scipy.signal import butter, sosfilt

    h = np.zeros(n)
    for pos, refl in _images(np.asarray(src, float)):
        r = float(np.linalg.norm(pos - np.asarray(mic, float)))
        h += _frac_impulse(n, r / c * FS + 0.002 * FS, gain * refl / r)
    sos = np.vstack(
        [
            butter(2, 50.0, "highpass", fs=FS, output="sos"),
            butter(2, 18000.0, "lowpass", fs=FS, output="sos"),
        ]
    )
    h = sosfilt(sos, h)
    rng = np.random.default_rng(seed)
    return h + rng.standard_normal(n) * 10 ** (-90 / 20)


MICS = [np.array([2.6, 2.9, 1.1]), np.array([2.3, 3.0, 1.15]), np.array([2.9, 2.8, 1.05])]
SPK_L = np.array([1.4, 0.7, 1.0])
SPK_R = np.array([3.6, 0.7, 1.0])


def room_set(spk_l, spk_r, c, gain_r=1.0) -> np.ndarray:
    """(n_positions, 2, n_samples)."""
    return np.stack(
        [
            np.stack(
                [room_ir(spk_l, m, c, seed=2 * i), room_ir(spk_r, m, c, gain_r, seed=2 * i + 1)]
            )
            for i, m in enumerate(MICS)
        ]
    )


def test_speed_of_sound_iso_9613_annex_a():
    # ISO 9613-1 annex A: 343.2 m/s at 20 °C; at 0 °C 343.2*sqrt(273.15/293.15)
    # = 331.3 m/s (the textbook value for dry air at 0 °C, from memory).
    assert cmp.speed_of_sound_m_s(20.0) == pytest.approx(343.2, abs=1e-9)
    assert cmp.speed_of_sound_m_s(0.0) == pytest.approx(331.3, abs=0.05)


def test_fractional_delay_recovered_to_a_small_fraction_of_a_sample():
    # Analytic case: the same band-limited impulse, delayed by a known
    # non-integer number of samples (ideal fractional delay = shifted sinc).
    n = 4800
    a = _frac_impulse(n, 400.0, 1.0)
    for shift in (0.37, 5.81, -3.25):
        b = _frac_impulse(n, 400.0 + shift, 0.5)
        delay_s, inverted = cmp.arrival_change_s(a, b, FS)
        assert delay_s * FS == pytest.approx(shift, abs=0.02)
        assert not inverted
    delay_s, inverted = cmp.arrival_change_s(a, -_frac_impulse(n, 410.5, 1.0), FS)
    assert delay_s * FS == pytest.approx(10.5, abs=0.02)
    assert inverted


def test_direct_arrival_absolute():
    # The direct sound of the model room arrives at r/c + 2 ms pre-delay; the
    # loudspeaker's filters add their own group delay (at most a few samples
    # near the peak), so the absolute check is loose and the change check tight.
    c = cmp.speed_of_sound_m_s(20.0)
    h = room_ir(SPK_L, MICS[0], c)
    r = float(np.linalg.norm(SPK_L - MICS[0]))
    assert cmp.direct_arrival_s(h, FS) == pytest.approx(r / c + 0.002, abs=3 / FS)


@pytest.mark.parametrize("temperature_c", [20.0, 27.0])
def test_moved_loudspeaker_distance_recovered_within_2_cm(temperature_c):
    # The right loudspeaker moves 0.35 m back and 0.10 m sideways; the left
    # stays. The geometric change in path length at each microphone position
    # is the reference (the model's physics, independent of the code).
    c = cmp.speed_of_sound_m_s(temperature_c)
    moved_r = SPK_R + np.array([0.10, -0.35, 0.0])
    before = room_set(SPK_L, SPK_R, c)
    after = room_set(SPK_L, moved_r, c)
    res = cmp.compare_sets(before, FS, after, FS, temperature_c, ["left", "right"])
    assert res["paired_positions"]
    assert res["speed_of_sound_m_s"] == pytest.approx(c, abs=1e-3)
    left, right = res["channels"]
    want = [float(np.linalg.norm(moved_r - m) - np.linalg.norm(SPK_R - m)) for m in MICS]
    assert right["position_distance_change_m"] == pytest.approx(want, abs=0.02)
    assert right["distance_change_m"] == pytest.approx(np.mean(want), abs=0.02)
    assert right["arrival_change_ms"] == pytest.approx(np.mean(want) / c * 1e3, abs=0.02 / c * 1e3)
    assert abs(left["distance_change_m"]) < 0.005
    assert abs(left["level_change_db"]) < 0.1
    # Farther away: the direct sound drops by about 20 log10(r_after / r_before)
    # (spherical spreading, inverse-distance law).
    r_b = np.array([np.linalg.norm(SPK_R - m) for m in MICS])
    r_a = np.array([np.linalg.norm(moved_r - m) for m in MICS])
    assert right["direct_level_change_db"] == pytest.approx(
        float(np.mean(20 * np.log10(r_b / r_a))), abs=0.5
    )
    assert not right["polarity_inverted"]


def test_gain_only_change_level_within_half_db():
    c = cmp.speed_of_sound_m_s(20.0)
    before = room_set(SPK_L, SPK_R, c)
    after = room_set(SPK_L, SPK_R, c, gain_r=10 ** (-4.5 / 20))
    res = cmp.compare_sets(before, FS, after, FS, 20.0)
    left, right = res["channels"]
    # A pure gain of -4.5 dB scales every band by -4.5 dB (linearity).
    assert right["level_change_db"] == pytest.approx(-4.5, abs=0.5)
    assert right["direct_level_change_db"] == pytest.approx(-4.5, abs=0.5)
    assert abs(right["distance_change_m"]) < 0.005
    assert all(b["change_db"] == pytest.approx(-4.5, abs=0.5) for b in right["lf_band_change_db"])
    assert abs(left["level_change_db"]) < 0.1
    # A gain change moves no peak or dip.
    assert all(e["status"] in ("unchanged", "changed") for e in right["extrema"])


def test_unpaired_sets_fall_back_to_mean_arrivals():
    c = cmp.speed_of_sound_m_s(20.0)
    before = room_set(SPK_L, SPK_R, c)
    after = room_set(SPK_L + np.array([0, -0.2, 0]), SPK_R, c)[:2]
    res = cmp.compare_sets(before, FS, after, FS)
    assert not res["paired_positions"]
    arr_b = np.mean([np.linalg.norm(SPK_L - m) for m in MICS])
    arr_a = np.mean([np.linalg.norm(SPK_L + np.array([0, -0.2, 0]) - m) for m in MICS[:2]])
    assert res["channels"][0]["distance_change_m"] == pytest.approx(arr_a - arr_b, abs=0.02)
    with pytest.raises(ValueError, match="channel counts"):
        cmp.compare_sets(before, FS, after[:, :1], FS)


def test_third_octave_centres_iec_61260_1():
    # IEC 61260-1:2014: third-octave x = -10 gives exactly 100 Hz; base-ten G.
    fc = cmp.third_octave_centres_hz(20.0, 315.0)
    assert 100.0 in np.round(fc, 9)
    assert fc[0] == pytest.approx(1000 * 10 ** (0.3 * -17 / 3), rel=1e-9)  # 19.95 Hz
    assert np.allclose(fc[1:] / fc[:-1], 10**0.1)
    assert fc.size == 13  # 20 ... 315 Hz nominal


def test_band_levels_unit_impulse_is_0_db():
    # Parseval: a unit impulse has |H| = 1 at every frequency.
    h = np.zeros(4800)
    h[10] = 1.0
    lv = cmp.band_levels_db(h, FS, cmp.third_octave_centres_hz(20, 8000))
    assert np.allclose(lv, 0.0, atol=1e-6)


def test_smoothed_response_matches_analytic_comb():
    # h = d[n] + d[n - D]: |H(f)|^2 = 2 + 2 cos(2 pi f tau), tau = D / fs. Its
    # mean over [f1, f2] uniform in log f is
    # 2 + 2 (Ci(2 pi tau f2) - Ci(2 pi tau f1)) / ln(f2 / f1)
    # (integral of cos(a f) / f is the cosine integral Ci; scipy.special.sici).
    from scipy.special import sici

    d = 37
    tau = d / FS
    h = np.zeros(9600)
    h[0] = h[d] = 1.0
    freq = log_grid(50.0, 16000.0, 24)
    got = cmp.smoothed_response_db(h, FS, freq, fraction=6)
    half = 2 ** (1 / 12)
    f1, f2 = freq / half, freq * half
    ci = lambda f: sici(2 * np.pi * tau * f)[1]  # noqa: E731
    want = 2 + 2 * (ci(f2) - ci(f1)) / np.log(f2 / f1)
    assert np.allclose(got, 10 * np.log10(want), atol=0.05)


def _bumps(freq, spec):
    y = np.zeros_like(freq)
    for fc, h_db, width_oct in spec:
        y += h_db * np.exp(-0.5 * (np.log2(freq / fc) / width_oct) ** 2)
    return y


def test_extrema_appear_move_vanish():
    # Analytic responses: Gaussian bumps on a log axis, known centres.
    f = log_grid()
    before = _bumps(f, [(45.0, 8.0, 0.06), (120.0, -10.0, 0.05), (250.0, 6.0, 0.05)])
    after = _bumps(f, [(50.0, 8.0, 0.06), (250.0, 6.0, 0.05), (180.0, -9.0, 0.05)])
    rows = cmp.match_extrema(cmp.find_extrema(f, before), cmp.find_extrema(f, after))
    by = {(r["kind"], r["status"]): r for r in rows}
    assert by[("peak", "moved")]["freq_before_hz"] == pytest.approx(45.0, rel=0.01)
    assert by[("peak", "moved")]["freq_after_hz"] == pytest.approx(50.0, rel=0.01)
    assert by[("dip", "vanished")]["freq_before_hz"] == pytest.approx(120.0, rel=0.01)
    assert by[("dip", "appeared")]["freq_after_hz"] == pytest.approx(180.0, rel=0.01)
    assert by[("peak", "unchanged")]["freq_after_hz"] == pytest.approx(250.0, rel=0.01)
    assert len(rows) == 4


def test_filter_fit_gain_change_keeps_old_filters_fit():
    f = log_grid()
    target = np.zeros_like(f)
    old = _bumps(f, [(60.0, 9.0, 0.1), (140.0, -6.0, 0.1)])
    old_corr = target - old
    new = old + 3.0  # only the level changed
    fit = cmp.filter_fit(f, new, old_corr, target - new, target, (30.0, 500.0))
    assert fit["old_rms_db"] == pytest.approx(0.0, abs=1e-9)
    assert fit["still_fit"]


def test_filter_fit_rectangular_change_has_bernoulli_rms():
    # The old correction misses a rectangular 4 dB step covering a fraction p
    # of the band's grid points: after removing the mean, the RMS is
    # 4 sqrt(p (1 - p)) (standard deviation of a two-valued variable).
    f = log_grid()
    band = (40.0, 640.0)  # 4 octaves
    target = np.zeros_like(f)
    old = np.zeros_like(f)
    new = np.where((f >= 80.0) & (f < 160.0), 4.0, 0.0)
    fit = cmp.filter_fit(f, new, target - old, target - new, target, band)
    m = (f >= band[0]) & (f <= band[1])
    p = float(np.mean(new[m] > 0))
    assert p == pytest.approx(0.25, abs=0.01)
    assert fit["old_rms_db"] == pytest.approx(4 * np.sqrt(p * (1 - p)), abs=0.01)
    assert fit["fresh_rms_db"] == 0.0
    assert not fit["still_fit"]


def test_fir_response_db_matches_known_filter():
    # A 2-tap average (h = [0.5, 0.5]) has |H| = |cos(pi f / fs)|.
    f = np.array([100.0, 6000.0, 12000.0])
    got = fir_response_db(np.array([[0.5, 0.5]]), FS, f)
    assert got.shape == (1, 3)
    assert np.allclose(got[0], 20 * np.log10(np.abs(np.cos(np.pi * f / FS))), atol=1e-9)


def test_filter_fit_narrow_large_miss_is_not_fit():
    # One grid point off by 8 dB in a 4-octave band of ~385 points: the RMS
    # is about 8 / sqrt(385) = 0.4 dB (within tolerance), the largest
    # deviation about 8 dB (beyond FIT_MAX_TOLERANCE_DB), so a refit is advised.
    f = log_grid()
    band = (40.0, 640.0)
    target = np.zeros_like(f)
    new = np.zeros_like(f)
    new[np.argmin(np.abs(f - 100.0))] = 8.0
    fit = cmp.filter_fit(f, new, target.copy(), target - new, target, band)
    n = int(np.sum((f >= band[0]) & (f <= band[1])))
    assert fit["old_rms_db"] == pytest.approx(8 * np.sqrt((1 / n) * (1 - 1 / n)), abs=0.01)
    assert fit["old_max_db"] == pytest.approx(8 * (1 - 1 / n), abs=0.01)
    assert not fit["still_fit"]


def test_numpy_helpers_match_scipy():
    # The arrival code avoids importing scipy.signal; its two helpers must
    # agree with scipy's tukey window and FFT resampling.
    from scipy.signal import resample
    from scipy.signal.windows import tukey

    for n in (7, 48, 120, 121):
        assert np.allclose(cmp._tukey(n, 0.5), tukey(n, 0.5), atol=1e-12)
    x = np.random.default_rng(3).standard_normal(120) * cmp._tukey(120, 0.5)
    assert np.allclose(cmp._upsample(x, 16), resample(x, 120 * 16), atol=1e-12)
    x = x[:119]
    assert np.allclose(cmp._upsample(x, 16), resample(x, 119 * 16), atol=1e-12)


@settings(derandomize=True, max_examples=40, deadline=None)
@given(
    shift=st.floats(-60.0, 60.0, allow_nan=False),
    gain_db=st.floats(-20.0, 20.0, allow_nan=False),
    start=st.floats(200.0, 2000.0, allow_nan=False),
)
def test_arrival_change_any_shift_and_gain(shift, gain_db, start):
    # Property: for an ideal fractional delay (shifted band-limited impulse)
    # the recovered change equals the shift, whatever the gain and position.
    n = 4800
    a = _frac_impulse(n, start, 1.0)
    b = _frac_impulse(n, start + shift, 10 ** (gain_db / 20))
    delay_s, inverted = cmp.arrival_change_s(a, b, FS)
    assert delay_s * FS == pytest.approx(shift, abs=0.03)
    assert not inverted
