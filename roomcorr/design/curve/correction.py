"""The correction curve: target minus measurement, with the boost rules.

The rule, in plain words:

* Peaks are cut fully, down to ``max_cut_db``. Cutting is safe and robust:
  it needs no headroom and a peak stays a peak when the head moves.
* Boost is capped at ``max_boost_db`` (a few dB, common practice).
* Boost is refused in narrow deep dips. A dip that sits far below the
  measurement's own wide (1-octave power) envelope is a cancellation: the
  energy is gone, boosting burns headroom and driver excursion, and the dip
  moves when the head moves. The allowed boost falls linearly from full at
  ``DIP_FREE_DB`` below the envelope to none at ``DIP_REFUSE_DB``.
* Boost is also refused where the positions disagree: the allowed boost
  falls linearly from full at a spread of ``SPREAD_FREE_DB`` to none at
  ``SPREAD_REFUSE_DB`` (spread = standard deviation of the positions' dB).
* Outside the correction band the curve fades to 0 dB (raised cosine over
  half an octave), so no step appears at the band edges.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.design.curve.target import band_fade
from roomcorr.grid import points_per_octave_of

#: Depth below the wide envelope (dB) up to which boost is fully allowed ...
DIP_FREE_DB = 3.0
#: ... and beyond which no boost at all is applied.
DIP_REFUSE_DB = 9.0
#: Width of the envelope smoothing, in octaves.
ENVELOPE_OCT = 1.0
#: Position spread (dB) up to which boost is fully allowed, and where it stops.
SPREAD_FREE_DB = 2.0
SPREAD_REFUSE_DB = 6.0


@dataclass
class Correction:
    """A correction curve and how it came about (all arrays shape (n_freqs,))."""

    raw_db: np.ndarray
    correction_db: np.ndarray
    boost_withheld_db: np.ndarray
    dip_depth_db: np.ndarray
    boost_allowance: np.ndarray


def align_target(
    freq_hz: np.ndarray, average_db: np.ndarray, target_db: np.ndarray, band_hz: tuple[float, float]
) -> np.ndarray:
    """Shift the target so its median level in the band matches the measurement's.

    The median ignores narrow dips and peaks, so the correction is roughly
    balanced between cuts and boosts instead of lifting everything to a dip.
    """
    m = (freq_hz >= band_hz[0]) & (freq_hz <= band_hz[1])
    return target_db + float(np.median(average_db[m] - target_db[m]))


def _ramp_down(x: np.ndarray, free: float, refuse: float) -> np.ndarray:
    return np.clip((refuse - x) / (refuse - free), 0.0, 1.0)


def correction_curve(
    freq_hz: np.ndarray,
    average_db: np.ndarray,
    spread_db: np.ndarray,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
    max_boost_db: float,
    max_cut_db: float,
) -> Correction:
    """Compute the boost-limited correction curve.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
        Uniform log grid.
    average_db, spread_db : ndarray, shape (n_freqs,)
        Smoothed position average and position spread.
    target_db : ndarray, shape (n_freqs,)
        Target, already level-aligned (:func:`align_target`).
    band_hz : (float, float)
        Correction band.
    max_boost_db, max_cut_db : float
        Caps (both given as positive numbers).

    Returns
    -------
    Correction
        ``correction_db`` never exceeds ``max_boost_db`` nor falls below
        ``-max_cut_db``, for any input.
    """
    f = np.asarray(freq_hz, dtype=float)
    raw = np.asarray(target_db, dtype=float) - np.asarray(average_db, dtype=float)
    ppo = points_per_octave_of(f)
    envelope_db = 10 * np.log10(
        np.maximum(smooth_log_grid(10 ** (average_db / 10), ppo, ENVELOPE_OCT), 1e-30)
    )
    depth = np.maximum(envelope_db - average_db, 0.0)
    allowance = _ramp_down(depth, DIP_FREE_DB, DIP_REFUSE_DB) * _ramp_down(
        spread_db, SPREAD_FREE_DB, SPREAD_REFUSE_DB
    )
    boost_wanted = np.maximum(raw, 0.0)
    boost = np.minimum(boost_wanted, max_boost_db) * allowance
    cut = np.maximum(np.minimum(raw, 0.0), -max_cut_db)
    fade = band_fade(f, band_hz)
    corr = np.clip((boost + cut) * fade, -max_cut_db, max_boost_db)
    withheld = (boost_wanted - boost) * fade
    return Correction(
        raw_db=raw,
        correction_db=corr,
        boost_withheld_db=withheld,
        dip_depth_db=depth,
        boost_allowance=allowance,
    )
