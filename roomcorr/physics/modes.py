"""Modes of a rectangular room: Rayleigh's frequencies and the modal Green's function.

References
----------
.. [1] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3
       (modes of a rectangular room, the modal expansion of its Green's function,
       modal damping ``δ = 6.91 / T``).
.. [2] Lord Rayleigh, *The Theory of Sound*, vol. II, 1896, §267 (the
       eigenfrequencies of a rectangular enclosure).
.. [3] M. R. Schroeder, "The 'Schroeder frequency' revisited", JASA 99(5), 1996.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

#: Speed of sound, m/s (air at about 20 °C).
C_SOUND_M_S = 343.0


def mode_kind(label: tuple[int, int, int]) -> str:
    """``"axial"``, ``"tangential"`` or ``"oblique"``: 1, 2 or 3 non-zero indices."""
    nonzero = sum(1 for n in label if n != 0)
    return {1: "axial", 2: "tangential", 3: "oblique"}[nonzero]


def mode_grid(
    dims_m: Sequence[float], c: float, f_max_hz: float
) -> tuple[np.ndarray, np.ndarray]:
    """All mode numbers with ``0 < f <= f_max_hz`` (Rayleigh's formula).

    Parameters
    ----------
    dims_m : sequence of 3 floats
        Room extent along each axis, m.
    c : float
        Speed of sound, m/s.
    f_max_hz : float
        Highest mode frequency, Hz.

    Returns
    -------
    labels : ndarray, shape (n_modes, 3), int
    freq_hz : ndarray, shape (n_modes,)
        ``c/2 sqrt((n_x/L_x)² + (n_y/L_y)² + (n_z/L_z)²)``, sorted (ties by label).

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, section 3.3.
    """
    dims = np.asarray(dims_m, dtype=float)
    n_max = np.floor(2.0 * f_max_hz * dims / c).astype(int)
    axes = [np.arange(n + 1) for n in n_max]
    nx, ny, nz = np.meshgrid(*axes, indexing="ij")
    labels = np.stack([nx.ravel(), ny.ravel(), nz.ravel()], axis=1)
    freq_hz = 0.5 * c * np.sqrt(np.sum((labels / dims) ** 2, axis=1))
    keep = (freq_hz > 0.0) & (freq_hz <= f_max_hz)
    labels, freq_hz = labels[keep], freq_hz[keep]
    order = np.lexsort((labels[:, 2], labels[:, 1], labels[:, 0], freq_hz))
    return labels[order], freq_hz[order]


def room_mode_frequencies(
    dims_m: Sequence[float], c: float = C_SOUND_M_S, f_max: float = 300.0
) -> list[tuple[tuple[int, int, int], float]]:
    """Return every mode of a rectangular room up to ``f_max`` (Rayleigh's formula).

    Parameters
    ----------
    dims_m : sequence of 3 floats
        Room dimensions (L_x, L_y, L_z) in metres.
    c : float
        Speed of sound in m/s.
    f_max : float
        Highest mode frequency to return, Hz.

    Returns
    -------
    list of ((n_x, n_y, n_z), freq_hz)
        Sorted by frequency (ties by label); the zero mode (0, 0, 0) is left out.

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, section 3.3.
    """
    if len(dims_m) != 3 or min(dims_m) <= 0:
        raise ValueError("dims_m must be three positive lengths in metres")
    labels, freq_hz = mode_grid(dims_m, c, f_max)
    return [
        ((int(a), int(b), int(d)), float(f))
        for (a, b, d), f in zip(labels, freq_hz, strict=True)
    ]


def axial_mode_frequencies(
    dims_m: Sequence[float], c: float = C_SOUND_M_S, n_max: int = 3
) -> list[tuple[tuple[int, int, int], float]]:
    """Return the axial modes ``n c / (2 L)`` of each dimension for ``n = 1 .. n_max``.

    Returns
    -------
    list of ((n_x, n_y, n_z), freq_hz)
        ``3 * n_max`` entries sorted by frequency (one non-zero index each).

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, section 3.3.
    """
    if len(dims_m) != 3 or min(dims_m) <= 0:
        raise ValueError("dims_m must be three positive lengths in metres")
    modes = []
    for axis, length in enumerate(dims_m):
        for n in range(1, n_max + 1):
            label = [0, 0, 0]
            label[axis] = n
            modes.append(((label[0], label[1], label[2]), n * c / (2.0 * float(length))))
    return sorted(modes, key=lambda m: (m[1], m[0]))


def schroeder_frequency_hz(t60_s: float, volume_m3: float) -> float:
    """Return the Schroeder frequency ``2000 sqrt(T60 / V)`` in Hz.

    References
    ----------
    .. [1] M. R. Schroeder, "The 'Schroeder frequency' revisited", JASA 99(5), 1996.
    """
    return 2000.0 * float(np.sqrt(t60_s / volume_m3))


def sabine_t60_s(dims_m: Sequence[float], wall_alpha: Sequence[float]) -> float:
    """Return Sabine's ``T60 = 0.161 V / A`` for a box with one α per wall.

    ``wall_alpha`` is ordered (axis 0 at 0, axis 0 at L, axis 1 at 0, axis 1 at L,
    axis 2 at 0, axis 2 at L).

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, section 5.1 (Sabine's formula).
    """
    lx, ly, lz = dims_m
    areas = (ly * lz, ly * lz, lx * lz, lx * lz, lx * ly, lx * ly)
    absorption_m2 = sum(a * s for a, s in zip(wall_alpha, areas, strict=True))
    return 0.161 * lx * ly * lz / absorption_m2


def modal_response(
    freq_hz: np.ndarray,
    src: np.ndarray,
    mics: np.ndarray,
    dims: np.ndarray,
    labels: np.ndarray,
    mode_hz: np.ndarray,
    delta: float | np.ndarray,
    c: float,
) -> np.ndarray:
    """Modal expansion of the rectangular room's Green's function for one point source.

    ``G(r, r0, ω) = c² Σ_n ψ_n(r) ψ_n(r0) / (N_n (ω_n² − ω² + 2jδ_n ω))`` with
    ``ψ_n = Π cos(n_i π x_i / L_i)`` and ``N_n = V Π ε_i`` (ε = 1 for n_i = 0,
    else 1/2). With a unit volume velocity the pressure is ``jωρ G``; the
    convention here (as in the demo room) is the pressure of a source whose
    free-field response at 1 m is ``1 / (4π)`` below resonance up to the
    factor ``jωρ`` that the loudspeaker model carries.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    src : ndarray, shape (3,)
        Source position, m.
    mics : ndarray, shape (n_mics, 3)
        Receiver positions, m.
    dims : ndarray, shape (3,)
        Room extent, m.
    labels : ndarray, shape (n_modes, 3)
        Mode numbers (from :func:`mode_grid`; a (0, 0, 0) row is the pressure-chamber mode).
    mode_hz : ndarray, shape (n_modes,)
        Mode frequencies, Hz.
    delta : float or ndarray, shape (n_modes,)
        Modal damping constant(s), 1/s (``3 ln 10 / T60``).
    c : float
        Speed of sound, m/s.

    Returns
    -------
    ndarray, shape (n_mics, n_freqs), complex

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, sections 3.2-3.5 (eq. 3.10ff).
    """
    k = np.pi * labels / dims  # (n_modes, 3)
    psi_src = np.prod(np.cos(k * src), axis=1)  # (n_modes,)
    psi_mic = np.prod(np.cos(k[None, :, :] * mics[:, None, :]), axis=2)  # (n_mics, n_modes)
    eps = np.where(labels == 0, 1.0, 0.5).prod(axis=1)
    norm = np.prod(dims) * eps
    w = 2.0 * np.pi * freq_hz[:, None]
    wn = 2.0 * np.pi * mode_hz[None, :]
    d = np.asarray(delta, dtype=float)
    d = d[None, :] if d.ndim == 1 else d
    denom = norm[None, :] * (wn**2 - w**2 + 2j * d * w)  # (n_freqs, n_modes)
    return c**2 * (psi_mic * psi_src[None, :]) @ (1.0 / denom).T
