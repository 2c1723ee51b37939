"""The free-feed bound of benchmarks/bench_subwoofer_floor.py (issue 20): its figure, its
gradient and its optimiser on synthetic cases with a known answer.

Module under test: benchmarks/bench_subwoofer_floor.py (not part of the package).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import approx_fprime

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))

from bench_subwoofer_floor import (  # noqa: E402
    cost_and_grad,
    curvature_penalty,
    direct_figure,
    feed,
    level_operator,
    node_basis,
    optimise_feed,
    pack,
    room_cases,
    spread_db,
)

FS = 48000
N_SAMPLES = 16384  # 2.9 Hz bins: small operator, still several bins per 1/6 octave above 50 Hz
C_M_S = 343.2  # ISO 9613-1 at 20 °C


@pytest.fixture(scope="module")
def operator():
    return level_operator(N_SAMPLES, FS)


def _full(y_cols: np.ndarray, cols: np.ndarray) -> np.ndarray:
    full = np.zeros((y_cols.shape[0], N_SAMPLES // 2 + 1), dtype=complex)
    full[:, cols] = y_cols
    return full


def test_operator_equals_pyfar_on_the_whole_signal(operator):
    # pyfar's smooth_fractional_octave (through bench_subwoofers._levels_db, the benchmark's
    # own figure) on seats whose spectrum lives in the operator's bins: the operator built
    # from unit spectra must give the same figure (smoothing is linear in the magnitude).
    cols, smooth, interp = operator
    rng = np.random.default_rng(3)
    y = rng.standard_normal((6, cols.size)) + 1j * rng.standard_normal((6, cols.size))
    ours = spread_db(y, smooth, interp)
    ref = direct_figure(_full(y, cols), N_SAMPLES)
    assert ref > 1.0
    assert abs(ours - ref) < 1e-6, (ours, ref)
    # and with energy outside the operator's bins (15-170 Hz), as a real room has: the
    # truncation stays far below the 0.05 dB asked for
    full = _full(y, cols)
    wide = (np.arange(full.shape[1]) > 0) & (np.arange(full.shape[1]) * FS / N_SAMPLES < 400)
    full[:, wide & (full[:, 0:1] == 0).all(0)] = 1.0
    y_in = full[:, cols]
    assert abs(spread_db(y_in, smooth, interp) - direct_figure(full, N_SAMPLES)) < 0.05


@pytest.mark.parametrize("smooth_feed", [False, True])
def test_gradient_matches_finite_differences(operator, smooth_feed):
    # Central reference: scipy's forward finite differences of the cost itself.
    cols, smooth, interp = operator
    f = cols * FS / N_SAMPLES
    rng = np.random.default_rng(4)
    n_seats, n_subs = 5, 3
    cases = [
        (
            rng.standard_normal((n_seats, cols.size))
            + 1j * rng.standard_normal((n_seats, cols.size)),
            s * (rng.standard_normal((n_seats, n_subs, cols.size)) + 1j),
        )
        for s in (0.5, 1.0)
    ]
    basis = node_basis(f, 1 / 12) if smooth_feed else None
    n_nodes = cols.size if basis is None else basis.shape[1]
    z = rng.uniform(0.2, 0.9, (n_subs, n_nodes)) * np.exp(1j * rng.uniform(0, 6, (n_subs, n_nodes)))
    x = pack(z, 1.3, delay_s=[0.001, -0.002, 0.004])
    val, grad = cost_and_grad(x, cases, smooth, interp, f, basis)
    fd = approx_fprime(x, lambda v: cost_and_grad(v, cases, smooth, interp, f, basis)[0], 1e-7)
    np.testing.assert_allclose(grad[:-4], fd[:-4], rtol=1e-4, atol=2e-6)
    # the delays (gradients ~100 per s) by central differences, whose error is second order
    h = 1e-8
    for i in range(x.size - 4, x.size):
        up, down = x.copy(), x.copy()
        up[i] += h
        down[i] -= h
        num = (
            cost_and_grad(up, cases, smooth, interp, f, basis)[0]
            - cost_and_grad(down, cases, smooth, interp, f, basis)[0]
        ) / (2 * h)
        assert abs(grad[i] - num) < 1e-5 * max(1.0, abs(num)), (i, grad[i], num)
    assert val > 0.5


def test_curvature_penalty_value_and_gradient():
    # Second differences of a sequence linear in the node index vanish (exact arithmetic),
    # so a constant gain and a gain varying linearly over log frequency cost nothing; an
    # alternating +-1 sequence has second differences of magnitude 4 at every inner node.
    n_subs, n_nodes, step = 2, 9, 1 / 6
    lin = (0.3 + 0.05 * np.arange(n_nodes)) * np.exp(1j * 0.2)
    x = pack(np.array([np.full(n_nodes, 0.7 + 0.0j), lin]), 1.1, delay_s=[0.001, 0.0])
    assert curvature_penalty(x, n_subs, n_nodes, step, 1.0)[0] < 1e-24
    alt = np.array([(-1.0) ** np.arange(n_nodes), np.ones(n_nodes)]).astype(complex)
    want = 2.0 * (n_nodes - 2) * 16.0 / (step**3 * n_subs)  # mean power 1
    value = curvature_penalty(pack(alt), n_subs, n_nodes, step, 2.0)[0]
    assert abs(value - want) < 1e-9 * want
    # relative to each subwoofer's power: turning one down changes nothing
    quiet = alt.copy()
    quiet[0] *= 0.1
    assert abs(curvature_penalty(pack(quiet), n_subs, n_nodes, step, 2.0)[0] - want) < 1e-9 * want
    # the gradient against scipy's finite differences (approx_fprime), delays and common
    # level untouched by the penalty
    rng = np.random.default_rng(7)
    z = rng.uniform(0.2, 0.9, (n_subs, n_nodes)) * np.exp(1j * rng.uniform(0, 6, (n_subs, n_nodes)))
    x = pack(z, 0.8, delay_s=[0.002, -0.001])
    _, grad = curvature_penalty(x, n_subs, n_nodes, step, 1e-3)
    fd = approx_fprime(x, lambda v: curvature_penalty(v, n_subs, n_nodes, step, 1e-3)[0], 1e-7)
    np.testing.assert_allclose(grad, fd, rtol=1e-4, atol=1e-6)
    assert np.all(grad[-3:] == 0.0)
    assert np.abs(grad).max() > 1e-2


def test_level_match_taken_at_the_given_seats():
    # The subwoofers are matched to the mains' sum by the RMS ratio over fc/2 to 2 fc
    # (as with_mains); taken at other seats whose subwoofers are twice as loud, the match
    # halves, the mains stay as they are.
    rng = np.random.default_rng(8)
    n_bins = N_SAMPLES // 2 + 1
    freq_hz = np.arange(n_bins) * FS / N_SAMPLES
    spec = rng.standard_normal((4, 4, n_bins)) + 1j * rng.standard_normal((4, 4, n_bins))
    cols = np.flatnonzero((freq_hz > 20) & (freq_hz < 160))
    own = room_cases(spec, freq_hz, 100.0, cols)
    other = spec[:3].copy()
    other[:, 2:] *= 2.0
    matched = room_cases(spec, freq_hz, 100.0, cols, other)
    ref = room_cases(spec, freq_hz, 100.0, cols, spec[:3])
    for c in ("left", "right", "both"):
        np.testing.assert_allclose(matched[c][0], own[c][0])
        np.testing.assert_allclose(matched[c][1], 0.5 * ref[c][1], rtol=1e-12)


def _ratio_error(g: np.ndarray, want: np.ndarray, f: np.ndarray) -> float:
    """Median |g_B / g_A - want| over the bins well inside the figure's band where A plays.

    The optimum is not unique bin by bin: the figure smooths magnitudes over 1/6 octave,
    so a bin may be turned off, or two bins of one window traded against each other, at
    almost no cost; the median over the bins A plays in shows the family found."""
    sel = (f > 30.0) & (f < 90.0) & (np.abs(g[0]) > 0.3)
    assert sel.sum() >= 8
    return float(np.median(np.abs(g[1, sel] / g[0, sel] - want[sel])))


def duct_modes(x_src_m, x_mic_m, freq_hz, length_m, modes=(0, 1, 3), q=10.0):
    """Closed rigid duct, a few modes of the modal expansion with shapes cos(n pi x / L)
    (closed-form standing-wave solution; damping per mode as a quality factor)."""
    k = 2 * np.pi * np.asarray(freq_hz) / C_M_S
    out = np.zeros((np.size(x_mic_m), k.size), dtype=complex)
    for n in modes:
        kn = n * np.pi / length_m
        shape = np.cos(kn * x_src_m) * np.cos(kn * np.asarray(x_mic_m))[:, None]
        out += shape / (kn**2 - k**2 + 1j * k * max(kn, 0.5) / q)
    return out


def test_optimiser_finds_equal_feed_at_the_ends_of_a_duct(operator):
    # Two identical sources at the two ends of a closed duct fed equally excite none of the
    # odd modes (psi_n(0) + psi_n(L) = 1 + (-1)^n = 0 for odd n; closed-form standing-wave
    # solution). With modes 0, 1 and 3 only, equal feed leaves the uniform mode 0: the same
    # level at every seat, a spread of 0 dB, the known optimum. Started from one source
    # alone, the optimiser must find it, and the gains it finds must be (nearly) equal.
    cols, smooth, interp = operator
    f = cols * FS / N_SAMPLES
    length = 4.3  # first mode at 40 Hz, third at 120 Hz
    seats = np.linspace(0.6, 3.7, 7)
    subs = np.stack([duct_modes(0.0, seats, f, length), duct_modes(length, seats, f, length)], 1)
    base = np.zeros((seats.size, f.size), dtype=complex)
    one = np.full((2, f.size), 1e-3, dtype=complex)
    one[0] = 1.0
    start = pack(one)
    before = cost_and_grad(start, [(base, subs)], smooth, interp, f)[0]
    equal = cost_and_grad(pack(np.ones((2, f.size))), [(base, subs)], smooth, interp, f)[0]
    assert before > 3.0 and equal < 1e-9, (before, equal)
    ((fig, x),) = optimise_feed(
        [(base, subs)], smooth, interp, f, [start], level_db=0.0, maxiter=10000
    )
    assert fig < 0.03, fig
    g, _ = feed(x, 2, f)
    err = _ratio_error(g, np.ones(f.size), f)
    assert err < 0.15, err
    assert np.abs(g).max() <= 1.0 + 1e-12  # the level cap holds


@pytest.mark.parametrize("smooth_feed", [False, True])
def test_optimiser_finds_a_known_optimum_with_delay_level_and_polarity(operator, smooth_feed):
    # Synthetic case with an exact optimum (algebra): subwoofer A hears u + v_p, B hears
    # -2 (u - v_p) e^{+jw tau} at seat p. A at full level and B at half level (-6.02 dB),
    # inverted and delayed by tau sum to 2 u at every seat: spread 0. From equal feed
    # (about 4 dB here) the optimiser must reach it, with B / A = -0.5 e^{-jw tau}.
    cols, smooth, interp = operator
    f = cols * FS / N_SAMPLES
    rng = np.random.default_rng(7)
    tau = 0.004
    u = 1.0 + 0.3 * np.cos(f / 9.0)
    v = 0.6 * (rng.standard_normal((6, 1)) + 1j * rng.standard_normal((6, 1)))
    v = v * np.exp(1j * f / 17.0)
    subs = np.stack([u + v, -2 * (u - v) * np.exp(2j * np.pi * f * tau)], 1)
    base = np.zeros((6, f.size), dtype=complex)
    basis = node_basis(f, 1 / 12) if smooth_feed else None
    n_nodes = f.size if basis is None else basis.shape[1]
    start = pack(np.ones((2, n_nodes)))
    before = cost_and_grad(start, [(base, subs)], smooth, interp, f, basis)[0]
    assert before > 2.0, before
    ((fig, x),) = optimise_feed(
        [(base, subs)], smooth, interp, f, [start], basis, level_db=0.0, maxiter=10000
    )
    assert fig < 0.03, fig
    g, _ = feed(x, 2, f, basis)
    err = _ratio_error(g, -0.5 * np.exp(-2j * np.pi * f * tau), f)
    assert err < 0.15, err
    assert np.abs(g).max() <= 1.0 + 1e-12
