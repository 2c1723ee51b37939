"""Image sources of a rectangular room (Allen and Berkley) for the early reflections.

References
----------
.. [1] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
"""

from __future__ import annotations

import itertools
import math

import numpy as np

#: Names of the six walls in the order of the reflection counts (axis 0 at 0, axis 0 at L, ...).
WALL_INDEX = ("axis0_low", "axis0_high", "axis1_low", "axis1_high", "axis2_low", "axis2_high")


def image_sources(
    src: np.ndarray, dims: np.ndarray, max_order: int = 2
) -> list[tuple[np.ndarray, tuple[int, ...]]]:
    """Image positions and per-wall reflection counts up to ``max_order``.

    Each image is ``((1 − 2p_i) x_i + 2 m_i L_i)`` for ``p_i ∈ {0, 1}`` and
    integer ``m_i`` (Allen and Berkley, eq. 10); it has reflected ``|m_i − p_i|``
    times on the wall at 0 and ``|m_i|`` times on the wall at ``L_i``.

    Parameters
    ----------
    src : ndarray, shape (3,)
    dims : ndarray, shape (3,)
    max_order : int
        Highest total number of reflections (at most 2 with this enumeration of ``m``).

    Returns
    -------
    list of (position ndarray (3,), counts tuple of 6 ints)
        Counts ordered (axis 0 at 0, axis 0 at L, axis 1 at 0, axis 1 at L, axis 2 at 0,
        axis 2 at L). The first entry with all-zero counts is the source itself.

    References
    ----------
    .. [1] J. B. Allen and D. A. Berkley, JASA 65(4), 1979, eq. 10.
    """
    images = []
    for p in itertools.product((0, 1), repeat=3):
        for m in itertools.product((-1, 0, 1), repeat=3):
            counts = []
            for axis in range(3):
                mi, pi = m[axis], p[axis]
                counts.extend((abs(mi - pi), abs(mi)))
            if sum(counts) > max_order:
                continue
            pos = np.array([(1 - 2 * p[a]) * src[a] + 2 * m[a] * dims[a] for a in range(3)])
            images.append((pos, tuple(counts)))
    return images


def first_order_reflections(
    src: np.ndarray, mic: np.ndarray, dims: np.ndarray, c: float
) -> list[dict]:
    """Each wall's first reflection: the source's distance to it and the extra delay.

    Parameters
    ----------
    src, mic : ndarray, shape (3,)
    dims : ndarray, shape (3,)
    c : float
        Speed of sound, m/s.

    Returns
    -------
    list of dict, one per wall in :data:`WALL_INDEX` order
        ``wall`` (index 0..5), ``distance_m`` (source to that wall),
        ``path_m`` (image to microphone), ``delay_after_direct_s``
        (reflection path minus direct path, over c).

    References
    ----------
    .. [1] J. B. Allen and D. A. Berkley, JASA 65(4), 1979.
    """
    src = np.asarray(src, dtype=float)
    mic = np.asarray(mic, dtype=float)
    dims = np.asarray(dims, dtype=float)
    direct = float(np.linalg.norm(src - mic))
    out = []
    for wall in range(6):
        axis, high = divmod(wall, 2)
        img = src.copy()
        img[axis] = 2.0 * dims[axis] - src[axis] if high else -src[axis]
        path = float(np.linalg.norm(img - mic))
        dist = float(dims[axis] - src[axis]) if high else float(src[axis])
        out.append(
            {
                "wall": wall,
                "distance_m": dist,
                "path_m": path,
                "delay_after_direct_s": (path - direct) / c,
            }
        )
    return out


def early_spectrum(
    freq_hz: np.ndarray,
    images: list[tuple[np.ndarray, tuple[int, ...]]],
    mic: np.ndarray,
    beta: np.ndarray,
    wall: np.ndarray,
    c: float,
) -> np.ndarray:
    """Direct sound and image sources at one microphone, ``sum g e^{-jωr/c} / (4πr)``.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    images : list of (position, reflection counts per wall), from :func:`image_sources`
    mic : ndarray, shape (3,)
    beta : ndarray, shape (6,)
        Pressure reflection factor of each wall, ``sqrt(1 - α)``.
    wall : ndarray, shape (n_freqs,)
        Treble loss of one reflection (applied once per reflection).
    c : float
        Speed of sound, m/s.

    Returns
    -------
    ndarray, shape (n_freqs,), complex

    References
    ----------
    .. [1] J. B. Allen and D. A. Berkley, JASA 65(4), 1979.
    """
    early = np.zeros(freq_hz.size, dtype=complex)
    for img, counts in images:
        r = float(np.linalg.norm(img - mic))
        order = sum(counts)
        gain = float(np.prod(beta ** np.asarray(counts))) / (4.0 * np.pi * r)
        early += gain * wall**order * np.exp(-2j * np.pi * freq_hz * r / c)
    return early


# --------------------------------------------------------------------------- full image lattice

#: Default ratio of the weakest image kept to the direct sound (amplitude), after Allen and
#: Berkley's truncation by reflection order.
IMAGE_FLOOR = 1e-3
#: Highest reflection order a lattice is built to (295,000 images).
MAX_IMAGE_ORDER = 60
#: Moments of the fractional delay kept by :func:`lattice_spectra` (Taylor terms).
_N_MOMENTS = 4
#: Most receiver-image pairs :func:`lattice_spectra` holds at once (about 16 MB an array).
_MAX_ELEMENTS = 1 << 21


def image_lattice(max_order: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every image of a rectangular room up to a total reflection order, by index.

    An image is an integer vector ``q`` with ``|q_x| + |q_y| + |q_z| <= max_order``;
    along each axis ``q = 2m − p`` (``p ∈ {0, 1}``) is Allen and Berkley's pair
    (eq. 10): the image coordinate is ``(1 − 2p) x0 + 2 m L`` and it has met the wall
    at 0 ``|m − p|`` times and the wall at ``L`` ``|m|`` times (``|q|`` in all).

    Parameters
    ----------
    max_order : int

    Returns
    -------
    sign : ndarray, shape (n_images, 3)
        ``1 − 2p`` per axis.
    shift : ndarray, shape (n_images, 3)
        ``2m`` per axis (times the room's extent gives the offset, m).
    counts : ndarray, shape (n_images, 6)
        Reflections on each wall in :data:`WALL_INDEX` order.

    References
    ----------
    .. [1] J. B. Allen and D. A. Berkley, JASA 65(4), 1979, eq. 10.
    """
    r = np.arange(-max_order, max_order + 1)
    q = np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)
    q = q[np.abs(q).sum(axis=1) <= max_order]
    p = np.mod(q, 2)
    m = (q + p) // 2
    counts = np.empty((q.shape[0], 6), dtype=np.int16)  # at most MAX_IMAGE_ORDER
    counts[:, 0::2] = np.abs(m - p)
    counts[:, 1::2] = np.abs(m)
    return (1 - 2 * p).astype(float), (2 * m).astype(float), counts


def image_order_for(beta: np.ndarray, dims: np.ndarray, floor: float = IMAGE_FLOOR,
                    direct_m: float = 1.0) -> int:
    """Lowest reflection order at which every further image is below ``floor`` of the direct.

    An image of order ``n`` is at least ``n`` times the room's smallest extent away
    and carries at most ``g^n`` with ``g`` the largest geometric mean of the two
    reflection factors of one pair of walls; its amplitude relative to a direct
    sound at ``direct_m`` is then at most ``g^n direct_m / (n L_min)``.

    Returns
    -------
    int
        Between 1 and :data:`MAX_IMAGE_ORDER`.
    """
    b = np.clip(np.asarray(beta, dtype=float), 0.0, 1.0)
    g = float(np.max(np.sqrt(b[0::2] * b[1::2])))
    l_min = float(np.min(dims))
    for n in range(1, MAX_IMAGE_ORDER + 1):
        if g**n * direct_m / (n * l_min) < floor:
            return n
    return MAX_IMAGE_ORDER


def lattice_weights(counts: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """Product of the walls' reflection factors over each image's reflections.

    Parameters
    ----------
    counts : ndarray, shape (n_images, 6)
    beta : ndarray, shape (6,)
        Pressure reflection factor of each wall (0 < β <= 1), :data:`WALL_INDEX` order.

    Returns
    -------
    ndarray, shape (n_images,)
    """
    log_beta = np.log(np.clip(np.asarray(beta, dtype=float), 1e-12, 1.0))
    return np.exp(counts @ log_beta)


def lattice_spectra(
    src: np.ndarray,
    mics: np.ndarray,
    dims: np.ndarray,
    lattice: tuple[np.ndarray, np.ndarray, np.ndarray],
    weights: np.ndarray,
    c: float,
    step_hz: float,
    f_max_hz: float,
    wall_derivatives: bool = False,
    source_derivatives: bool = False,
) -> tuple[np.ndarray, ...]:
    """Image-source transfer function ``Σ w e^{−jωr/c} / (4πr)`` on a uniform grid.

    The sum is exact up to the lattice's order: each image's delay is split into a
    whole number of samples at a rate ``fs >= 8 f_max`` and a fraction ``d`` of at
    most half a sample; ``e^{−jΩd}`` is expanded to four Taylor terms (error below
    ``(π/8)⁴/24 ≈ 1e-3`` at ``f_max``), so the sum becomes four weighted histograms
    of the delays and their discrete Fourier transforms. Sampling the spectrum
    every ``step_hz`` folds the histograms modulo ``fs / step_hz`` samples, which
    changes nothing at those frequencies. Derivatives (for a fit) keep two terms.

    Parameters
    ----------
    src : ndarray, shape (3,)
    mics : ndarray, shape (n_mics, 3)
    dims : ndarray, shape (3,)
    lattice : from :func:`image_lattice`
    weights : ndarray, shape (n_images,)
        From :func:`lattice_weights`.
    c : float
        Speed of sound, m/s.
    step_hz, f_max_hz : float
        Frequency spacing and the highest frequency wanted.
    wall_derivatives : bool
        Also return the derivative of ``h`` with respect to ``ln β`` of each wall
        (each image's term times its number of reflections on that wall).
    source_derivatives : bool
        Also return the derivative of ``h`` with respect to the source's x and y, m⁻¹:
        each term times ``(−jω/c − 1/r) ∂r/∂x``.

    Returns
    -------
    freq_hz : ndarray, shape (n_freqs,)
        ``0, step_hz, ..., >= f_max_hz``.
    h : ndarray, shape (n_mics, n_freqs), complex
        Pressure per unit source (free field ``1 / (4π r)``).
    dh_wall : ndarray, shape (6, n_mics, n_freqs), complex
        Only with ``wall_derivatives``.
    dh_src : ndarray, shape (2, n_mics, n_freqs), complex
        Only with ``source_derivatives``.

    References
    ----------
    .. [1] J. B. Allen and D. A. Berkley, JASA 65(4), 1979.
    """
    sign, shift, counts = lattice
    mics = np.atleast_2d(np.asarray(mics, dtype=float))
    n_mics = mics.shape[0]
    per_call = max(1, _MAX_ELEMENTS // max(1, sign.shape[0]))
    if n_mics > per_call:  # a few receivers at a time: memory stays bounded
        parts = [lattice_spectra(src, mics[i:i + per_call], dims, lattice, weights, c, step_hz,
                                 f_max_hz, wall_derivatives, source_derivatives)
                 for i in range(0, n_mics, per_call)]
        joined: list[np.ndarray] = [parts[0][0], np.concatenate([q[1] for q in parts])]
        joined += [np.concatenate([q[k] for q in parts], axis=1) for k in range(2, len(parts[0]))]
        return tuple(joined)
    n_fft = 1 << int(np.ceil(np.log2(8.0 * f_max_hz / step_hz)))
    fs = n_fft * step_hz
    n_f = int(np.floor(f_max_hz / step_hz)) + 2
    pos = sign * np.asarray(src, dtype=float) + shift * np.asarray(dims, dtype=float)
    if source_derivatives:
        d = pos[None, :, :] - mics[:, None, :]
        r = np.sqrt(np.einsum("mij,mij->mi", d, d))  # (n_mics, n_images)
    else:  # |p − m|² = |p|² − 2 p·m + |m|², one matrix product
        r2 = (np.einsum("ij,ij->i", pos, pos)[None, :] - 2.0 * (mics @ pos.T)
              + np.einsum("ij,ij->i", mics, mics)[:, None])
        r = np.sqrt(np.maximum(r2, 1e-12))
    tau = r * (fs / c)
    whole = np.rint(tau)
    frac = tau - whole
    bins = whole.astype(np.int64)
    if bins.max() >= n_fft:  # longer than 1 / step_hz: fold (the spectrum is sampled)
        bins %= n_fft
    flat = (bins + (np.arange(n_mics) * n_fft)[:, None]).ravel()
    amp = np.asarray(weights, dtype=float)[None, :] / (4.0 * np.pi * r)
    size = n_mics * n_fft
    omega = 2.0 * np.pi * np.arange(n_f) / n_fft

    def transform(values: list[np.ndarray], n_terms: int) -> np.ndarray:
        """Σ over images of value · e^{−jωτ}, for each array in ``values``."""
        hist = np.empty((len(values), n_terms, size))
        for v, val in enumerate(values):
            term = val
            for k in range(n_terms):
                hist[v, k] = np.bincount(flat, term.ravel(), minlength=size)
                if k + 1 < n_terms:
                    term = term * frac
        spec = np.fft.rfft(hist.reshape(len(values), n_terms, n_mics, n_fft), axis=-1)
        taylor = np.stack([(-1j * omega) ** k / math.factorial(k) for k in range(n_terms)])
        return np.einsum("vkmf,kf->vmf", spec[..., :n_f], taylor)

    freq = np.arange(n_f) * step_hz
    out: list[np.ndarray] = [freq, transform([amp], _N_MOMENTS)[0]]
    if wall_derivatives:
        out.append(transform([amp * counts[None, :, w] for w in range(6)], 2))
    if source_derivatives:
        dr = [d[..., a] * sign[None, :, a] / r for a in (0, 1)]  # ∂r/∂src_a
        parts = transform([amp * g for g in dr] + [amp * g / r for g in dr], 2)
        jw_c = -2j * np.pi * freq / c
        out.append(np.stack([jw_c * parts[a] - parts[2 + a] for a in (0, 1)]))
    return tuple(out)
