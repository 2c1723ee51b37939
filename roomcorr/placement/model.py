"""The room model calibrated on the measurements, and its predictions.

The low-frequency field of a rectangular room is the image-source sum of
Allen and Berkley evaluated directly in the frequency domain,
``H(f) = Σ β-products e^{−j2πfr/c} / (4πr)`` over every image up to the order
where the images fall below a thousandth of the direct sound
(:func:`roomcorr.physics.lattice_spectra`), from the room's size and where the
loudspeakers and the microphone stand (the layout). Against independent code
(pyroomacoustics) with the same walls it agrees to within 0.1 dB, where the
modal sum with per-mode damping that stood here before was 2.2-2.6 dB off
(``docs/explanation/room-model.md``). What the layout cannot give is fitted so
that the model reproduces the measured positions:

* each surface's pressure reflection factor ``β`` (left, right, front, back,
  floor, ceiling), frequency-independent, as Allen and Berkley's walls;
* each loudspeaker's own low-frequency response: level, tilt, curvature and a
  4th-order high-pass corner (Small, JAES 1972/1973), in dB on the fit grid;
* small errors of each loudspeaker's taped position across the floor (x, y; a
  few centimetres), kept near zero by a penalty of one fit residual per 5 cm.

Levels are compared as 1/12-octave smoothed steady-state power in dB between
:data:`FIT_BAND_HZ`; the fit error is the RMS difference at the measured
positions, the leave-one-position-out error the RMS difference at each
position when the fit never saw it.

References
----------
.. [1] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
.. [2] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3 and 5
       (Eyring's reverberation time).
.. [3] R. H. Small, "Closed-box loudspeaker systems", JAES 20(10), 1972.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy.optimize import least_squares
from scipy.signal import butter, sosfiltfilt

from roomcorr.analysis.smoothing import smooth_bins_to_grid
from roomcorr.errors import SettingsError
from roomcorr.physics import C_SOUND_M_S
from roomcorr.physics.images import (
    image_lattice,
    image_order_for,
    lattice_spectra,
    lattice_weights,
)

#: Band of the fit and of the comparison with the measurements, Hz.
FIT_BAND_HZ = (20.0, 320.0)
#: Highest frequency at which a prediction is claimed valid, Hz.
VALID_TO_HZ = 250.0
#: Points per octave of the fit grid; smoothing width of the fit, octaves.
FIT_PPO = 24
FIT_SMOOTH_OCT = 1.0 / 12.0
#: Spacing of the linear frequencies the model is evaluated on before smoothing, Hz
#: (modes of a room with T60 = 1 s are 2.2 Hz wide).
MODEL_STEP_HZ = 0.5
#: A taped loudspeaker position may be off by this much (one fit residual per this), m;
#: and the fit never moves one further than this.
POSITION_SIGMA_M = 0.05
POSITION_LIMIT_M = 0.15
#: Energy absorption coefficient range of a surface (``α = 1 − β²``).
ALPHA_RANGE = (0.005, 0.9)
#: High-pass corner range of a loudspeaker, Hz.
CORNER_RANGE_HZ = (10.0, 150.0)
#: Fewest measured positions for a fit with a leave-one-position-out error.
MIN_POSITIONS = 3


def fit_grid() -> np.ndarray:
    """Log-spaced frequencies of the fit, Hz."""
    lo, hi = FIT_BAND_HZ
    n = int(round(np.log2(hi / lo) * FIT_PPO)) + 1
    return np.geomspace(lo, hi, n)


def _f_top() -> float:
    return FIT_BAND_HZ[1] * 2 ** FIT_SMOOTH_OCT


def measured_levels_db(irs: np.ndarray, fs: int, grid_hz: np.ndarray) -> np.ndarray:
    """1/12-octave smoothed steady-state power (dB) of whole impulse responses.

    The spectrum is read every :data:`MODEL_STEP_HZ` or finer (zero-padded), as the
    model's.

    Parameters
    ----------
    irs : ndarray, shape (..., n_samples)
    fs : int
    grid_hz : ndarray

    Returns
    -------
    ndarray, shape (..., n_freqs)
    """
    x = np.asarray(irs, dtype=float)
    n_fft = 1 << int(np.ceil(np.log2(max(x.shape[-1], fs / MODEL_STEP_HZ))))
    spec = np.fft.rfft(x, n_fft)
    bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
    keep = bins <= FIT_BAND_HZ[1] * 1.2
    power = smooth_bins_to_grid(np.abs(spec[..., keep]) ** 2, bins[keep], grid_hz, FIT_SMOOTH_OCT)
    return 10.0 * np.log10(np.maximum(power, 1e-30))


def beta_from_alpha(alpha: np.ndarray) -> np.ndarray:
    """Pressure reflection factor ``β = sqrt(1 − α)`` of an energy absorption ``α``
    (Allen and Berkley's walls; as pyroomacoustics' ``Material``)."""
    return np.sqrt(1.0 - np.asarray(alpha, dtype=float))


def axial_damping(beta: np.ndarray, size_m: np.ndarray, c: float = C_SOUND_M_S) -> np.ndarray:
    """Decay rate of the axial modes along each axis, 1/s: ``−c ln(β_0 β_L) / (2L)``.

    A plane wave between two walls loses ``β_0 β_L`` per round trip of ``2L/c``
    (Kuttruff, ch. 3).
    """
    b = np.asarray(beta, dtype=float)
    return -c * np.log(b[0::2] * b[1::2]) / (2.0 * np.asarray(size_m, dtype=float))


def eyring_t60_s(beta: np.ndarray, size_m: np.ndarray) -> float:
    """Eyring's reverberation time ``0.161 V / (−S ln(1 − ᾱ))`` (Kuttruff, ch. 5)."""
    lx, ly, lz = (float(v) for v in size_m)
    areas = np.array([ly * lz, ly * lz, lx * lz, lx * lz, lx * ly, lx * ly])
    alpha = 1.0 - np.asarray(beta, dtype=float) ** 2
    mean = float(np.sum(alpha * areas) / areas.sum())
    return 0.161 * lx * ly * lz / (-areas.sum() * np.log(max(1.0 - mean, 1e-9)))


@dataclass
class Geometry:
    """Room size and positions in the layout's coordinates, m."""

    size_m: np.ndarray  # (3,)
    speakers_m: np.ndarray  # (n_speakers, 3)
    mics_m: np.ndarray  # (n_positions, 3)


@dataclass
class RoomModel:
    """A calibrated room model (see the module).

    Attributes
    ----------
    size_m : ndarray (3,)
    names : list of str
        Loudspeaker names in channel order.
    speakers_m : ndarray (n_speakers, 3)
        Fitted loudspeaker positions (taped positions plus the fitted offsets).
    offsets_m : ndarray (n_speakers, 3)
    beta : ndarray (6,)
        Fitted pressure reflection factor per surface (left, right, front, back,
        floor, ceiling: the layout's x, y, z walls at 0 and at the far end).
    corner_hz : ndarray (n_speakers,)
    speaker_coef : ndarray (n_speakers, 4)
        Coefficients of the loudspeaker's level on :func:`_basis`.
    fit_error_db : float
    loo_error_db : float or None
    per_position_error_db : list of float
    image_order : int
        Reflection order of the image sum.
    c : float
    """

    size_m: np.ndarray
    names: list[str]
    speakers_m: np.ndarray
    offsets_m: np.ndarray
    beta: np.ndarray
    corner_hz: np.ndarray
    speaker_coef: np.ndarray
    fit_error_db: float
    image_order: int
    loo_error_db: float | None = None
    per_position_error_db: list[float] = field(default_factory=list)
    c: float = C_SOUND_M_S

    @property
    def damping_per_axis(self) -> np.ndarray:
        """Decay rate of the axial modes along x, y, z, 1/s (:func:`axial_damping`)."""
        return axial_damping(self.beta, self.size_m, self.c)

    def t60_s(self) -> float:
        """Eyring's reverberation time of the fitted walls, s."""
        return eyring_t60_s(self.beta, self.size_m)

    def speaker_db(self, grid_hz: np.ndarray) -> np.ndarray:
        """Each loudspeaker's fitted low-frequency level on ``grid_hz``, (n_speakers, n)."""
        return np.stack(
            [_basis(grid_hz, fc) @ coef for fc, coef in zip(self.corner_hz, self.speaker_coef,
                                                             strict=True)]
        )

    def spectra(self, speakers_m: np.ndarray, mics_m: np.ndarray, step_hz: float,
                f_max_hz: float) -> tuple[np.ndarray, np.ndarray]:
        """Complex image-source response without the loudspeaker.

        Returns
        -------
        freq_hz : ndarray, shape (n_freqs,)
            ``0, step_hz, ...`` up to at least ``f_max_hz``.
        h : ndarray, shape (n_speakers, n_mics, n_freqs), complex
        """
        return _spectra(self.size_m, np.asarray(speakers_m, float), np.asarray(mics_m, float),
                        self.beta, self.image_order, self.c, step_hz, f_max_hz)

    def levels_db(
        self, speakers_m: np.ndarray, mics_m: np.ndarray, grid_hz: np.ndarray | None = None,
        width_oct: float = FIT_SMOOTH_OCT,
    ) -> np.ndarray:
        """Predicted smoothed level (dB) of every loudspeaker at every microphone.

        ``width_oct`` is the smoothing of the room's part (the fit's 1/12 octave by
        default); the loudspeaker's fitted level is smooth already.

        Returns
        -------
        ndarray, shape (n_speakers, n_mics, n_freqs) on ``grid_hz`` (default :func:`fit_grid`).
        """
        g = fit_grid() if grid_hz is None else grid_hz
        room = _room_db(self.size_m, np.asarray(speakers_m, float),
                        np.atleast_2d(np.asarray(mics_m, float)), self.beta, self.image_order,
                        self.c, g, width_oct)
        return room + self.speaker_db(g)[:, None, :]


def _basis(grid_hz: np.ndarray, corner_hz: float) -> np.ndarray:
    """Loudspeaker level basis: 1, u, u², and a 4th-order high-pass in dB (u = log2(f/100))."""
    u = np.log2(np.asarray(grid_hz) / 100.0)
    hp = -10.0 * np.log10(1.0 + (corner_hz / np.asarray(grid_hz)) ** 8)
    return np.stack([np.ones_like(u), u, u**2, hp], axis=1)


@lru_cache(maxsize=2)  # order 60: 295,000 images, 18 MB
def _lattice(order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return image_lattice(order)


def _spectra(size_m: np.ndarray, speakers_m: np.ndarray, mics_m: np.ndarray, beta: np.ndarray,
             order: int, c: float, step_hz: float, f_max_hz: float
             ) -> tuple[np.ndarray, np.ndarray]:
    lat = _lattice(int(order))
    w = lattice_weights(lat[2], beta)
    out = []
    freq = np.zeros(0)
    for src in speakers_m:
        freq, h = lattice_spectra(src, mics_m, size_m, lat, w, c, step_hz, f_max_hz)
        out.append(h)
    return freq, np.stack(out)


def _room_db(size_m: np.ndarray, speakers_m: np.ndarray, mics_m: np.ndarray, beta: np.ndarray,
             order: int, c: float, grid: np.ndarray, width_oct: float = FIT_SMOOTH_OCT,
             derivatives: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Smoothed room level (n_spk, n_mics, n_freqs) on ``grid``, dB.

    With ``derivatives`` also the level's derivative with respect to ``ln β`` of each
    wall and to each loudspeaker's own x and y, shape (8, n_spk, n_mics, n_freqs).
    """
    lat = _lattice(int(order))
    w = lattice_weights(lat[2], beta)
    levels, slopes = [], []
    for src in speakers_m:
        res = lattice_spectra(src, mics_m, size_m, lat, w, c, MODEL_STEP_HZ, _f_top(),
                              wall_derivatives=derivatives, source_derivatives=derivatives)
        freq, h = res[0][1:], res[1][..., 1:]
        p = np.maximum(smooth_bins_to_grid(np.abs(h) ** 2, freq, grid, width_oct), 1e-30)
        levels.append(10 * np.log10(p))
        if derivatives:
            dh = np.concatenate([res[2], res[3]])[..., 1:]
            dp = smooth_bins_to_grid(2.0 * np.real(np.conj(h)[None] * dh), freq, grid,
                                     width_oct)
            slopes.append(10.0 / np.log(10.0) * dp / p[None])
    if derivatives:
        return np.stack(levels), np.stack(slopes, axis=1)
    return np.stack(levels)


def _unpack(theta: np.ndarray, n_spk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    beta = np.exp(-np.exp(theta[:6]))  # theta = log(−ln β): β in (0, 1)
    corner = np.exp(theta[6:6 + n_spk])
    offsets = np.zeros((n_spk, 3))
    offsets[:, :2] = theta[6 + n_spk:].reshape(n_spk, 2)
    return beta, corner, offsets


def _beta_theta(beta: np.ndarray) -> np.ndarray:
    return np.log(-np.log(np.asarray(beta, dtype=float)))


def _solve_speakers(resid_db: np.ndarray, grid: np.ndarray, corner: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Best loudspeaker levels for fixed room levels: linear least squares per loudspeaker.

    ``resid_db`` is measured − room, shape (n_spk, n_pos, n_freqs). Returns the
    coefficients (n_spk, 4) and the remaining residual.
    """
    coefs, out = [], np.empty_like(resid_db)
    for s in range(resid_db.shape[0]):
        b = _basis(grid, corner[s])
        a = np.tile(b, (resid_db.shape[1], 1))
        coef, *_ = np.linalg.lstsq(a, resid_db[s].ravel(), rcond=None)
        coefs.append(coef)
        out[s] = resid_db[s] - (b @ coef)[None, :]
    return np.stack(coefs), out


def _projector(grid: np.ndarray, corner: float, n_pos: int) -> np.ndarray:
    """``I − A A⁺`` for the loudspeaker basis tiled over the positions (variable projection)."""
    a = np.tile(_basis(grid, corner), (n_pos, 1))
    return np.eye(a.shape[0]) - a @ np.linalg.pinv(a)


def _fit(
    measured_db: np.ndarray,
    geom: Geometry,
    c: float,
    order: int,
    theta0: np.ndarray,
    max_nfev: int,
    fit_offsets: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least squares over walls, corners and offsets; the loudspeakers' levels are solved
    linearly inside (variable projection, Golub and Pereyra 1973), the walls' part of the
    Jacobian is analytic (:func:`roomcorr.physics.lattice_spectra`)."""
    grid = fit_grid()
    n_spk, n_pos = geom.speakers_m.shape[0], geom.mics_m.shape[0]
    n_res = n_spk * n_pos * grid.size
    scale = 10.0 / np.sqrt(n_res)
    cache: dict = {}

    def room_of(theta: np.ndarray, derivatives: bool = False):
        beta, _, offsets = _unpack(theta, n_spk)
        key = (theta[:6].tobytes(), offsets.tobytes(), derivatives)
        with_slopes = (key[0], key[1], True)
        if not derivatives and with_slopes in cache:
            return cache[with_slopes][0]
        if key not in cache:
            if len(cache) > 16:
                cache.clear()
            cache[key] = _room_db(geom.size_m, geom.speakers_m + offsets, geom.mics_m, beta,
                                  order, c, grid, derivatives=derivatives)
        return cache[key]

    def residual(theta: np.ndarray) -> np.ndarray:
        _, corner, offsets = _unpack(theta, n_spk)
        _, r = _solve_speakers(measured_db - room_of(theta), grid, corner)
        return np.concatenate([r.ravel() * scale,
                               offsets[:, :2].ravel() / POSITION_SIGMA_M / np.sqrt(n_spk * 2)])

    def jac(theta: np.ndarray) -> np.ndarray:
        beta, corner, _ = _unpack(theta, n_spk)
        _, droom = room_of(theta, derivatives=True)
        base = residual(theta)
        jm = np.zeros((base.size, theta.size))
        # walls: d(ln β)/dθ = ln β (θ = log(−ln β)); r = P⊥(measured − room)
        for sp in range(n_spk):
            proj = _projector(grid, corner[sp], n_pos)
            rows = slice(sp * n_pos * grid.size, (sp + 1) * n_pos * grid.size)
            d = droom[:6, sp].reshape(6, -1).T * np.log(beta)[None, :]
            jm[rows, :6] = -scale * (proj @ d)
        # corners: the room does not change (cheap differences)
        for i in range(6, 6 + n_spk):
            step = 1e-4
            th = theta.copy()
            th[i] += step
            jm[:, i] = (residual(th) - base) / step
        # offsets: analytic too (d level / d source x, y)
        if fit_offsets:
            for sp in range(n_spk):
                proj = _projector(grid, corner[sp], n_pos)
                rows = slice(sp * n_pos * grid.size, (sp + 1) * n_pos * grid.size)
                cols = slice(6 + n_spk + 2 * sp, 8 + n_spk + 2 * sp)
                jm[rows, cols] = -scale * (proj @ droom[6:8, sp].reshape(2, -1).T)
                for ax in range(2):
                    jm[n_res + 2 * sp + ax, 6 + n_spk + 2 * sp + ax] = (
                        1.0 / POSITION_SIGMA_M / np.sqrt(n_spk * 2))
        return jm

    a_lo, a_hi = ALPHA_RANGE
    lim = POSITION_LIMIT_M if fit_offsets else 1e-9
    lo = np.concatenate([np.full(6, _beta_theta(beta_from_alpha(a_lo))),
                         np.full(n_spk, np.log(CORNER_RANGE_HZ[0])), np.full(n_spk * 2, -lim)])
    hi = np.concatenate([np.full(6, _beta_theta(beta_from_alpha(a_hi))),
                         np.full(n_spk, np.log(CORNER_RANGE_HZ[1])), np.full(n_spk * 2, lim)])
    theta0 = np.clip(theta0, lo + 1e-9, hi - 1e-9)
    sol = least_squares(residual, theta0, jac=jac, bounds=(lo, hi), max_nfev=max_nfev,
                        x_scale="jac")
    _, corner, _ = _unpack(sol.x, n_spk)
    room = room_of(sol.x)
    coef, _ = _solve_speakers(measured_db - room, grid, corner)
    return sol.x, coef, room


def initial_t60_s(irs: np.ndarray, fs: int) -> float:
    """Reverberation time below 300 Hz from the measured decay (Schroeder 1965).

    The energy decay curve of the low-passed responses, fitted from −5 to −25 dB
    (T20, ISO 3382-1), clipped to 0.1-5 s.
    """
    sos = butter(4, 300.0, "low", fs=fs, output="sos")
    x = sosfiltfilt(sos, np.asarray(irs, float).reshape(-1, np.shape(irs)[-1]), axis=-1)
    energy = np.cumsum((x**2).sum(axis=0)[::-1])[::-1]
    edc = 10 * np.log10(np.maximum(energy / energy[0], 1e-30))
    t = np.arange(edc.size) / fs
    sel = (edc <= -5.0) & (edc >= -25.0)
    if sel.sum() < 10:
        return 0.5
    slope = np.polyfit(t[sel], edc[sel], 1)[0]
    return float(np.clip(-60.0 / slope if slope < 0 else 1.0, 0.1, 5.0))


def eyring_alpha(t60_s: float, size_m: np.ndarray) -> float:
    """Mean absorption that gives ``t60_s`` by Eyring's formula (its inverse; Kuttruff ch. 5)."""
    lx, ly, lz = (float(v) for v in size_m)
    area = 2.0 * (lx * ly + lx * lz + ly * lz)
    return float(1.0 - np.exp(-0.161 * lx * ly * lz / (area * t60_s)))


def calibrate(
    irs: np.ndarray,
    fs: int,
    size_m: tuple[float, float, float],
    speakers_m: np.ndarray,
    mics_m: np.ndarray,
    names: list[str],
    c: float = C_SOUND_M_S,
    leave_one_out: bool = True,
    max_nfev: int = 12,
) -> RoomModel:
    """Fit the room model to measured impulse responses.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_speakers, n_samples)
    fs : int
    size_m : (width, length, height)
    speakers_m : ndarray, shape (n_speakers, 3)
        Taped loudspeaker positions.
    mics_m : ndarray, shape (n_positions, 3)
        Taped measurement positions, in file order.
    names : list of str
    c : float
    leave_one_out : bool
        Also refit without each position in turn and report the error there.
    max_nfev : int
        Most evaluations of the fit's residual (each stage).

    Returns
    -------
    RoomModel

    Raises
    ------
    SettingsError
        With fewer than :data:`MIN_POSITIONS` positions, or a position count that
        differs from the number of measured positions of the layout.
    """
    irs = np.asarray(irs, dtype=float)
    if irs.ndim != 3:
        raise SettingsError("prediction: expected impulse responses (positions, channels, samples)")
    n_pos, n_spk, _ = irs.shape
    mics = np.asarray(mics_m, dtype=float).reshape(-1, 3)
    spk = np.asarray(speakers_m, dtype=float).reshape(-1, 3)
    if mics.shape[0] != n_pos:
        raise SettingsError(
            f"layout: {mics.shape[0]} [[measured]] positions for {n_pos} measured files; "
            "give one position per file, in file order"
        )
    if n_pos < MIN_POSITIONS:
        raise SettingsError(
            f"prediction needs at least {MIN_POSITIONS} measured positions (the fit and its "
            f"leave-one-position-out check); {n_pos} given: measure more positions"
        )
    if spk.shape[0] != n_spk:
        raise SettingsError(
            f"layout: {spk.shape[0]} loudspeakers for {n_spk} channels in the measurement; "
            "name one loudspeaker per channel, in channel order"
        )
    grid = fit_grid()
    size = np.asarray(size_m, float)
    meas = np.transpose(measured_levels_db(irs, fs, grid), (1, 0, 2))  # (spk, pos, f)
    geom = Geometry(size, spk, mics)
    alpha0 = float(np.clip(eyring_alpha(initial_t60_s(irs, fs), size), *ALPHA_RANGE))
    beta0 = np.full(6, beta_from_alpha(alpha0))
    theta0 = np.concatenate([_beta_theta(beta0), np.full(n_spk, np.log(40.0)),
                             np.zeros(2 * n_spk)])
    # Walls and corners first (positions fixed) with the images the measured decay asks
    # for, then everything with the images the fitted walls ask for.
    theta, coef, room = _fit(meas, geom, c, image_order_for(beta0, size), theta0,
                             max(3, max_nfev // 2), fit_offsets=False)
    order = image_order_for(_unpack(theta, n_spk)[0], size)
    theta, coef, room = _fit(meas, geom, c, order, theta, max_nfev)
    beta, corner, offsets = _unpack(theta, n_spk)
    pred = room + np.stack([_basis(grid, fc) @ k for fc, k in zip(corner, coef,
                                                                   strict=True)])[:, None, :]
    err = pred - meas
    per_pos = np.sqrt(np.mean(err**2, axis=(0, 2)))
    model = RoomModel(
        size_m=size, names=list(names), speakers_m=spk + offsets, offsets_m=offsets,
        beta=beta, corner_hz=corner, speaker_coef=coef,
        fit_error_db=float(np.sqrt(np.mean(err**2))), image_order=order,
        per_position_error_db=per_pos.tolist(), c=c,
    )
    if leave_one_out:
        loo = []
        for k in range(n_pos):
            keep = np.arange(n_pos) != k
            g_k = Geometry(size, spk, mics[keep])
            th_k, coef_k, _ = _fit(meas[:, keep], g_k, c, order, theta, max(2, max_nfev // 4))
            b_k, c_k, o_k = _unpack(th_k, n_spk)
            m_k = replace(model, speakers_m=spk + o_k, beta=b_k, corner_hz=c_k,
                          speaker_coef=coef_k)
            p_k = m_k.levels_db(m_k.speakers_m, mics[k:k + 1], grid)[:, 0]
            loo.append(np.mean((p_k - meas[:, k]) ** 2))
        model.loo_error_db = float(np.sqrt(np.mean(loo)))
    return model


def predicted_ir(
    model: RoomModel,
    speakers_m: np.ndarray,
    mic_m: np.ndarray,
    fs: int = 48000,
    length_s: float = 1.0,
    correction_db: np.ndarray | None = None,
) -> np.ndarray:
    """Predicted impulse response of every loudspeaker at one seat.

    The complex image-source response times the fitted loudspeaker level (zero
    phase), faded out between :data:`VALID_TO_HZ` × 1.3 and the top of the fit band
    × 1.4 (above it the model says nothing), as a real impulse response.

    Parameters
    ----------
    correction_db : ndarray, shape (n_speakers, n_fit_grid), optional
        A zero-phase gain on :func:`fit_grid` applied on top (see :func:`anchor_db`).

    Returns
    -------
    ndarray, shape (n_speakers, n_samples)
    """
    n = int(round(length_s * fs))
    freq = np.fft.rfftfreq(n, 1.0 / fs)
    top = FIT_BAND_HZ[1] * 1.4
    step = fs / n
    _, h_all = model.spectra(speakers_m, np.asarray(mic_m, float)[None, :], step, top)
    use = freq <= top
    f = freq[use]
    h = h_all[:, :, : f.size]
    spk_db = np.stack([_basis(np.maximum(f, FIT_BAND_HZ[0] / 2), fc) @ k
                       for fc, k in zip(model.corner_hz, model.speaker_coef, strict=True)])
    # below the fit band the loudspeaker falls on its fitted high-pass (no extrapolated curvature)
    low = f < FIT_BAND_HZ[0]
    spk_db[:, low] = spk_db[:, [int(np.argmax(~low))]] + 80 * np.log10(
        np.maximum(f[low], 1.0) / FIT_BAND_HZ[0])
    fade_lo = VALID_TO_HZ * 1.3
    fade = np.clip((top - f) / (top - fade_lo), 0.0, 1.0)
    fade = np.sin(0.5 * np.pi * fade) ** 2
    if correction_db is not None:
        g = fit_grid()
        lf = np.log(np.clip(f, g[0], g[-1]))
        spk_db = spk_db + np.stack([np.interp(lf, np.log(g), row) for row in correction_db])
    spec = np.zeros((h.shape[0], freq.size), dtype=complex)
    spec[:, use] = h[:, 0] * 10 ** (spk_db / 20) * fade
    spec[:, 0] = 0.0
    return np.fft.irfft(spec, n=n, axis=-1)


#: Share of the measured-minus-model difference at the nearest measured position that a
#: prediction keeps (0: the model alone; 1: the measurement plus the model's change).
#: Half: a hedge between a model that is right about the room's shape and a measurement that
#: knows what the model does not (furniture, walls that absorb differently with frequency).
#: Not tuned: on the benchmark's rooms the model alone, the measurement plus the model's
#: change and their mean are within a few hundredths of each other (docs, room model).
ANCHOR_WEIGHT = 0.5


def anchor_db(
    model: RoomModel, irs: np.ndarray, fs: int, mics_m: np.ndarray, seat_m: np.ndarray
) -> tuple[np.ndarray, int]:
    """What the model misses at the measured position nearest the seat, on the fit grid.

    Returns
    -------
    (ndarray, shape (n_speakers, n_fit_grid), int)
        ``ANCHOR_WEIGHT × (measured − model)`` in dB there, and that position's index.
    """
    mics = np.asarray(mics_m, float)
    k = int(np.argmin(np.linalg.norm(mics - np.asarray(seat_m, float), axis=1)))
    g = fit_grid()
    meas = measured_levels_db(np.asarray(irs, float)[k], fs, g)
    mod = model.levels_db(model.speakers_m, mics[k:k + 1], g)[:, 0]
    return ANCHOR_WEIGHT * (meas - mod), k
