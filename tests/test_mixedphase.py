"""Mixed-phase design: excess phase, inverse all-pass, latency and pre-ringing limits."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from mixedphase_sim import Room, Speaker, group_delay_s, simulate
from scipy import signal
from test_cli import run

from roomcorr.design.phase.excess_phase import estimate_excess_phase, excess_spectrum
from roomcorr.design.phase.mixedphase import (
    PRE_RING_LIMIT_DB,
    closing_group_delay,
    correction_phase,
    magnitude_error_db,
    mixed_phase_fir,
    pre_ringing_db,
    within_tolerance,
)
from roomcorr.design.realise.fir import synthesize_fir
from roomcorr.design.realise.safety import BOOST_TOLERANCE_DB, CEILING_TOLERANCE_DB
from roomcorr.errors import SafetyError, SettingsError
from roomcorr.grid import log_grid
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings, design_from_dict

FS = 48000
GRID = log_grid()


def cookbook_allpass(f0_hz: float, q: float, fs: int = FS) -> tuple[np.ndarray, np.ndarray]:
    """2nd-order all-pass, Audio EQ Cookbook (Bristow-Johnson; W3C note 2021)."""
    w0 = 2 * np.pi * f0_hz / fs
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 - alpha, -2 * np.cos(w0), 1 + alpha])
    a = np.array([1 + alpha, -2 * np.cos(w0), 1 - alpha])
    return b / a[0], a / a[0]


def minimum_phase_system(n: int = 24000, fs: int = FS) -> np.ndarray:
    """A minimum-phase 'loudspeaker': 2nd-order Butterworth high-pass at 40 Hz, a gentle
    presence dip (Cookbook peaking, -3 dB at 3 kHz) and a 1st-order roll-off at 18 kHz."""
    x = np.zeros(n)
    x[0] = 1.0
    b, a = signal.butter(2, 40.0, "high", fs=fs)
    x = signal.lfilter(b, a, x)
    amp, w0, q = 10 ** (-3 / 40), 2 * np.pi * 3000 / fs, 1.0
    alpha = np.sin(w0) / (2 * q)
    b = [1 + alpha * amp, -2 * np.cos(w0), 1 - alpha * amp]
    a = [1 + alpha / amp, -2 * np.cos(w0), 1 - alpha / amp]
    x = signal.lfilter(b, a, x)
    b, a = signal.butter(1, 18000.0, fs=fs)
    return signal.lfilter(b, a, x)


def delayed(x: np.ndarray, delay: int) -> np.ndarray:
    return np.concatenate([np.zeros(delay), x])[: x.size]


def analytic_gd_s(b, a, freq_hz, fs=FS) -> np.ndarray:
    """Group delay of a digital filter (scipy.signal.group_delay), seconds."""
    _, gd = signal.group_delay((b, a), w=freq_hz, fs=fs)
    return gd / fs


def relative_to_treble(gd: np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
    return gd - np.median(gd[(freq_hz >= 4000) & (freq_hz <= 16000)])


def spread_ms(gd_s: np.ndarray) -> float:
    """Half the peak-to-peak range, ms (a ±figure)."""
    return 1000 * (gd_s.max() - gd_s.min()) / 2


CHECK_HZ = np.geomspace(300, 10000, 48)


@pytest.fixture(scope="module")
def allpass_case():
    """Three positions of min-phase system * Cookbook all-pass (1.5 kHz, Q 0.7), at
    different distances, no room."""
    b, a = cookbook_allpass(1500.0, 0.7)
    base = signal.lfilter(b, a, minimum_phase_system())
    irs = np.stack([delayed(base, d) for d in (150, 163, 171)])
    return irs, (b, a)


def test_recovers_cookbook_allpass(allpass_case):
    """The excess group delay found equals the all-pass's (scipy.signal.group_delay of the
    Cookbook section), both relative to the treble, within 0.05 ms from 500 Hz to 10 kHz."""
    irs, (b, a) = allpass_case
    est = estimate_excess_phase(irs, FS, GRID)
    f = np.geomspace(500, 10000, 40)
    want = relative_to_treble(analytic_gd_s(b, a, GRID), GRID)
    got = np.interp(f, GRID, est.excess_gd_s)
    assert np.max(np.abs(got - np.interp(f, GRID, want))) < 0.05e-3
    # sanity of the reference itself: DC group delay of a 2nd-order all-pass is
    # 2 / (Q 2 pi f0) (analytic, REFERENCES.md): 0.303 ms for 1.5 kHz, Q 0.7
    dc = analytic_gd_s(b, a, np.array([1.0]))[0]
    assert dc == pytest.approx(2 / (0.7 * 2 * np.pi * 1500), rel=0.02)
    assert np.all(est.coherence[(GRID > 300) & (GRID < 16000)] > 0.99)  # identical positions


def test_inverse_flattens_group_delay(allpass_case):
    """The all-pass's group delay varies by ±0.15 ms from 300 Hz to 10 kHz; after the
    mixed-phase filter (made from a unit impulse, so only its phase acts) it is flat
    within ±0.1 ms (the figure of the issue), and its magnitude is untouched."""
    irs, (b, a) = allpass_case
    est = estimate_excess_phase(irs, FS, GRID)
    unit = np.zeros(8192)
    unit[0] = 1.0
    h, peak = mixed_phase_fir(unit, FS, GRID, est.excess_gd_s, 960, top_hz=est.band_hz[1])
    before = group_delay_s(signal.lfilter(b, a, unit), FS, CHECK_HZ)
    after = group_delay_s(signal.lfilter(b, a, h), FS, CHECK_HZ)
    assert spread_ms(before) > 0.12
    assert spread_ms(after) < 0.1
    assert peak == 960
    assert magnitude_error_db(h, unit, FS) < 0.1


def test_pure_delay_needs_no_correction():
    """A pure delay has no excess phase (Oppenheim & Schafer ch. 5.6): the estimate is
    zero (to rounding) and the mixed filter is the minimum-phase filter delayed by the
    latency: its phase part is a pure delay."""
    unit = np.zeros(24000)
    unit[0] = 1.0
    h_min = synthesize_fir(GRID, -3 * np.exp(-(np.log2(GRID / 200.0) ** 2)), FS, 8192)
    irs = np.stack([delayed(unit, d) for d in (100, 131)])
    est = estimate_excess_phase(irs, FS, GRID)
    assert np.max(np.abs(est.excess_gd_s)) < 1e-12  # a picosecond: rounding only
    h, peak = mixed_phase_fir(h_min, FS, GRID, est.excess_gd_s, 480)
    assert peak == 480 + int(np.argmax(np.abs(h_min)))
    assert h.size == h_min.size + 480
    np.testing.assert_allclose(h[480:], h_min, atol=1e-7)
    assert np.max(np.abs(h[:480])) < 1e-7
    assert magnitude_error_db(h, h_min, FS) < 1e-4


def test_minimum_phase_response_needs_no_correction():
    """A minimum-phase response (no all-pass part) needs no excess-phase correction: the
    estimate stays within 0.05 ms of zero (what is left is the truncation of its 40 Hz
    high-pass by the 8 ms direct-sound window), and the mixed filter's phase part, its
    group delay minus the minimum-phase filter's, is a delay flat within ±0.05 ms from
    300 Hz to 10 kHz (half the issue's ±0.1 ms figure)."""
    mp = minimum_phase_system()
    irs = np.stack([delayed(mp, d) for d in (100, 131)])
    est = estimate_excess_phase(irs, FS, GRID)
    assert np.max(np.abs(est.excess_gd_s)) < 0.05e-3
    h_min = synthesize_fir(GRID, -3 * np.exp(-(np.log2(GRID / 200.0) ** 2)), FS, 8192)
    h, peak = mixed_phase_fir(h_min, FS, GRID, est.excess_gd_s, 480, top_hz=est.band_hz[1])
    part = group_delay_s(h, FS, CHECK_HZ) - group_delay_s(h_min, FS, CHECK_HZ)
    assert spread_ms(part) < 0.05


def cookbook_peaking(f0_hz: float, gain_db: float, q: float, fs: int = FS):
    """Peaking EQ, Audio EQ Cookbook (Bristow-Johnson; W3C note 2021)."""
    amp, w0 = 10 ** (gain_db / 40), 2 * np.pi * f0_hz / fs
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 + alpha * amp, -2 * np.cos(w0), 1 - alpha * amp])
    a = np.array([1 + alpha / amp, -2 * np.cos(w0), 1 - alpha / amp])
    return b / a[0], a / a[0]


def test_filter_own_group_delay_flattened_above_300_hz():
    """A minimum-phase correction (three Cookbook peaking sections: -6 dB at 700 Hz, +3 dB
    at 2.5 kHz, -8 dB at 70 Hz) has a group delay of its own: ±0.24 ms from 300 Hz to
    10 kHz by scipy.signal.group_delay of the sections. For a loudspeaker that is a pure
    delay (no excess phase) the mixed-phase filter that also flattens its own group delay
    makes the corrected direct sound's group delay flat within ±0.05 ms there; below
    150 Hz it keeps the minimum-phase filter's group delay (within 0.03 ms of it, plus
    the latency, by scipy.signal.group_delay of both FIRs); its magnitude, main peak and
    pre-ringing obey the limits."""
    unit = np.zeros(8192)
    unit[0] = 1.0
    sections = [cookbook_peaking(700, -6, 1.0), cookbook_peaking(2500, 3, 1.4)]
    sections.append(cookbook_peaking(70, -8, 3.0))
    h_min = unit
    for b, a in sections:
        h_min = signal.lfilter(b, a, h_min)
    analytic = sum(signal.group_delay((b, a), w=CHECK_HZ, fs=FS)[1] for b, a in sections) / FS
    assert spread_ms(analytic) > 0.2
    assert spread_ms(group_delay_s(h_min, FS, CHECK_HZ)) > 0.2  # the window sees it too
    h, peak = mixed_phase_fir(h_min, FS, GRID, np.zeros(GRID.size), 960, own_from_hz=300.0)
    assert spread_ms(group_delay_s(h, FS, CHECK_HZ)) < 0.05
    bass = np.geomspace(30, 120, 10)
    gd_mix = signal.group_delay((h, [1.0]), w=bass, fs=FS)[1] / FS
    gd_min = signal.group_delay((h_min, [1.0]), w=bass, fs=FS)[1] / FS
    np.testing.assert_allclose(gd_mix - 960 / FS, gd_min, atol=0.03e-3)
    assert peak == 960 == int(np.argmax(np.abs(h)))
    assert pre_ringing_db(h, FS, peak) <= PRE_RING_LIMIT_DB
    assert magnitude_error_db(h, h_min, FS) < 0.1
    # without the flattening the filter's phase part is the inverse all-pass alone (here
    # none): the minimum-phase filter's own group delay is left as it was
    h0, _ = mixed_phase_fir(h_min, FS, GRID, np.zeros(GRID.size), 960)
    assert spread_ms(group_delay_s(h0, FS, CHECK_HZ)) > 0.2


def test_excess_spectrum_of_minimum_phase_is_flat():
    """Excess phase = measured phase minus the phase of the real-cepstrum minimum-phase
    counterpart (Oppenheim & Schafer ch. 5.6 and 13). An FIR whose zeros all lie inside
    the unit circle is minimum phase by construction: its excess phase is ~0. Moving
    one zero to its reciprocal outside the circle keeps |H| up to a gain and makes the
    excess phase that of the all-pass (1 - z^-1 / conj(r)) / (1 - r z^-1) times a
    constant (analytic)."""
    rng = np.random.default_rng(5)
    radii = rng.uniform(0.3, 0.9, 6)
    angles = rng.uniform(0.1, 3.0, 6)
    zeros = radii * np.exp(1j * angles)
    h = np.real(np.poly(np.concatenate([zeros, zeros.conj()])))
    n_fft = 1 << 14
    exc, mag = excess_spectrum(h, n_fft)
    assert np.max(np.abs(np.angle(exc))) < 1e-6
    # reflect the first conjugate pair outside the circle
    r = zeros[0]
    outside = np.concatenate([[1 / r.conj(), 1 / r], zeros[1:], zeros[1:].conj()])
    h2 = np.real(np.poly(outside))
    exc2, _ = excess_spectrum(h2, n_fft)
    w = np.linspace(0, np.pi, n_fft // 2 + 1)
    z = np.exp(1j * w)
    ap = np.ones_like(z)
    for root in (r, r.conj()):
        ap *= (z**-1 - root.conj()) / (1 - root * z**-1)
    rel = exc2 * np.conj(ap)  # the two may differ by a sign (a constant)
    rel *= np.conj(rel[0])
    assert np.max(np.abs(np.angle(rel))) < 1e-6


def test_correction_phase_integrates_group_delay():
    """-dφ/dω of the correction is minus the excess group delay (definition of group
    delay); a constant 1 ms gives φ = ω · 1 ms (analytic)."""
    f = np.fft.rfftfreq(4096, 1 / FS)
    phi = correction_phase(f, np.full(f.size, 1e-3))
    np.testing.assert_allclose(phi, 2 * np.pi * f * 1e-3, rtol=1e-12, atol=1e-12)


def test_phase_is_closed_at_nyquist():
    """A real filter's phase at Nyquist is a multiple of π; the closing group delay adds
    exactly the missing phase, only above the top frequency."""
    f = np.fft.rfftfreq(8192, 1 / FS)
    extra = closing_group_delay(f, 7.3, 16000.0)
    assert np.all(extra[f <= 16000] == 0)
    total = 7.3 + correction_phase(f, extra)[-1]
    assert total / np.pi == pytest.approx(round(total / np.pi), abs=1e-9)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    f0=st.floats(300.0, 6000.0),
    q=st.floats(0.3, 3.0),
    n_pos=st.integers(1, 3),
    noise_db=st.floats(-90.0, -20.0),
    latency_ms=st.floats(5.0, 40.0),
    gain_db=st.lists(st.floats(-15.0, 4.0), min_size=6, max_size=6),
    fs=st.sampled_from([44100, 48000, 96000]),
    seed=st.integers(0, 2**16),
    own_from_hz=st.sampled_from([None, 300.0]),
)
def test_pre_ringing_and_latency_limits_hold_for_any_input(
    f0, q, n_pos, noise_db, latency_ms, gain_db, fs, seed, own_from_hz
):
    """Whatever the measurement and the curve, with or without flattening the filter's
    own group delay: the main peak sits at or before the latency, nothing lies before
    time zero, energy more than 2 ms before the peak is at most -40 dB of the total, the
    magnitude stays within 0.1 dB of the minimum-phase filter, and the filter stays
    finite and as long as before."""
    rng = np.random.default_rng(seed)
    b, a = cookbook_allpass(min(f0, 0.3 * fs), q, fs)
    base = signal.lfilter(b, a, minimum_phase_system(12000, fs))
    irs = np.stack(
        [
            delayed(base, int(rng.integers(50, 400)))
            + 10 ** (noise_db / 20) * rng.standard_normal(base.size)
            for _ in range(n_pos)
        ]
    )
    est = estimate_excess_phase(irs, fs, GRID)
    curve = np.interp(np.log2(GRID), np.linspace(np.log2(20), np.log2(20000), 6), gain_db)
    h_min = synthesize_fir(GRID, curve, fs, 4096 * fs // 48000)
    lat = int(round(latency_ms * fs / 1000))
    h, peak, strength, flat, err = within_tolerance(
        h_min, fs, GRID, est.excess_gd_s, lat, est.band_hz[1], own_from_hz
    )
    assert h.size == h_min.size + lat and np.all(np.isfinite(h))
    assert peak <= lat and peak == int(np.argmax(np.abs(h)))
    assert pre_ringing_db(h, fs, peak) <= PRE_RING_LIMIT_DB + 1e-6
    assert err <= 0.1 and err == pytest.approx(magnitude_error_db(h, h_min, fs))
    assert 0.0 <= strength <= 1.0 and 0.0 <= flat <= 1.0
    assert flat == 0.0 or (own_from_hz is not None and strength == 1.0)


def test_settings_validate_phase_and_latency():
    """phase is minimum or mixed; latency_ms finite and within 5-250 ms (NaN refused)."""
    d = design_from_dict({"phase": "mixed", "latency_ms": 12.5})
    assert (d.phase, d.latency_ms) == ("mixed", 12.5)
    assert design_from_dict({}).phase == "minimum"
    for bad in (
        {"phase": "linear"},
        {"latency_ms": math.nan},
        {"latency_ms": math.inf},
        {"latency_ms": 4.9},
        {"latency_ms": 251},
        {"latency_ms": "20"},
    ):
        with pytest.raises(SettingsError):
            design_from_dict(bad)


# --------------------------------------------------------------------------- whole design


@pytest.fixture(scope="module")
def scenario():
    """An invented two-way loudspeaker (Linkwitz-Riley 8th order at 1.2 kHz, a 4th-order
    all-pass sum) in an invented room; four measured positions, four held-out seats."""
    return simulate(Speaker(), Room(), length_s=0.3)


@pytest.fixture(scope="module")
def designs(scenario):
    irs = scenario.measured[:, None, :]
    rates = [44100, 48000, 96000]
    mixed = run_design(
        irs,
        scenario.fs,
        Settings(design=design_from_dict({"phase": "mixed", "sample_rates": rates})),
    )
    minimum = run_design(
        irs, scenario.fs, Settings(design=design_from_dict({"sample_rates": rates}))
    )
    return minimum, mixed


def test_same_curve_and_magnitude_as_minimum_phase(designs):
    """Same curve, caps and ceiling; the magnitude within 0.1 dB of the minimum-phase
    filter at every rate (20 Hz - 20 kHz; the delay does not change a magnitude)."""
    minimum, mixed = designs
    for a, b in zip(minimum.channels, mixed.channels, strict=True):
        np.testing.assert_array_equal(a.correction_db, b.correction_db)
        np.testing.assert_array_equal(a.boost_withheld_db, b.boost_withheld_db)
    assert mixed.pre_gain_db == pytest.approx(minimum.pre_gain_db, abs=0.1)
    for fs in minimum.firs:
        for c in range(len(minimum.channels)):
            h_min = minimum.firs[fs][c] * 10 ** (-minimum.pre_gain_db / 20)
            h_mix = mixed.firs[fs][c] * 10 ** (-mixed.pre_gain_db / 20)
            assert magnitude_error_db(h_mix, h_min, fs) < 0.1
    assert all(s.magnitude_error_db < 0.1 for s in mixed.mixed_phase.stats)


def test_safety_rules_unchanged(designs):
    """Ceiling and boost cap hold on the final (mixed) filters; worst-case gain is
    reported for every filter; a boost above the cap is still refused."""
    _, mixed = designs
    d = mixed.settings.design
    assert len(mixed.stats) == 3 * len(mixed.channels)
    for s in mixed.stats:
        assert s.peak_gain_db <= d.ceiling_db + CEILING_TOLERANCE_DB
        assert s.max_boost_db <= d.max_boost_db + BOOST_TOLERANCE_DB
        assert math.isfinite(s.worst_case_gain_db)
    from roomcorr.design.realise.safety import apply_safety

    boosted = {fs: h * 10 ** (6 / 20) for fs, h in mixed.firs.items()}
    with pytest.raises(SafetyError):
        apply_safety(boosted, 0.0, d.max_boost_db)


def test_latency_exact_at_every_rate(designs):
    """20 ms is 882, 960 and 1920 samples at 44.1, 48 and 96 kHz; the main peak of
    every filter sits there (or before), and the far pre-ringing obeys the limit."""
    _, mixed = designs
    mp = mixed.mixed_phase
    assert mp.latency_samples == {44100: 882, 48000: 960, 96000: 1920}
    for s in mp.stats:
        h = mixed.firs[s.fs][s.channel]
        assert int(np.argmax(np.abs(h))) == s.peak_index <= s.latency_samples
        assert s.peak_index >= s.latency_samples - 2
        assert pre_ringing_db(h, s.fs) <= PRE_RING_LIMIT_DB + 1e-6


def test_group_delay_figures_on_simulated_loudspeaker(scenario, designs):
    """The loudspeaker's excess phase: through a mixed-phase filter that undoes only it
    (the filter's own minimum-phase group delay kept and taken out again), the
    loudspeaker's part of the direct sound's group delay is flat within ±0.1 ms at the
    measured seats and ±0.2 ms at held-out seats, 300 Hz - 10 kHz, where uncorrected it
    varies by at least ±0.3 ms and minimum phase cannot touch it."""
    minimum, mixed = designs
    fs = scenario.fs
    h_min = minimum.firs[fs][0]
    mp = mixed.mixed_phase
    est, lat = mp.estimates[0], mp.latency_samples[fs]
    h_exc = within_tolerance(
        mp.min_phase_firs[fs][0], fs, GRID, est.excess_gd_s, lat, est.band_hz[1]
    )[0]
    own = group_delay_s(np.concatenate([np.zeros(lat), h_min]), fs, CHECK_HZ)
    for direct, limit in ((scenario.direct_measured, 0.1), (scenario.direct_held_out, 0.2)):
        for d in direct:
            assert spread_ms(group_delay_s(d, fs, CHECK_HZ)) >= 0.3
            residual = group_delay_s(np.convolve(d, h_exc), fs, CHECK_HZ) - own
            assert spread_ms(residual) <= limit
            unchanged = group_delay_s(np.convolve(d, h_min), fs, CHECK_HZ) - group_delay_s(
                h_min, fs, CHECK_HZ
            )
            assert spread_ms(unchanged) >= 0.3  # minimum phase cannot touch it


def test_total_group_delay_of_corrected_direct_sound(scenario, designs):
    """The issue's figure, the group delay of the corrected direct sound itself (the
    filter's own group delay included): from 1 to 10 kHz within ±0.1 ms at the measured
    seats and ±0.2 ms at held-out seats; from 300 Hz to 10 kHz at most 0.6 times the
    minimum-phase design's spread at every seat (measured in the benchmark: ±0.39 against
    ±0.86 ms; the pre-ringing limit keeps the rest, see docs). Read by the independent
    tests' group_delay_s."""
    minimum, mixed = designs
    fs = scenario.fs
    h_min, h_mix = minimum.firs[fs][0], mixed.firs[fs][0]
    assert all(s.flat_strength > 0 for s in mixed.mixed_phase.stats)
    above_1k = CHECK_HZ >= 1000
    for direct, limit in ((scenario.direct_measured, 0.1), (scenario.direct_held_out, 0.2)):
        for d in direct:
            via_mix = group_delay_s(np.convolve(d, h_mix), fs, CHECK_HZ)
            via_min = group_delay_s(np.convolve(d, h_min), fs, CHECK_HZ)
            assert spread_ms(via_mix[above_1k]) <= limit
            assert spread_ms(via_min[above_1k]) >= 0.3  # minimum phase leaves it
            assert spread_ms(via_mix) <= 0.6 * spread_ms(via_min)


def test_cli_states_latency(tmp_path, scenario):
    """design --phase mixed --latency-ms 10: the manifest states the latency per rate with
    the caution, the summary prints it; a NaN latency is refused in one line."""
    import soundfile as sf

    files = []
    for i, x in enumerate(scenario.measured[:2]):
        p = tmp_path / f"pos{i}.wav"
        sf.write(str(p), x, scenario.fs, subtype="FLOAT")
        files.append(str(p))
    out = tmp_path / "out"
    r = run("design", *files, "--out", str(out), "--phase", "mixed", "--latency-ms", "10")
    assert r.returncode == 0, r.stderr
    m = json.loads((out / "manifest.json").read_text())
    lat = m["latency"]
    assert lat["phase"] == "mixed" and lat["latency_ms"] == 10.0
    assert lat["samples"] == {"44100": 441, "48000": 480, "96000": 960}
    assert "lip-sync" in lat["caution"] and "live monitoring" in lat["caution"]
    assert all(
        e["latency_samples"] == int(e["sample_rate"]) // 100
        for e in m["files"]
        if e["kind"] == "fir"
    )
    assert "480 samples at 48000 Hz" in r.stdout and "lip-sync" in r.stdout
    bad = run(
        "design", *files, "--out", str(tmp_path / "o2"), "--phase", "mixed", "--latency-ms", "nan"
    )
    assert bad.returncode == 2
    # refused by the option parser, before anything is read: one line naming the option
    lines = bad.stderr.strip().splitlines()
    assert len(lines) == 1 and "error" in lines[0] and "--latency-ms" in lines[0]


def test_design_folder_round_trip_and_report_section(tmp_path, designs):
    """design.npz carries the mixed-phase part; the report gains one section per channel
    with the direct sound before/after and the pre-ringing against the limit, stating
    the latency and the caution; a minimum-phase design has no such section."""
    from roomcorr.deliver.export import load_design_curves, read_manifest, write_design
    from roomcorr.report.html import build_report

    minimum, mixed = designs
    write_design(mixed, tmp_path / "mixed")
    write_design(minimum, tmp_path / "min")
    curves = load_design_curves(tmp_path / "mixed")
    mp = curves["mixed_phase"]
    assert mp["latency_samples"] == {44100: 882, 48000: 960, 96000: 1920}
    np.testing.assert_array_equal(
        mp["channels"][0]["excess_gd_s"], mixed.mixed_phase.estimates[0].excess_gd_s
    )
    assert read_manifest(tmp_path / "min")["latency"]["phase"] == "minimum"
    assert load_design_curves(tmp_path / "min")["mixed_phase"] is None

    report = build_report(curves, dpi=40)
    sec = [s for s in report.sections if s.id == "phase"]
    assert len(sec) == 1 and [c.channel for c in sec[0].columns] == ["mono"]
    figs = sec[0].all_figures()
    assert len(figs) == 1
    text = " ".join(sec[0].paragraphs + sec[0].columns[0].paragraphs)
    assert "excess phase" in text
    assert figs[0].png[:8] == b"\x89PNG\r\n\x1a\n"
    overview = " ".join(report.sections[0].paragraphs)
    assert "20 ms" in overview
    # the latency, exactly per rate, and its caution are stated once, in the overview
    assert "960 samples at 48000 Hz" in overview and "lip-sync" in overview
    every = " ".join(
        p for s in report.sections for p in s.paragraphs + [q for c in s.columns
                                                            for q in c.paragraphs]
    )
    assert every.count("lip-sync") == 1
    report_min = build_report(load_design_curves(tmp_path / "min"), dpi=40)
    assert not [s for s in report_min.sections if s.id == "phase"]
    # the views: the mixed design's direct-sound group delay is the flattest of the three
    view = mp["channels"][0]
    f = view["view_gd_freq_hz"]
    band = (f >= 1000) & (f <= 10000)
    spreads = [np.ptp(row[band]) for row in view["view_gd_s"]]
    assert spreads[2] < spreads[1] and spreads[2] < spreads[0]


def test_positions_that_disagree_are_left_alone():
    """Only what every position shares is corrected: one position with a Cookbook all-pass
    at 2 kHz (Q 0.7) and one without. Their excess phases differ by up to π near 2 kHz,
    where the coherence |mean of e^{jφ_p}| = |cos(Δφ/2)| falls to ~0 (analytic), so the
    estimate is not used there (weight 0) and is held from the trusted neighbours."""
    unit = np.zeros(24000)
    unit[0] = 1.0
    b, a = cookbook_allpass(2000.0, 0.7)
    irs = np.stack([delayed(signal.lfilter(b, a, unit), 120), delayed(unit, 140)])
    est = estimate_excess_phase(irs, FS, GRID)
    near = (GRID > 1800) & (GRID < 2200)
    assert np.max(est.coherence[near]) < 0.6
    assert np.all(est.weight[near] == 0)
    # with the all-pass at both positions they agree and it is used
    both = np.stack([delayed(signal.lfilter(b, a, unit), d) for d in (120, 140)])
    est2 = estimate_excess_phase(both, FS, GRID)
    assert np.min(est2.coherence[near]) > 0.99 and np.all(est2.weight[near] == 1)


def test_latency_longer_than_half_the_filter_is_refused(scenario):
    """A latency of more than half the filter cannot hold the inverse: refused naming the
    options to change, before anything is written."""
    settings = Settings(
        design=design_from_dict(
            {"phase": "mixed", "latency_ms": 20.0, "taps": 1024, "sample_rates": [48000]}
        )
    )
    with pytest.raises(SettingsError, match="latency-ms"):
        run_design(scenario.measured[:, None, :], scenario.fs, settings)
