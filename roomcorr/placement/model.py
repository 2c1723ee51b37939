"""The room model calibrated on the measurements, and its predictions.

The low-frequency field of a rectangular room is the modal expansion of its
Green's function (:func:`roomcorr.physics.modal_response`, Kuttruff ch. 3),
from the room's size and where the loudspeakers and the microphone stand (the
layout). What the layout cannot give is fitted so that the model reproduces
the measured positions:

* the walls' absorption, as one damping rate per pair of opposite surfaces
  (front/back, left/right, floor/ceiling). A mode's damping constant is the
  sum over the pairs of that rate, doubled for the pairs its wave meets at
  normal incidence (a mode with a non-zero index along that axis): the
  first-order perturbation of the rigid-walled eigenvalues by a small wall
  admittance, whose integral of ``ψ²`` over a wall normal to axis ``i`` is
  ``S_i / (V ε_i)`` (Kuttruff, ch. 3; Morse and Ingard, *Theoretical
  Acoustics*, ch. 9);
* each loudspeaker's own low-frequency response: level, tilt, curvature and a
  4th-order high-pass corner (Small, JAES 1972/1973), in dB on the fit grid;
* small errors of each loudspeaker's taped position across the floor (x, y; a
  few centimetres),
  kept near zero by a penalty of one fit residual per 5 cm.

Levels are compared as 1/12-octave smoothed steady-state power in dB between
:data:`FIT_BAND_HZ`; the fit error is the RMS difference at the measured
positions, the leave-one-position-out error the RMS difference at each
position when the fit never saw it.

References
----------
.. [1] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3.
.. [2] P. M. Morse and K. U. Ingard, *Theoretical Acoustics*, McGraw-Hill, 1968, ch. 9.
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
from roomcorr.physics import C_SOUND_M_S, modal_response, mode_grid

#: Band of the fit and of the comparison with the measurements, Hz.
FIT_BAND_HZ = (20.0, 320.0)
#: Highest frequency at which a prediction is claimed valid, Hz.
VALID_TO_HZ = 250.0
#: Modes are summed up to this multiple of the top of the fit band.
MODES_TO_FACTOR = 1.5
#: Points per octave of the fit grid; smoothing width of the fit, octaves.
FIT_PPO = 24
FIT_SMOOTH_OCT = 1.0 / 12.0
#: Spacing of the linear frequencies the model is evaluated on before smoothing, Hz.
MODEL_STEP_HZ = 1.0
#: A taped loudspeaker position may be off by this much (one fit residual per this), m;
#: and the fit never moves one further than this.
POSITION_SIGMA_M = 0.05
POSITION_LIMIT_M = 0.15
#: Damping rate per pair of surfaces, 1/s (T60 of a few seconds down to 0.1 s).
DAMPING_RANGE = (0.3, 60.0)
#: High-pass corner range of a loudspeaker, Hz.
CORNER_RANGE_HZ = (10.0, 150.0)
#: Fewest measured positions for a fit with a leave-one-position-out error.
MIN_POSITIONS = 3


def fit_grid() -> np.ndarray:
    """Log-spaced frequencies of the fit, Hz."""
    lo, hi = FIT_BAND_HZ
    n = int(round(np.log2(hi / lo) * FIT_PPO)) + 1
    return np.geomspace(lo, hi, n)


def _lin_freqs() -> np.ndarray:
    lo, hi = FIT_BAND_HZ
    return np.arange(lo * 2 ** (-FIT_SMOOTH_OCT), hi * 2 ** FIT_SMOOTH_OCT, MODEL_STEP_HZ)


def measured_levels_db(irs: np.ndarray, fs: int, grid_hz: np.ndarray) -> np.ndarray:
    """1/12-octave smoothed steady-state power (dB) of whole impulse responses.

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
    n_fft = 1 << int(np.ceil(np.log2(max(x.shape[-1], fs // 2))))
    spec = np.fft.rfft(x, n_fft)
    bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
    keep = bins <= FIT_BAND_HZ[1] * 1.2
    power = smooth_bins_to_grid(np.abs(spec[..., keep]) ** 2, bins[keep], grid_hz, FIT_SMOOTH_OCT)
    return 10.0 * np.log10(np.maximum(power, 1e-30))


def mode_damping(labels: np.ndarray, damping_per_axis: np.ndarray) -> np.ndarray:
    """Damping constant of each mode, 1/s: Σ over axes of rate × (2 if n_axis ≠ 0 else 1).

    The first-order effect of a small admittance on the walls normal to each
    axis (Morse and Ingard, ch. 9; Kuttruff, ch. 3).
    """
    weight = np.where(np.asarray(labels) != 0, 2.0, 1.0)
    return weight @ np.asarray(damping_per_axis, dtype=float)


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
    damping_per_axis : ndarray (3,)
        Fitted damping rate per pair of surfaces, 1/s (x, y, z pairs).
    corner_hz : ndarray (n_speakers,)
    speaker_coef : ndarray (n_speakers, 4)
        Coefficients of the loudspeaker's level on :func:`_basis`.
    fit_error_db : float
    loo_error_db : float or None
    per_position_error_db : list of float
    c : float
    """

    size_m: np.ndarray
    names: list[str]
    speakers_m: np.ndarray
    offsets_m: np.ndarray
    damping_per_axis: np.ndarray
    corner_hz: np.ndarray
    speaker_coef: np.ndarray
    fit_error_db: float
    loo_error_db: float | None = None
    per_position_error_db: list[float] = field(default_factory=list)
    c: float = C_SOUND_M_S

    def t60_s(self) -> float:
        """Reverberation time of an oblique mode: 6.91 / δ (Kuttruff, ch. 3)."""
        return float(3.0 * np.log(10.0) / (2.0 * np.sum(self.damping_per_axis)))

    def speaker_db(self, grid_hz: np.ndarray) -> np.ndarray:
        """Each loudspeaker's fitted low-frequency level on ``grid_hz``, (n_speakers, n)."""
        return np.stack(
            [_basis(grid_hz, fc) @ coef for fc, coef in zip(self.corner_hz, self.speaker_coef,
                                                             strict=True)]
        )

    def room_response(
        self, freq_hz: np.ndarray, speakers_m: np.ndarray, mics_m: np.ndarray
    ) -> np.ndarray:
        """Complex modal response, shape (n_speakers, n_mics, n_freqs), without the loudspeaker."""
        return _green(freq_hz, self.size_m, np.asarray(speakers_m, float),
                      np.asarray(mics_m, float), self.damping_per_axis, self.c)

    def levels_db(
        self, speakers_m: np.ndarray, mics_m: np.ndarray, grid_hz: np.ndarray | None = None
    ) -> np.ndarray:
        """Predicted smoothed level (dB) of every loudspeaker at every microphone.

        Returns
        -------
        ndarray, shape (n_speakers, n_mics, n_freqs) on ``grid_hz`` (default :func:`fit_grid`).
        """
        g = fit_grid() if grid_hz is None else grid_hz
        lin = _lin_freqs()
        h = self.room_response(lin, speakers_m, mics_m)
        room_db = 10 * np.log10(np.maximum(
            smooth_bins_to_grid(np.abs(h) ** 2, lin, g, FIT_SMOOTH_OCT), 1e-30))
        return room_db + self.speaker_db(g)[:, None, :]


def _basis(grid_hz: np.ndarray, corner_hz: float) -> np.ndarray:
    """Loudspeaker level basis: 1, u, u², and a 4th-order high-pass in dB (u = log2(f/100))."""
    u = np.log2(np.asarray(grid_hz) / 100.0)
    hp = -10.0 * np.log10(1.0 + (corner_hz / np.asarray(grid_hz)) ** 8)
    return np.stack([np.ones_like(u), u, u**2, hp], axis=1)


@lru_cache(maxsize=8)
def _modes(size_m: tuple[float, ...], c: float) -> tuple[np.ndarray, np.ndarray]:
    return mode_grid(size_m, c, MODES_TO_FACTOR * FIT_BAND_HZ[1])


def _green(
    freq_hz: np.ndarray,
    size_m: np.ndarray,
    speakers_m: np.ndarray,
    mics_m: np.ndarray,
    damping_per_axis: np.ndarray,
    c: float,
) -> np.ndarray:
    labels, mode_hz = _modes(tuple(float(x) for x in size_m), float(c))
    delta = mode_damping(labels, damping_per_axis)
    return np.stack([
        modal_response(freq_hz, src, mics_m, size_m, labels, mode_hz, delta, c)
        for src in speakers_m
    ])


def _room_db(geom: Geometry, speakers: np.ndarray, damping: np.ndarray, c: float,
             grid: np.ndarray, cache: dict | None = None) -> np.ndarray:
    """Smoothed room level (n_spk, n_mics, n_freqs); ``cache`` keeps the inverse modal
    denominators per damping and the result per (damping, positions): the fit's
    Jacobian changes one parameter at a time."""
    lin = _lin_freqs()
    key = (damping.tobytes(), speakers.tobytes())
    if cache is not None and key in cache:
        return cache[key]
    labels, mode_hz = _modes(tuple(float(x) for x in geom.size_m), float(c))
    dkey = damping.tobytes()
    if cache is not None and ("inv", dkey) in cache:
        inv = cache[("inv", dkey)]
    else:
        delta = mode_damping(labels, damping)
        eps = np.where(labels == 0, 1.0, 0.5).prod(axis=1)
        w = 2.0 * np.pi * lin[:, None]
        wn = 2.0 * np.pi * mode_hz[None, :]
        inv = (c**2 / (np.prod(geom.size_m) * eps))[None, :] / (
            wn**2 - w**2 + 2j * delta[None, :] * w)
        if cache is not None:
            cache[("inv", dkey)] = inv
    k = np.pi * labels / geom.size_m
    psi_mic = np.prod(np.cos(k[None, :, :] * geom.mics_m[:, None, :]), axis=2)
    h = np.stack([(psi_mic * np.prod(np.cos(k * src), axis=1)[None, :]) @ inv.T
                  for src in speakers])  # the modal sum, as physics.modal_response
    p = smooth_bins_to_grid(np.abs(h) ** 2, lin, grid, FIT_SMOOTH_OCT)
    out = 10 * np.log10(np.maximum(p, 1e-30))
    if cache is not None:
        if len(cache) > 64:
            cache.clear()
        cache[key] = out
    return out


def _unpack(theta: np.ndarray, n_spk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    damping = np.exp(theta[:3])
    corner = np.exp(theta[3:3 + n_spk])
    offsets = np.zeros((n_spk, 3))
    offsets[:, :2] = theta[3 + n_spk:].reshape(n_spk, 2)
    return damping, corner, offsets


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


def _fit(
    measured_db: np.ndarray,
    geom: Geometry,
    c: float,
    theta0: np.ndarray,
    max_nfev: int,
    fit_offsets: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    grid = fit_grid()
    n_spk = geom.speakers_m.shape[0]
    cache: dict = {}

    def residual(theta: np.ndarray) -> np.ndarray:
        damping, corner, offsets = _unpack(theta, n_spk)
        room = _room_db(geom, geom.speakers_m + offsets, damping, c, grid, cache)
        _, r = _solve_speakers(measured_db - room, grid, corner)
        return np.concatenate([r.ravel() / np.sqrt(r.size) * 10.0,
                               offsets[:, :2].ravel() / POSITION_SIGMA_M / np.sqrt(n_spk * 2)])

    lo = np.concatenate([np.full(3, np.log(DAMPING_RANGE[0])),
                         np.full(n_spk, np.log(CORNER_RANGE_HZ[0])),
                         np.full(n_spk * 2, -POSITION_LIMIT_M if fit_offsets else -1e-9)])
    hi = np.concatenate([np.full(3, np.log(DAMPING_RANGE[1])),
                         np.full(n_spk, np.log(CORNER_RANGE_HZ[1])),
                         np.full(n_spk * 2, POSITION_LIMIT_M if fit_offsets else 1e-9)])
    theta0 = np.clip(theta0, lo + 1e-9, hi - 1e-9)
    sol = least_squares(residual, theta0, bounds=(lo, hi), max_nfev=max_nfev,
                        diff_step=1e-3, x_scale="jac")
    damping, corner, offsets = _unpack(sol.x, n_spk)
    room = _room_db(geom, geom.speakers_m + offsets, damping, c, grid, cache)
    coef, _ = _solve_speakers(measured_db - room, grid, corner)
    return sol.x, coef, room


def initial_damping(irs: np.ndarray, fs: int) -> float:
    """Damping rate per surface pair from the measured decay below 300 Hz (Schroeder 1965).

    The energy decay curve of the low-passed responses, fitted from −5 to −25 dB,
    gives T; δ = 6.91 / T is shared by the three pairs (an oblique mode has 2 δ_pair
    per pair, summed over the three).
    """
    sos = butter(4, 300.0, "low", fs=fs, output="sos")
    x = sosfiltfilt(sos, np.asarray(irs, float).reshape(-1, np.shape(irs)[-1]), axis=-1)
    energy = np.cumsum((x**2).sum(axis=0)[::-1])[::-1]
    edc = 10 * np.log10(np.maximum(energy / energy[0], 1e-30))
    t = np.arange(edc.size) / fs
    sel = (edc <= -5.0) & (edc >= -25.0)
    if sel.sum() < 10:
        return 3.0
    slope = np.polyfit(t[sel], edc[sel], 1)[0]
    t60 = float(np.clip(-60.0 / slope if slope < 0 else 1.0, 0.1, 5.0))
    return float(np.clip(3.0 * np.log(10.0) / t60 / 6.0, *DAMPING_RANGE))


def calibrate(
    irs: np.ndarray,
    fs: int,
    size_m: tuple[float, float, float],
    speakers_m: np.ndarray,
    mics_m: np.ndarray,
    names: list[str],
    c: float = C_SOUND_M_S,
    leave_one_out: bool = True,
    max_nfev: int = 16,
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
        Most evaluations of the fit's residual.

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
    meas = np.transpose(measured_levels_db(irs, fs, grid), (1, 0, 2))  # (spk, pos, f)
    geom = Geometry(np.asarray(size_m, float), spk, mics)
    d0 = initial_damping(irs, fs)
    theta0 = np.concatenate([np.full(3, np.log(d0)), np.full(n_spk, np.log(40.0)),
                             np.zeros(2 * n_spk)])
    # Corner and damping first (positions fixed), then everything.
    theta, coef, room = _fit(meas, geom, c, theta0, max_nfev // 2, fit_offsets=False)
    theta, coef, room = _fit(meas, geom, c, theta, max_nfev)
    damping, corner, offsets = _unpack(theta, n_spk)
    pred = room + np.stack([_basis(grid, fc) @ k for fc, k in zip(corner, coef,
                                                                   strict=True)])[:, None, :]
    err = pred - meas
    per_pos = np.sqrt(np.mean(err**2, axis=(0, 2)))
    model = RoomModel(
        size_m=geom.size_m, names=list(names), speakers_m=spk + offsets, offsets_m=offsets,
        damping_per_axis=damping, corner_hz=corner, speaker_coef=coef,
        fit_error_db=float(np.sqrt(np.mean(err**2))), per_position_error_db=per_pos.tolist(),
        c=c,
    )
    if leave_one_out:
        loo = []
        for k in range(n_pos):
            keep = np.arange(n_pos) != k
            g_k = Geometry(geom.size_m, spk, mics[keep])
            th_k, coef_k, _ = _fit(meas[:, keep], g_k, c, theta, max(4, max_nfev // 5))
            d_k, c_k, o_k = _unpack(th_k, n_spk)
            m_k = replace(model, speakers_m=spk + o_k, damping_per_axis=d_k, corner_hz=c_k,
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

    The complex modal response times the fitted loudspeaker level (zero phase),
    faded out between :data:`VALID_TO_HZ` × 1.3 and the top of the fit band × 1.4
    (above it the model says nothing), as a real impulse response.

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
    use = freq <= top
    f = freq[use]
    h = model.room_response(np.maximum(f, 1e-3), speakers_m, np.asarray(mic_m, float)[None, :])
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
#: Half of it predicted best on the pyroomacoustics rooms of benchmarks/bench_placement.py
#: (median error ratio after moves 0.69 against 0.78 for the model alone).
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
