"""Several subwoofers chosen together.

Modules under test: roomcorr.design.system.subwoofers and the pipeline's use of it.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyfar as pf
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pra_rooms import MULTI_SUB_ROOMS, mains_m, simulate_pra, sofa_positions
from scipy.signal import freqz, sosfilt, sosfreqz

from roomcorr.audio_io import write_wav
from roomcorr.deliver.routes import build_routes
from roomcorr.deliver.system import manifest_fields, system_sentences
from roomcorr.design.phase.mixedphase import MAGNITUDE_TOLERANCE_DB, PRE_RING_LIMIT_DB
from roomcorr.design.system.crossover import linkwitz_riley_response
from roomcorr.design.system.feeds import feed_fir
from roomcorr.design.system.subwoofers import (
    CUT_DEPTHS_DB,
    MAX_CUTS,
    OFF_DB,
    array_response,
    cut_sos,
    cuts_response,
    listening_cases,
    plan_subwoofers,
    seat_levels_db,
    seat_spread_db,
    spread_crossover_hz,
    spread_grid_hz,
    with_mains,
)
from roomcorr.errors import SettingsError
from roomcorr.measure.guidance import positions_advice
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings, design_from_dict

FS = 48000
C_M_S = 343.2  # ISO 9613-1 at 20 °C


def duct_response(x_src_m, x_mic_m, freq_hz, length_m=6.0, q=20.0, n_modes=60):
    """Closed rigid duct: modal expansion with mode shapes cos(n pi x / L) (analytic).

    p(x, w) = sum_n psi_n(x_s) psi_n(x) / (Lambda_n (k_n^2 - k^2 + j k k_n / Q)),
    Lambda_n = L (n = 0) or L / 2 (n > 0); k = w / c. Returns shape (n_mics, n_freqs).
    """
    k = 2 * np.pi * np.asarray(freq_hz) / C_M_S
    x_mic = np.asarray(x_mic_m, dtype=float)
    out = np.zeros((x_mic.size, k.size), dtype=complex)
    for n in range(n_modes):
        kn = n * np.pi / length_m
        norm = length_m if n == 0 else length_m / 2
        shape = np.cos(kn * x_src_m) * np.cos(kn * x_mic)[:, None]
        out += shape / (norm * (kn**2 - k**2 + 1j * k * max(kn, k[0]) / q))
    return out


def test_two_equal_sources_at_the_ends_of_a_duct_excite_no_odd_mode():
    # Closed duct, mode shapes cos(n pi x / L): psi_n(0) + psi_n(L) = 1 + (-1)^n, zero for
    # every odd n (analytic standing-wave solution). The pair summed by array_response
    # (equal level, no delay, same polarity) must leave the field symmetric about L/2,
    # and its projection on every odd mode shape must vanish.
    length = 6.0
    x = np.linspace(0, length, 241)
    f = spread_grid_hz(200.0)
    resp = np.stack([duct_response(0.0, x, f, length), duct_response(length, x, f, length)], 1)
    both = array_response(resp, f, [0.0, 0.0], [0.0, 0.0], [1, 1])
    np.testing.assert_allclose(both, both[::-1], rtol=1e-9, atol=1e-12)
    one = resp[:, 0]
    for n in (1, 3, 5):
        psi = np.cos(n * np.pi * x / length)
        # at the odd mode's own frequency: absent from the pair, dominant for one source
        fn = n * C_M_S / (2 * length)
        rn = np.stack(
            [
                duct_response(0.0, x, [fn], length)[:, 0],
                duct_response(length, x, [fn], length)[:, 0],
            ],
            1,
        )[:, :, None]
        pair = array_response(rn, np.array([fn]), [0.0, 0.0], [0.0, 0.0], [1, 1])[:, 0]
        proj_pair = abs(np.trapezoid(pair * psi, x))
        proj_one = abs(np.trapezoid(rn[:, 0, 0] * psi, x))
        assert proj_pair < 1e-9 * proj_one, n
    # below the second mode (c / L = 57 Hz) the pair leaves only the uniform mode 0 (and the
    # tails of the even modes): the middle half of the duct hears it far more evenly than
    # it hears one source, whose first mode tilts it from end to end
    low = f < 50.0
    mid = (x > length / 4) & (x < 3 * length / 4)
    pair_spread = seat_spread_db(seat_levels_db(both[mid][:, low]))
    one_spread = seat_spread_db(seat_levels_db(one[mid][:, low]))
    assert pair_spread < 0.3 * one_spread, (pair_spread, one_spread)


def test_search_finds_a_known_optimum():
    # Synthetic case with an exact optimum: subwoofer A hears (1 + m_p), B hears
    # -2 (1 - m_p) e^{+jw 3 ms} relative to A's timing (seat-dependent parts m_p). A at
    # 0 ms, 0 dB, normal and B 3 ms later, -6.02 dB, inverted sum to 2 e^{-jw 3 ms}
    # at every seat: no spread at all. Any other choice leaves some (algebra above).
    rng = np.random.default_rng(5)
    f = spread_grid_hz(180.0)
    n_pos = 6
    smooth = np.exp(-((np.log2(f)[None, :] - rng.uniform(4.5, 7.3, (n_pos, 1))) ** 2) / 0.3)
    m = 0.45 * smooth * np.exp(1j * rng.uniform(0, 2 * np.pi, (n_pos, 1)))
    t1 = 0.003
    a = np.exp(-2j * np.pi * f * t1) * (1 + m)
    b = -2 * np.exp(-2j * np.pi * f * t1) * (1 - m) * np.exp(2j * np.pi * f * t1)
    resp = np.stack([a, b], 1)
    plan = plan_subwoofers(resp, f, ["a", "b"], [0, 1], predict=False)
    assert plan.spread_after_db < 0.05
    assert plan.spread_equal_db > 1.0
    assert plan.delay_s[1] - plan.delay_s[0] == pytest.approx(t1, abs=1e-9)
    assert plan.gain_db[1] - plan.gain_db[0] == pytest.approx(-6.0)
    assert plan.polarity[0] * plan.polarity[1] == -1


def test_search_finds_a_known_optimum_that_needs_an_own_cut():
    # Synthetic case with an exact optimum that needs one subwoofer's own filter: A hears
    # (1 + m_p) / H and B hears (1 - m_p), H being the cut of -6 dB at 50 Hz, Q 2 that the
    # search offers (cookbook peaking filter). Fed equally with A through H, the sum is 2 at
    # every seat (no spread at all); without the cut A's resonance 1/H leaves the seats
    # different around 50 Hz (algebra above).
    rng = np.random.default_rng(11)
    f = spread_grid_hz(180.0)
    n_pos = 6
    smooth = np.exp(-((np.log2(f)[None, :] - rng.uniform(5.0, 6.5, (n_pos, 1))) ** 2) / 0.5)
    m = 0.4 * smooth * np.exp(1j * rng.uniform(0, 2 * np.pi, (n_pos, 1)))
    h = cuts_response(f, [(50.0, -6.0, 2.0)], FS)
    resp = np.stack([(1 + m) / h, 1 - m], 1)
    without = plan_subwoofers(resp, f, ["a", "b"], [0, 1], predict=False, own_filters=False)
    plan = plan_subwoofers(resp, f, ["a", "b"], [0, 1], predict=False, fs=FS)
    assert without.spread_after_db > 0.1
    assert plan.spread_after_db < 0.01 * without.spread_after_db
    assert plan.cuts[0] == [(50.0, -6.0, 2.0)] and plan.cuts[1] == []
    assert plan.filter == ["cut -6.0 dB at 50 Hz (Q 2)", "none"]
    np.testing.assert_allclose(plan.delay_s, 0.0)
    np.testing.assert_allclose(plan.gain_db, 0.0)


def test_an_own_cut_is_the_cookbook_peaking_filter():
    # reference: pyfar.dsp.filter.bell with bell_type "III" (bandwidth at half the gain in
    # dB, the cookbook's definition of Q for its peaking filter); the two agree to 1e-4 dB
    f = np.geomspace(10.0, 2000.0, 400)
    for f0, g, q, fs in (
        (50.0, -6.0, 2.0, 48000),
        (31.5, -2.0, 4.0, 44100),
        (90.0, -9.0, 1.0, 96000),
    ):
        ref = pf.dsp.filter.bell(None, f0, g, q, bell_type="III", sampling_rate=fs)
        b, a = ref.coefficients[0]
        want = 20 * np.log10(np.abs(freqz(b, a, worN=f, fs=fs)[1]))
        got = 20 * np.log10(np.abs(sosfreqz(cut_sos(f0, g, q, fs), worN=f, fs=fs)[1]))
        np.testing.assert_allclose(got, want, atol=1e-4)
        # exactly the gain at the centre (cookbook definition)
        np.testing.assert_allclose(20 * np.log10(abs(cuts_response([f0], [(f0, g, q)], fs))), g)
    with pytest.raises(ValueError, match="only cuts"):
        cut_sos(50.0, 1.0, 2.0, 48000)


@settings(max_examples=40, deadline=None)
@given(
    f0=st.floats(20.0, 300.0),
    gain=st.floats(-30.0, 0.0),
    q=st.floats(0.3, 10.0),
    fs=st.sampled_from([44100, 48000, 96000]),
)
def test_an_own_cut_never_exceeds_0_db(f0, gain, q, fs):
    # safety (issue 20): a subwoofer's own filter only cuts. Peaking filter with A <= 1:
    # |H|^2 - 1 has the sign of (A^2 - 1) (cookbook algebra), checked on a dense grid with
    # scipy's sosfreqz, DC and Nyquist included
    grid = np.concatenate([np.linspace(0.0, fs / 2, 1 << 15), f0 * 2.0 ** np.linspace(-2, 2, 801)])
    _, h = sosfreqz(cut_sos(f0, gain, q, fs), worN=grid, fs=fs)
    assert np.max(np.abs(h)) <= 1.0 + 1e-9


@settings(max_examples=8, deadline=None)
@given(
    n_sub=st.integers(2, 3),
    seed=st.integers(0, 10_000),
    spread=st.floats(0.0, 20.0),
)
def test_no_subwoofer_is_raised(n_sub, seed, spread):
    # safety (issue 20): every level a cut, the loudest at exactly 0 dB, for any input
    rng = np.random.default_rng(seed)
    f = spread_grid_hz(60.0)
    level = 10 ** (rng.uniform(-spread, spread, (4, n_sub, 1)) / 20)
    resp = level * np.exp(1j * rng.uniform(0, 2 * np.pi, (4, n_sub, f.size)))
    plan = plan_subwoofers(
        resp, f, [f"s{i}" for i in range(n_sub)], list(range(n_sub)), predict=False
    )
    assert np.all(plan.gain_db <= 0.0) and plan.gain_db.max() == 0.0
    assert np.all(plan.gain_db >= OFF_DB)
    # each subwoofer's own filter: cuts only, no deeper than offered, at most MAX_CUTS
    for cuts in plan.cuts:
        assert len(cuts) <= MAX_CUTS
        assert all(min(CUT_DEPTHS_DB) <= g < 0.0 for _, g, _ in cuts)
    assert np.all(plan.delay_s >= 0.0)
    # never worse than equal feed nor than the best single subwoofer, at the measured seats
    assert plan.spread_after_db <= plan.spread_equal_db + 1e-9
    # (a subwoofer 'off' is at OFF_DB = -60 dB, 0.1 % of its amplitude: within 0.02 dB)
    assert plan.spread_after_db <= plan.spread_single_db.min() + 0.02


@pytest.fixture(scope="module")
def two_sub_design():
    dims, t60, subs, lat = MULTI_SUB_ROOMS["two-front-back"]
    irs = simulate_pra(
        dims,
        mains_m(dims) + subs,
        ["main"] * 2 + ["sub"] * 2,
        sofa_positions(dims),
        t60,
        [0, 0, *lat],
        length_s=0.6,
    )
    d = design_from_dict(
        {
            "channel_names": "left,right,front_sub,back_sub",
            "subwoofer": "front_sub,back_sub",
            "sample_rates": [FS, 96000],
        }
    )
    return irs, run_design(irs, FS, Settings(design=d))


def _through_own(row: np.ndarray, arr, k: int, rate: int) -> np.ndarray:
    """``row`` through subwoofer ``k``'s own filter (its cuts by scipy's sosfilt, or its
    shaped feed's FIR filter by numpy's convolution), cut to the row's length."""
    if arr.feed is None:
        for f0, gain, q in arr.cuts[k]:
            row = sosfilt(cut_sos(f0, gain, q, rate), row)
        return row
    fir = feed_fir(arr.feed_nodes_hz, arr.feed[k], rate, arr.feed_latency_s)
    return np.convolve(row, fir)[: row.size]


def test_each_subwoofer_gets_the_array_filter_with_its_own_delay_level_and_polarity(
    two_sub_design,
):
    _, r = two_sub_design
    arr = r.system.subwoofers
    assert arr is not None and arr.names == ["front_sub", "back_sub"]
    assert r.system.roles == ["main", "main", "sub", "sub"]
    for rate, h in r.firs.items():
        assert h.shape[0] == 4
        rows = []
        shifts = [int(round(t * rate)) for t in arr.delay_s]
        m = h.shape[1] - max(shifts)
        for k, c in enumerate((2, 3)):
            g = 10 ** (arr.gain_db[k] / 20) * arr.polarity[k]
            rows.append(h[c, shifts[k] : shifts[k] + m] / g)
        # each row is the array filter through that subwoofer's own filter; causal LTI
        # filters commute, also on sequences cut to one length (the first m output
        # samples depend only on the first m input samples), so B's filter on A's row
        # equals A's filter on B's row exactly when both come from one array filter
        a_then_b = _through_own(rows[0], arr, 1, rate)
        b_then_a = _through_own(rows[1], arr, 0, rate)
        np.testing.assert_allclose(a_then_b, b_then_a, atol=1e-9)
    # the safety ceiling holds for every output as delivered (peak gain <= 0 dB)
    assert all(s.peak_gain_db <= r.settings.design.ceiling_db + 1e-6 for s in r.stats)


def test_each_subwoofer_output_carries_the_crossover_low_pass(two_sub_design):
    # Linkwitz, JAES 24(1), 1976: the 4th-order low-pass falls 24 dB/octave beyond fc, so
    # two octaves above the crossover every subwoofer output lies well below its level at
    # fc / 2 (the correction in front of it moves that by a few dB at most). Each output
    # also carries its subwoofer's own shaped feed, which may lie several dB lower at
    # fc / 2 than above its last node; it is taken out (its FIR's response by scipy's freqz)
    _, r = two_sub_design
    arr = r.system.subwoofers
    fc = r.system.integration.crossover_hz
    lp, hp = linkwitz_riley_response(np.array([fc / 2, 4 * fc]), fc, FS, 24)
    assert 20 * np.log10(abs(lp[1] / lp[0])) < -45
    for k, c in enumerate((2, 3)):
        h = freqz(r.firs[FS][c], worN=[fc / 2, 4 * fc], fs=FS)[1]
        own_fir = feed_fir(arr.feed_nodes_hz, arr.feed[k], FS, arr.feed_latency_s)
        shared = h / freqz(own_fir, worN=[fc / 2, 4 * fc], fs=FS)[1]
        assert 20 * np.log10(abs(shared[1]) / abs(shared[0])) < -30


def test_routes_manifest_and_summary_name_every_subwoofer(two_sub_design):
    _, r = two_sub_design
    fields = manifest_fields(r)
    routes = [x for x in fields["routes"] if x["sample_rate"] == FS]
    # two mains, each to its own output and to both subwoofers at -6.02 dB (1 / 2 mains)
    assert len(routes) == 6
    assert {x["output_name"] for x in routes if x["gain_db"] != 0} == {"front_sub", "back_sub"}
    assert all(x["gain_db"] == pytest.approx(-6.021, abs=1e-3) for x in routes if x["gain_db"])
    sw = fields["system"]["subwoofers"]
    assert [e["name"] for e in sw["each"]] == ["front_sub", "back_sub"]
    arr = r.system.subwoofers
    for e, cuts, words in zip(sw["each"], arr.cuts, arr.filter, strict=True):
        assert e["filter"] == words
        assert [(c["freq_hz"], c["gain_db"], c["q"]) for c in e["cuts"]] == [
            (round(f0, 2), g, q) for f0, g, q in cuts
        ]
        assert all(c["gain_db"] < 0 for c in e["cuts"])  # cuts only
    assert sw["predicted_spread_after_db"] is not None
    text = "\n".join(system_sentences(fields))
    assert "At seats you did not measure, expect the bass to vary by about" in text
    assert "Bass management" in text
    assert "own filter only cuts" in text
    assert build_routes(["left", "right", "front_sub", "back_sub"], [FS], r.system) == routes


def test_unknown_subwoofer_names_are_refused():
    with pytest.raises(SettingsError, match="rear"):
        design_from_dict({"channel_names": "left,right,front_sub", "subwoofer": "front_sub,rear"})
    with pytest.raises(SettingsError, match="once"):
        design_from_dict({"channel_names": "left,right,a", "subwoofer": "a,a"})


def test_positions_advice_asks_for_a_wide_spread_with_several_subwoofers():
    assert positions_advice(1, 3) is None
    text = positions_advice(2, 3)
    assert "whole listening area" in text and "at least 5" in text
    assert "at least" not in positions_advice(3, 6)


def test_mains_and_subwoofers_judged_together_sum_like_a_linkwitz_riley_pair():
    # Linkwitz, JAES 24(1), 1976: LR4 low-pass + high-pass is an all-pass. A subwoofer that
    # hears exactly what both mains together hear is matched to them at 0 dB, and the sum the
    # search judges has the mains' magnitude at every frequency and seat.
    rng = np.random.default_rng(2)
    f = spread_grid_hz(174.0)
    mains = rng.standard_normal((4, 2, f.size)) + 1j * rng.standard_normal((4, 2, f.size))
    sub = mains.sum(axis=1, keepdims=True)
    heard, base = with_mains(sub, mains, f, 87.0, FS)
    np.testing.assert_allclose(np.abs(heard[:, 0] + base), np.abs(sub[:, 0]), rtol=1e-9)


def test_listening_cases_one_main_alone_sums_like_a_linkwitz_riley_pair():
    # Linkwitz, JAES 24(1), 1976: LR4 low-pass + high-pass is an all-pass. With both mains
    # hearing the same L at every seat and the subwoofer hearing L + R = 2 L, the case 'left
    # alone' (left through the high-pass, the subwoofer at 1/2 through the low-pass, level
    # matched on both mains) has |L| at every frequency, and so has 'both' (|2 L|)
    rng = np.random.default_rng(4)
    f = spread_grid_hz(174.0)
    one = rng.standard_normal((4, 1, f.size)) + 1j * rng.standard_normal((4, 1, f.size))
    mains = np.concatenate([one, one], axis=1)
    sub = mains.sum(axis=1, keepdims=True)
    heard, bases, scales = listening_cases(sub, mains, f, 87.0, FS)
    assert bases.shape == (3, 4, f.size)
    np.testing.assert_allclose(scales, [0.5, 0.5, 1.0])
    for b, s in zip(bases, scales, strict=True):
        want = np.abs(one[:, 0]) * (2.0 if s == 1.0 else 1.0)
        np.testing.assert_allclose(np.abs(b + s * heard[:, 0]), want, rtol=1e-9)


def test_several_subwoofers_with_mixed_phase(two_sub_design):
    # --phase mixed with several subwoofers: the array's excess phase is undone once, in the
    # filter every subwoofer shares, under the single-subwoofer mixed-phase rules; each
    # subwoofer's own delay, level, polarity and cuts follow it
    irs, _ = two_sub_design
    d = design_from_dict(
        {
            "channel_names": "left,right,front_sub,back_sub",
            "subwoofer": "front_sub,back_sub",
            "sample_rates": [FS],
            "phase": "mixed",
        }
    )
    r = run_design(irs, FS, Settings(design=d))
    mp, arr = r.mixed_phase, r.system.subwoofers
    assert mp is not None and len(mp.estimates) == 4 and len(mp.views) == 4
    assert sorted({x.channel for x in mp.stats}) == [0, 1, 2, 3]
    # the safety ceiling holds for every output as delivered (peak gain <= 0 dB)
    assert all(s.peak_gain_db <= d.ceiling_db + 1e-6 for s in r.stats)
    for x in mp.stats:  # the mixed-phase rules of one loudspeaker, held by every output
        assert x.magnitude_error_db <= MAGNITUDE_TOLERANCE_DB + 1e-9
        assert x.pre_ringing_db <= PRE_RING_LIMIT_DB + 1e-9
    # both subwoofer outputs carry one shared mixed-phase filter (commuting their own cuts,
    # as in the minimum-phase case)
    h = r.firs[FS]
    m = h.shape[1] - int(round(max(arr.delay_s) * FS))
    rows = []
    for k, c in enumerate((2, 3)):
        g = 10 ** (arr.gain_db[k] / 20) * arr.polarity[k]
        n = int(round(arr.delay_s[k] * FS))
        rows.append(h[c, n : n + m] / g)
    rows = [_through_own(rows[0], arr, 1, FS), _through_own(rows[1], arr, 0, FS)]
    np.testing.assert_allclose(rows[0], rows[1], atol=1e-9)
    # an all-pass changes no magnitude: every output has the minimum-phase design's
    # magnitude up to one gain (scipy's freqz, 25 to 100 Hz for the subwoofers, 200 Hz to
    # 2 kHz for the mains; within 0.5 dB, the mixed-phase tolerance being 0.1 dB)
    _, r_min = two_sub_design
    assert r_min.system.subwoofers.delay_s.tolist() == arr.delay_s.tolist()
    for c, band in (
        (0, (200.0, 2000.0)),
        (1, (200.0, 2000.0)),
        (2, (25.0, 100.0)),
        (3, (25.0, 100.0)),
    ):
        f = np.geomspace(*band, 60)
        a = np.abs(freqz(h[c], worN=f, fs=FS)[1])
        b = np.abs(freqz(r_min.firs[FS][c], worN=f, fs=FS)[1])
        diff = 20 * np.log10(a / b)
        np.testing.assert_allclose(diff - np.median(diff), 0.0, atol=0.5)


def test_shaped_feeds_never_raise_and_the_mains_wait_for_them(two_sub_design):
    # each subwoofer's own filter is a shaped feed realised 20 ms late (the default latency
    # budget); scipy's freqz of its taps on a dense grid stays at or below 0 dB (it never
    # raises a subwoofer), and the mains are delayed to arrive with the late subwoofers
    _, r = two_sub_design
    arr = r.system.subwoofers
    lat = r.settings.design.latency_ms / 1000.0
    assert arr.feed is not None and arr.feed_latency_s == pytest.approx(lat)
    for k in range(2):
        for rate in (FS, 96000):
            h = feed_fir(arr.feed_nodes_hz, arr.feed[k], rate, lat)
            _, resp = freqz(h, worN=np.geomspace(5.0, rate / 2 * 0.99, 4000), fs=rate)
            assert np.abs(resp).max() <= 1.0 + 2e-3
    # the mains wait for the late feeds (the design judged the subwoofers' timing on their
    # main sound, the feeds taken early by the latency): every main is delayed at least that
    # much, inside its filter
    mains_delay = r.system.delay_s[:2]
    assert mains_delay.min() >= lat - 1e-9
    for rate, h in r.firs.items():
        n_lat = int(round(lat * rate))
        assert np.abs(h[:2, :n_lat]).max() == 0.0
    fields = manifest_fields(r)
    sw = fields["system"]["subwoofers"]
    assert sw["feed_latency_ms"] == pytest.approx(lat * 1000.0)
    for e in sw["each"]:
        assert len(e["feed"]) == arr.feed_nodes_hz.size and e["cuts"] == []
        assert max(n["gain_db"] for n in e["feed"]) <= 1e-9
        assert e["filter"].startswith("shaped")
    text = "\n".join(system_sentences(fields))
    assert f"may act up to {lat * 1000:g} ms early" in text
    assert "leans pessimistic" in text  # the prediction's caveat with shaped feeds
    # the crossover was chosen for the seats' evenness, and the summary says which
    fc = r.system.integration.crossover_hz
    assert arr.crossover_hz == pytest.approx(fc)
    assert sw["crossover_for_spread_hz"] == pytest.approx(fc, abs=0.05)
    assert f"The crossover frequency, {fc:.0f} Hz, is the one" in text


def test_the_crossover_goes_where_the_subwoofers_make_the_seats_agree(monkeypatch):
    # two subwoofers that every seat hears alike (their sum is the same everywhere) and mains
    # whose level differs from seat to seat: the Linkwitz-Riley low-pass (Linkwitz, JAES
    # 24(1), 1976) hands more of the band to the subwoofers the higher the crossover, so the
    # seats agree best at the highest candidate; with the choice off, none is made
    f = spread_grid_hz(2.0 * np.sqrt(50.0 * 150.0))
    rng = np.random.default_rng(7)
    n_pos = 5
    room = 1.0 + 0.5 * np.exp(-2j * np.pi * f * 0.003)
    subs = np.broadcast_to(room, (n_pos, 2, f.size)).astype(complex)
    mains = (rng.uniform(0.3, 3.0, (n_pos, 2, 1)) * np.exp(-2j * np.pi * f * 0.002)).astype(complex)
    plan = plan_subwoofers(subs, f, ["a", "b"], [2, 3], predict=False, own_filters=False)
    candidates = [50.0, 70.0, 100.0, 150.0]
    assert spread_crossover_hz(subs, mains, f, candidates, FS, plan) == 150.0
    monkeypatch.setattr("roomcorr.design.system.subwoofers.SPREAD_CROSSOVER", False)
    assert spread_crossover_hz(subs, mains, f, candidates, FS, plan) is None


def _children(pid: int) -> list[int]:
    """Process ids of ``pid``'s children (Linux /proc)."""
    kids: list[int] = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            kids += [int(k) for k in (task / "children").read_text().split()]
        except OSError:
            continue
    return kids


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="/proc and fork: Linux")
def test_ctrl_c_while_the_prediction_runs_in_its_child(two_sub_design, tmp_path):
    # the command-line design runs the leave-one-position-out prediction in a forked child
    # (roomcorr/sidejob.py); a Ctrl-C meanwhile ends the command with one line and exit 130
    # (POSIX shells: 128 + SIGINT) and no traceback, the child (which the signal reaches
    # too) is stopped with it, and nothing is written
    irs, _ = two_sub_design
    for p in range(irs.shape[0]):
        write_wav(tmp_path / f"pos{p + 1}.wav", irs[p], FS)
    out = tmp_path / "out"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen(
        [sys.executable, "-m", "roomcorr", "design", *sorted(map(str, tmp_path.glob("pos*.wav"))),
         "--names", "left,right,front_sub,back_sub", "--subwoofer", "front_sub,back_sub",
         "--out", str(out)],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        start_new_session=True,  # its own process group, as a terminal's foreground job
    )
    try:
        child = None
        deadline = time.monotonic() + 60.0
        while child is None and proc.poll() is None and time.monotonic() < deadline:
            kids = _children(proc.pid)
            child = kids[0] if kids else None
            time.sleep(0.002)
        assert child is not None, "the prediction's child never started"
        os.killpg(proc.pid, signal.SIGINT)  # Ctrl-C reaches the whole group, child too
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert proc.returncode == 130 and "interrupted" in lines[-1], err
    assert "Traceback" not in err
    time.sleep(0.2)
    try:
        state = Path(f"/proc/{child}/status").read_text()
    except OSError:
        state = ""  # gone
    assert "State:\tR" not in state and "State:\tS" not in state, state
    assert not (out / "manifest.json").exists()
