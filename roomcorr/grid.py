"""The log-frequency grid every response and correction curve lives on.

The grid is independent of any sample rate: measurements are brought onto it
as early as possible and every filter is synthesised from curves on it.
"""

from __future__ import annotations

import numpy as np

#: Default grid: 1/96 octave from 10 Hz to 24 kHz (about 1080 points).
DEFAULT_F_LO_HZ = 10.0
DEFAULT_F_HI_HZ = 24000.0
DEFAULT_POINTS_PER_OCTAVE = 96


def log_grid(
    f_lo_hz: float = DEFAULT_F_LO_HZ,
    f_hi_hz: float = DEFAULT_F_HI_HZ,
    points_per_octave: int = DEFAULT_POINTS_PER_OCTAVE,
) -> np.ndarray:
    """Return frequencies spaced uniformly in log2 from ``f_lo_hz`` to ``f_hi_hz``.

    Parameters
    ----------
    f_lo_hz, f_hi_hz : float
        First and last frequency in Hz (the last is included, rounded to the grid).
    points_per_octave : int
        Resolution; neighbouring points differ by ``2 ** (1 / points_per_octave)``.

    Returns
    -------
    freq_hz : ndarray, shape (n_freqs,)
    """
    n_oct = np.log2(f_hi_hz / f_lo_hz)
    n = int(round(n_oct * points_per_octave)) + 1
    return f_lo_hz * 2.0 ** (np.arange(n) / points_per_octave)


def points_per_octave_of(freq_hz: np.ndarray) -> float:
    """Return the resolution of a log grid in points per octave."""
    return 1.0 / float(np.log2(freq_hz[1] / freq_hz[0]))


def interp_log(freq_hz: np.ndarray, grid_hz: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Interpolate ``values`` given on ``grid_hz`` at ``freq_hz``, linearly in log frequency.

    Values outside the grid are held at the end values. Frequencies at or
    below 0 Hz take the first value.
    """
    f = np.log2(np.maximum(np.asarray(freq_hz, dtype=float), 1e-12))
    return np.interp(f, np.log2(grid_hz), values)
