"""A subwoofer's own shaped feed: a smooth complex response chosen with the others.

A delay, a level and a polarity per subwoofer (:mod:`roomcorr.design.system.subwoofers`)
change which room modes each subwoofer excites, the same way at every frequency. A
**shaped feed** lets that choice vary slowly with frequency: each subwoofer gets a complex
gain at nodes :data:`STEP_OCT` apart (linear interpolation in log frequency between them),
times its own delay. It stays smooth (its nodes are as far apart as the 1/6-octave window
of the figure it is judged by, so it cannot follow one seat's narrow details), and every
gain's magnitude is at most 1: no subwoofer is ever raised.

The gains are chosen by L-BFGS-B (scipy) on the analytic gradient of the search's own
figure (:func:`feed_cost_and_grad`: the seat-to-seat spread of the 1/6-octave level,
averaged over the listening cases, with the charge for lost level), starting from the
search's delays, levels and polarities. The gains at the lowest and the highest node are
real (their phases fixed at 0, their signs free), so the response outside the nodes is a
plain gain: the filter stays compact in time.

Such a response is not minimum phase: its realisation (:func:`feed_fir`) is an FIR filter
that anticipates by ``latency_s`` (every subwoofer alike; the design delays the mains to
match, and reports it). What the feed would need before that is left out, and the fit judges
each feed as it will be realised (:func:`realised_basis`), not as designed.

All functions are pure (arrays in, arrays out).
"""

from __future__ import annotations

import functools

import numpy as np
from scipy.optimize import minimize

#: Spacing of the nodes, octaves (chosen on the development rooms of
#: ``benchmarks/bench_subwoofers.py``: 1/3 octave 0.614 of equal feed at their held-out
#: seats, 1/6 octave 0.579, 1/8 octave 0.600, with MAXITER iterations).
STEP_OCT = 1.0 / 6.0
#: Iterations of L-BFGS-B at most (on the development rooms, with delays moved in
#: :data:`DELAY_UNIT_S`: 150 iterations 0.510 of equal feed at their held-out seats, 300
#: 0.507, 1000 0.498; with delays moved in seconds, 1000 iterations gave 0.585).
MAXITER = 150
#: Corrections L-BFGS-B keeps (scipy's default).
MAXCOR = 10
#: The unit the fit moves the delays in, s: a step of one unit in any variable (a node's
#: magnitude, its phase in radians, a delay) then turns the phase at the top of the band
#: (twice the middle of the crossover range, about 170 Hz by default) by about a radian
#: (2 pi 170 Hz x 1 ms = 1.07). In seconds, the delays' gradients were about a
#: thousand times the others' and L-BFGS-B stopped at 1000 iterations far from where it
#: goes with this unit in 300 (figures above).
DELAY_UNIT_S = 1e-3
#: Length of a feed's FIR after its latency, s (a detail of a feed a sixth of an octave
#: wide at 20 Hz, 2.4 Hz, decays within a few tenths of a second; the fit judges the
#: filter with this length, so what it cuts off is accounted for).
TAIL_S = 0.4

#: 10 log10(x) = this times ln(x) (the spread's natural logarithms in dB).
DB_PER_NEPER_POWER = 10.0 / np.log(10.0)


def node_freqs_hz(lo_hz: float, hi_hz: float, step_oct: float = STEP_OCT) -> np.ndarray:
    """Nodes ``step_oct`` apart from ``lo_hz`` to at least ``hi_hz``."""
    n = int(np.ceil(np.log2(hi_hz / lo_hz) / step_oct - 1e-9)) + 1
    return lo_hz * 2.0 ** (step_oct * np.arange(n))


def _interp_log(freq_hz: np.ndarray, nodes_hz: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Each row of ``values`` (n_rows, n_nodes), real or complex, interpolated linearly in
    log frequency from the nodes to ``freq_hz`` and held constant beyond the first and last
    node; shape (n_rows, n_freqs)."""
    lf = np.log2(np.maximum(np.asarray(freq_hz, dtype=float), 1e-3))
    ln = np.log2(nodes_hz)
    values = np.asarray(values)
    out = np.array([np.interp(lf, ln, v.real) for v in values])
    if np.iscomplexobj(values):
        out = out + 1j * np.array([np.interp(lf, ln, v.imag) for v in values])
    return out


def node_basis(freq_hz: np.ndarray, nodes_hz: np.ndarray) -> np.ndarray:
    """Linear interpolation in log frequency from the nodes to ``freq_hz``, held constant
    beyond the first and last node; shape (n_freqs, n_nodes). Each row is a convex
    combination, so node gains of magnitude at most 1 stay at most 1 everywhere."""
    return _interp_log(freq_hz, nodes_hz, np.eye(len(nodes_hz))).T


def feed_response(
    freq_hz: np.ndarray, nodes_hz: np.ndarray, z: np.ndarray, latency_s: float | None = None
) -> np.ndarray:
    """Complex response of feeds with node gains ``z`` (n_subs, n_nodes) at ``freq_hz``,
    shape (n_subs, n_freqs), without their latency: as designed (``latency_s`` ``None``),
    or as realised by :func:`feed_fir` with that latency (:func:`realised_basis`)."""
    z = np.asarray(z)
    if latency_s is None:  # node_basis @ z, as one interpolation per feed
        return _interp_log(freq_hz, nodes_hz, z.astype(complex))
    b_re, b_im = realised_basis(np.asarray(freq_hz, float), nodes_hz, latency_s)
    return z.real @ b_re.T + z.imag @ b_im.T


def _fade(n: int) -> np.ndarray:
    """Window of a feed's FIR: flat, the last tenth a half Hann."""
    w = np.ones(n)
    k = max(n // 10, 1)
    w[n - k :] = np.hanning(2 * k)[k:]
    return w


def _basis_irs(
    nodes_hz: np.ndarray, fs: float, latency_s: float, tail_s: float
) -> tuple[np.ndarray, np.ndarray]:
    """The FIR filters (:func:`feed_fir`) of a real and of an imaginary unit gain at each
    node, each (n_nodes, n_taps): the realisation is linear in the real and imaginary parts
    of the node gains (not in the complex gains: a filter's taps are real)."""
    nodes = np.ascontiguousarray(nodes_hz, dtype=float)
    return _basis_irs_of(nodes.tobytes(), float(fs), float(latency_s), float(tail_s))


@functools.lru_cache(maxsize=8)
def _basis_irs_of(
    nodes_bytes: bytes, fs: float, latency_s: float, tail_s: float
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_basis_irs` on nodes given as their bytes, remembered: the realised basis and
    every realised peak of a design (the prediction's too) start from the same filters;
    the arrays are read-only."""
    nodes_hz = np.frombuffer(nodes_bytes)
    n = int(round((latency_s + tail_s) * fs))
    n_fft = 1 << int(np.ceil(np.log2(8 * n)))
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    spec = node_basis(f, nodes_hz).T * np.exp(-2j * np.pi * f * latency_s)
    spec[:, 0] = spec[:, 0].real  # the real part of an imaginary gain at DC: none
    spec_im = 1j * spec
    spec_im[:, 0] = 0.0
    if n_fft % 2 == 0:
        spec_im[:, -1] = spec_im[:, -1].real
    w = _fade(n)
    h_re = np.fft.irfft(spec, n_fft, axis=-1)[:, :n] * w
    h_im = np.fft.irfft(spec_im, n_fft, axis=-1)[:, :n] * w
    h_re.flags.writeable = False
    h_im.flags.writeable = False
    return h_re, h_im


#: Sample rate the realised responses are computed at, Hz (the feeds act below a few
#: hundred hertz; above their last node they are a plain gain, which any rate realises).
REALISED_FS = 2000.0


def realised_basis(
    freq_hz: np.ndarray, nodes_hz: np.ndarray, latency_s: float, tail_s: float = TAIL_S
) -> tuple[np.ndarray, np.ndarray]:
    """Responses at ``freq_hz`` (below ``REALISED_FS / 2``) of a real and an imaginary unit
    gain at each node as :func:`feed_fir` realises them, the latency taken out; two arrays
    of shape (n_freqs, n_nodes), complex. The realisation is linear in the node gains' real
    and imaginary parts, so a feed's realised response is ``b_re @ z.real + b_im @ z.imag``:
    the fit judges what will be delivered."""
    f = np.ascontiguousarray(freq_hz, dtype=float)
    nodes = np.ascontiguousarray(nodes_hz, dtype=float)
    return _realised_basis(f.tobytes(), nodes.tobytes(), float(latency_s), float(tail_s))


@functools.lru_cache(maxsize=32)
def _realised_basis(
    freq_bytes: bytes, nodes_bytes: bytes, latency_s: float, tail_s: float
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`realised_basis` on grids given as their bytes, remembered: a design asks for
    the same basis in every fit (the prediction's too) and for every realised response;
    the arrays are read-only."""
    freq_hz = np.frombuffer(freq_bytes)
    h_re, h_im = _basis_irs_of(nodes_bytes, REALISED_FS, latency_s, tail_s)
    t = np.arange(h_re.shape[1]) / REALISED_FS - latency_s
    e = np.exp(-2j * np.pi * np.outer(freq_hz, t))
    b_re, b_im = e @ h_re.T, e @ h_im.T
    b_re.flags.writeable = False
    b_im.flags.writeable = False
    return b_re, b_im


#: FFT length of :func:`realised_peak` at :data:`REALISED_FS` (bins 0.12 Hz apart, about
#: twenty to each of the realised filter's 840 taps' worth of resolution: between two bins
#: a filter that long can rise by 0.06 dB at most, Bernstein's inequality as in
#: :func:`roomcorr.design.realise.fir.peak_gain_db`).
PEAK_FFT = 1 << 14


def realised_peak(
    nodes_hz: np.ndarray, z: np.ndarray, latency_s: float, hi_hz: float, tail_s: float = TAIL_S
) -> np.ndarray:
    """Largest magnitude of each feed's response from DC to ``hi_hz``, as :func:`feed_fir`
    realises it with ``latency_s`` (at :data:`REALISED_FS`, on every bin of a
    :data:`PEAK_FFT`-point FFT); shape (n_subs,) for node gains ``z`` (n_subs, n_nodes)."""
    h_re, h_im = _basis_irs(np.asarray(nodes_hz, float), REALISED_FS, latency_s, tail_s)
    z = np.atleast_2d(z)
    mag = np.abs(np.fft.rfft(z.real @ h_re + z.imag @ h_im, PEAK_FFT, axis=-1))
    bins = np.fft.rfftfreq(PEAK_FFT, 1.0 / REALISED_FS)
    return mag[:, bins <= hi_hz].max(axis=1)


def normalised_weights(weights: np.ndarray | None, n_pos: int) -> np.ndarray:
    """Position weights summing to 1 (all equal without ``weights``), as the figures weigh
    the seats."""
    w = np.full(n_pos, 1.0 / n_pos) if weights is None else np.asarray(weights, float)
    return w / w.sum()


def _unpack(x: np.ndarray, n_sub: int, n_nodes: int):
    k = n_sub * n_nodes
    return (
        x[:k].reshape(n_sub, n_nodes),
        x[k : 2 * k].reshape(n_sub, n_nodes),
        x[2 * k : 2 * k + n_sub],
    )


def feed_cost_and_grad(x: np.ndarray, *problem) -> tuple[float, np.ndarray]:
    """Mean over the listening cases of the spread (dB) plus the loss charge, and its
    gradient in ``x`` (node magnitudes, node phases, delays in s), for the problem
    ``resp, bases, scales, weights, basis, freq_hz, smooth, ref_db, max_loss_db,
    loss_weight`` (:class:`FeedFigure`, which a fit builds once)."""
    return FeedFigure(*problem)(x)


class FeedFigure:
    """:func:`feed_cost_and_grad` for one problem, what does not depend on ``x`` computed
    once: a fit evaluates it hundreds of times.

    The seats hear ``y = base + scale * sum_k g_k resp_k`` with
    ``g_k = (B z_k) exp(-j w d_k)``, ``z = rho exp(j phi)``. The figure: ``L = ln(S |y|^2)``
    (``S`` the 1/6-octave smoothing rows), the weighted standard deviation of ``L`` over
    positions averaged over frequency, in dB; plus ``loss_weight`` per dB the weighted mean
    level falls more than ``max_loss_db`` below ``ref_db``. The gradient is the chain rule
    through the standard deviation, the logarithm, the (linear) smoothing and
    ``d|y|^2 = 2 Re(conj(y) dy)``.

    Parameters
    ----------
    resp : ndarray, shape (n_positions, n_subs, n_freqs), complex
    bases : ndarray, shape (n_cases, n_positions, n_freqs), complex
    scales : ndarray, shape (n_cases,) or (n_cases, n_freqs)
        The subwoofers' level in each case, or their response (e.g. through crossovers
        at several frequencies).
    weights : ndarray, shape (n_positions,), summing to 1
    basis : (ndarray, ndarray), each of shape (n_freqs, n_nodes), complex
        Response of a real and of an imaginary unit gain at each node
        (:func:`realised_basis`; as designed: ``(B, 1j * B)`` with ``B`` :func:`node_basis`).
    freq_hz : ndarray, shape (n_freqs,)
    smooth : ndarray, shape (n_judged, n_freqs)
    ref_db : ndarray, shape (n_cases,) or (n_cases, n_judged)
        The level the loss is charged against: of each case's mean level, or of each
        judged point's mean level over the seats (a dip all seats share, where the
        subwoofers cancel, then costs even when the mean over frequency holds).
    max_loss_db, loss_weight : float
    """

    def __init__(
        self,
        resp: np.ndarray,
        bases: np.ndarray,
        scales: np.ndarray,
        weights: np.ndarray,
        basis: np.ndarray,
        freq_hz: np.ndarray,
        smooth: np.ndarray,
        ref_db: np.ndarray,
        max_loss_db: float,
        loss_weight: float,
    ) -> None:
        self.n_sub, n_f = resp.shape[1:]
        self.b_re_t = np.ascontiguousarray(np.asarray(basis[0]).T)
        self.b_im_t = np.ascontiguousarray(np.asarray(basis[1]).T)
        self.b_re = np.asarray(basis[0])
        self.b_im = np.asarray(basis[1])
        self.n_nodes = self.b_re.shape[1]
        self.resp_t = np.ascontiguousarray(np.moveaxis(resp, 1, 0))  # (S, P, F)
        self.conj_resp_t = np.conj(self.resp_t)
        self.bases = np.asarray(bases)
        sc = np.asarray(scales)
        if sc.ndim == 1:
            sc = np.broadcast_to(sc[:, None], (sc.size, n_f))
        self.sc = np.ascontiguousarray(sc[:, None, :])  # (B, 1, F)
        self.conj_sc = np.conj(self.sc)
        self.w = np.asarray(weights, dtype=float)
        self.w_col = self.w[:, None]
        self.jw = -2j * np.pi * np.asarray(freq_hz, dtype=float)
        self.smooth = np.asarray(smooth, dtype=float)
        self.smooth_t = np.ascontiguousarray(self.smooth.T)
        self.ref_db = np.asarray(ref_db, dtype=float)
        self.max_loss_db = float(max_loss_db)
        self.loss_weight = float(loss_weight)
        n_case, n_j = self.bases.shape[0], self.smooth.shape[0]
        self.k_spread = DB_PER_NEPER_POWER / n_j / n_case
        self.k_loss = loss_weight * DB_PER_NEPER_POWER / n_j / n_case

    def __call__(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        """The figure and its gradient at ``x`` (node magnitudes, node phases, delays in s)."""
        k = self.n_sub * self.n_nodes
        rho, phi, d = _unpack(x, self.n_sub, self.n_nodes)
        c, s = np.cos(phi), np.sin(phi)
        rot = np.exp(self.jw * d[:, None])  # (S, F)
        g = ((rho * c) @ self.b_re_t + (rho * s) @ self.b_im_t) * rot
        sub = self.resp_t[0] * g[0]
        for i in range(1, self.n_sub):
            sub = sub + self.resp_t[i] * g[i]
        y = self.bases + self.sc * sub  # (B, P, F)
        n_case, n_pos, n_f = y.shape
        # one matrix product over every case and position (a stack of small ones is slower)
        ps = ((y.real * y.real + y.imag * y.imag).reshape(-1, n_f) @ self.smooth_t).reshape(
            n_case, n_pos, -1
        )  # (B, P, J)
        np.maximum(ps, 1e-30, out=ps)
        lv = np.log(ps)
        mu = self.w @ lv  # (B, J)
        dev = lv - mu[:, None]
        sd = np.sqrt(self.w @ (dev * dev))
        sd += 1e-12
        # the loss charge: per case (the mean level) or per case and frequency (each
        # point's mean over the seats, against a reference of that shape)
        level = mu if self.ref_db.ndim == 2 else mu.mean(axis=-1)
        excess = self.ref_db - DB_PER_NEPER_POWER * level - self.max_loss_db
        cost = float(
            DB_PER_NEPER_POWER * sd.mean() + self.loss_weight * np.maximum(excess, 0.0).mean()
        )
        g_l = (self.k_spread * self.w_col) * (dev / sd[:, None])
        charged = excess > 0.0
        if charged.any():
            if self.ref_db.ndim == 2:
                g_l -= (self.k_loss * self.w_col) * charged[:, None, :]
            else:
                g_l[charged] -= self.k_loss * self.w_col
        g_y = (2.0 * ((g_l / ps).reshape(n_case * n_pos, -1) @ self.smooth)).reshape(
            y.shape
        ) * y  # dcost = Re(conj(g_y) dy)
        t = (g_y * self.conj_sc).sum(axis=0)  # (P, F)
        g_g = (self.conj_resp_t * t).sum(axis=1)  # (S, F)
        grad_d = (np.conj(g_g) * (self.jw * g)).real.sum(axis=1)
        g_0 = np.conj(g_g) * rot
        g_x = (g_0 @ self.b_re).real  # d cost / d Re(z)
        g_z = (g_0 @ self.b_im).real  # d cost / d Im(z)
        grad = np.empty(x.size)
        grad[:k] = (c * g_x + s * g_z).ravel()
        grad[k : 2 * k] = (rho * (c * g_z - s * g_x)).ravel()
        grad[2 * k :] = grad_d
        return cost, grad


def fit_feed(
    resp: np.ndarray,
    bases: np.ndarray,
    scales: np.ndarray,
    weights: np.ndarray | None,
    freq_hz: np.ndarray,
    smooth: np.ndarray,
    ref_db: np.ndarray,
    delay_s: np.ndarray,
    gain_db: np.ndarray,
    polarity,
    max_delay_s: float,
    max_loss_db: float,
    loss_weight: float,
    latency_s: float | None = None,
    step_oct: float = STEP_OCT,
    maxiter: int = MAXITER,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
    """Node gains and delays of every subwoofer's feed from a start of plain delays,
    levels and polarities (:func:`feed_cost_and_grad`, L-BFGS-B).

    Bounds: each node's magnitude within [0, 1] (the first and last node: a real gain
    within [-1, 1]), each delay within [0, ``max_delay_s``]. With ``latency_s`` the figure
    is that of the feeds as :func:`feed_fir` realises them with that latency.

    Returns
    -------
    nodes_hz : ndarray, shape (n_nodes,)
    z : ndarray, shape (n_subs, n_nodes), complex
    delay_s : ndarray, shape (n_subs,)
    cost_start, cost : float
        The figure at the start and as fitted.
    """
    n_pos, n_sub, _ = resp.shape
    nodes = node_freqs_hz(float(freq_hz[0]), float(freq_hz[-1]), step_oct)
    if latency_s is None:
        b = node_basis(freq_hz, nodes)
        basis = (b.astype(complex), 1j * b)
    else:
        basis = realised_basis(freq_hz, nodes, latency_s)
    n_nodes = nodes.size
    w = normalised_weights(weights, n_pos)
    amp = 10.0 ** (np.asarray(gain_db, dtype=float) / 20.0)
    pol = np.asarray(polarity, dtype=float)
    rho = np.repeat(amp[:, None], n_nodes, axis=1)
    phi = np.where(pol[:, None] < 0, np.pi, 0.0) * np.ones((1, n_nodes))
    rho[:, [0, -1]] *= pol[:, None]  # the end nodes: real, signed
    phi[:, [0, -1]] = 0.0
    x0 = np.concatenate([rho.ravel(), phi.ravel(), np.asarray(delay_s, dtype=float)])
    mag = [(0.0, 1.0)] * n_nodes
    mag[0] = mag[-1] = (-1.0, 1.0)
    ph: list[tuple[float | None, float | None]] = [(None, None)] * n_nodes
    ph[0] = ph[-1] = (0.0, 0.0)
    unit = np.ones(x0.size)
    unit[-n_sub:] = DELAY_UNIT_S
    bounds = mag * n_sub + ph * n_sub + [(0.0, max_delay_s / DELAY_UNIT_S)] * n_sub
    args = (resp, bases, scales, w, basis, freq_hz, smooth, ref_db, max_loss_db, loss_weight)
    figure = FeedFigure(*args)
    start = figure(x0)[0]

    def scaled(u: np.ndarray) -> tuple[float, np.ndarray]:
        cost, grad = figure(u * unit)
        return cost, grad * unit

    res = minimize(
        scaled,
        x0 / unit,
        jac=True,
        method="L-BFGS-B",
        bounds=bounds,
        options={"maxiter": maxiter, "maxcor": MAXCOR, "ftol": 1e-10, "gtol": 1e-8},
    )
    x = res.x * unit if res.fun < start else x0
    rho, phi, d = _unpack(x, n_sub, n_nodes)
    return nodes, rho * np.exp(1j * phi), d.copy(), float(start), float(min(res.fun, start))


def feed_fir(
    nodes_hz: np.ndarray, z: np.ndarray, fs: float, latency_s: float, tail_s: float = TAIL_S
) -> np.ndarray:
    """FIR filter of one feed (node gains ``z``, shape (n_nodes,)) late by ``latency_s``:
    ``round((latency_s + tail_s) fs)`` taps, the last tenth faded out (half Hann).

    The feed's response is sampled on an FFT grid eight times the filter's length and
    inverted; what it would need before ``latency_s`` is left out.
    """
    nodes = np.ascontiguousarray(nodes_hz, dtype=float)
    z = np.ascontiguousarray(z, dtype=complex)
    return _feed_fir(nodes.tobytes(), z.tobytes(), float(fs), float(latency_s), float(tail_s))


@functools.lru_cache(maxsize=32)
def _feed_fir(
    nodes_bytes: bytes, z_bytes: bytes, fs: float, latency_s: float, tail_s: float
) -> np.ndarray:
    """:func:`feed_fir` on arrays given as their bytes, remembered (a design builds each
    feed's filter for the design's own rate and again for the outputs); read-only."""
    n = int(round((latency_s + tail_s) * fs))
    n_fft = 1 << int(np.ceil(np.log2(8 * n)))
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    nodes, z = np.frombuffer(nodes_bytes), np.frombuffer(z_bytes, complex)
    # above the last node the feed is its (real) last gain: interpolated below it only
    below = int(np.searchsorted(f, nodes[-1], side="right"))
    spec = np.full(f.size, z[-1], dtype=complex)
    spec[:below] = feed_response(f[:below], nodes, z[None])[0]
    # numpy's irfft reads only the real part of the DC and Nyquist bins, as _basis_irs
    # does for each node: one transform gives Re(z) @ h_re + Im(z) @ h_im. A latency of
    # whole samples is a circular shift of the transform (the phase ramp's bins are then
    # exactly those of a shift, real at DC and Nyquist), which costs less than the ramp.
    shift = latency_s * fs
    if abs(shift - round(shift)) < 1e-9:
        h = np.roll(np.fft.irfft(spec, n_fft), int(round(shift)))[:n] * _fade(n)
    else:
        h = np.fft.irfft(spec * np.exp(-2j * np.pi * f * latency_s), n_fft)[:n] * _fade(n)
    h.flags.writeable = False
    return h


def forget_cached() -> None:
    """Empty the memos of :func:`realised_basis`, :func:`feed_fir` and the basis filters
    both start from (benchmarks time a cold design)."""
    _basis_irs_of.cache_clear()
    _realised_basis.cache_clear()
    _feed_fir.cache_clear()


def describe_feed(nodes_hz: np.ndarray, z: np.ndarray) -> str:
    """One subwoofer's shaped feed in words (its range of level and phase)."""
    z = np.asarray(z)
    mag = 20.0 * np.log10(np.maximum(np.abs(z), 1e-6))
    ph = np.degrees(np.angle(z))
    step = float(np.log2(nodes_hz[1] / nodes_hz[0])) if len(nodes_hz) > 1 else 0.0
    return (
        f"shaped: {mag.min():+.1f} to {mag.max():+.1f} dB, phase {ph.min():+.0f} to "
        f"{ph.max():+.0f} degrees ({len(z)} points 1/{1 / step:.0f} octave apart, "
        f"{nodes_hz[0]:.0f} to {nodes_hz[-1]:.0f} Hz)"
    )
