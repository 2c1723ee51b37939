"""Averaging positions: power average and how much the positions disagree."""

from __future__ import annotations

import numpy as np


def power_average(
    measured_db: np.ndarray, weights: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Weighted power average over positions and the spread between them.

    Parameters
    ----------
    measured_db : ndarray, shape (n_positions, n_freqs)
        Smoothed level per position in dB.
    weights : ndarray, shape (n_positions,), optional
        Relative weights (e.g. the centre seat heavier); equal by default.

    Returns
    -------
    average_db : ndarray, shape (n_freqs,)
        10 log10 of the weighted mean power.
    spread_db : ndarray, shape (n_freqs,)
        Weighted standard deviation of the per-position dB values around
        their weighted mean: 0 for one position or perfect agreement.
    """
    m = np.atleast_2d(np.asarray(measured_db, dtype=float))
    w = np.ones(m.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (m.shape[0],):
        raise ValueError("weights must have one value per position")
    w = w / w.sum()
    power = np.einsum("p,pf->f", w, 10 ** (m / 10))
    average_db = 10 * np.log10(np.maximum(power, 1e-30))
    mean_db = np.einsum("p,pf->f", w, m)
    spread_db = np.sqrt(np.maximum(np.einsum("p,pf->f", w, (m - mean_db) ** 2), 0.0))
    return average_db, spread_db
