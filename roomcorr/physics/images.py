"""Image sources of a rectangular room (Allen and Berkley) for the early reflections.

References
----------
.. [1] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
"""

from __future__ import annotations

import itertools

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
