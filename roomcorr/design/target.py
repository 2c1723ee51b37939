"""Target curves and the correction band.

A target is a shape in dB on the log grid; its absolute level is set later
(aligned to the measurement), so only its shape matters. Presets are TOML
files in ``presets/`` with a ``[target]`` table::

    [target]
    tilt_db_per_octave = -0.7   # slope, pivoting at tilt_pivot_hz
    tilt_pivot_hz = 1000.0
    bass_shelf_db = 3.0         # extra bass below bass_shelf_hz
    bass_shelf_hz = 120.0
    points = [[20, 0.0], [20000, -3.0]]   # optional explicit points, added on top
"""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.errors import SettingsError
from roomcorr.grid import interp_log

#: The band edge is where the 1-octave-smoothed response falls this far
#: below its mid-band level (the loudspeaker's own roll-off).
ROLLOFF_DB = 6.0
#: Mid-band reference region for the roll-off search, in Hz.
REFERENCE_BAND_HZ = (200.0, 2000.0)
#: Automatic band never reaches beyond these (Hz).
AUTO_LIMITS_HZ = (15.0, 20000.0)
#: Width of the raised-cosine fade to 0 dB outside the band, in octaves.
FADE_OCT = 0.5

_TARGET_KEYS = {"tilt_db_per_octave", "tilt_pivot_hz", "bass_shelf_db", "bass_shelf_hz", "points"}


def target_from_table(freq_hz: np.ndarray, table: dict[str, Any], source: str) -> np.ndarray:
    """Evaluate a preset's ``[target]`` table on ``freq_hz`` (dB, shape (n_freqs,))."""
    unknown = set(table) - _TARGET_KEYS
    if unknown:
        raise SettingsError(f"{source}: unknown target key {sorted(unknown)[0]!r}")
    try:
        tilt = float(table.get("tilt_db_per_octave", 0.0))
        pivot = float(table.get("tilt_pivot_hz", 1000.0))
        shelf_db = float(table.get("bass_shelf_db", 0.0))
        shelf_hz = float(table.get("bass_shelf_hz", 120.0))
    except (TypeError, ValueError):
        raise SettingsError(f"{source}: target values must be numbers") from None
    if pivot <= 0 or shelf_hz <= 0:
        raise SettingsError(f"{source}: target frequencies must be positive")
    if abs(tilt) > 3.0 or abs(shelf_db) > 10.0:
        raise SettingsError(f"{source}: tilt beyond ±3 dB/octave or shelf beyond ±10 dB")
    f = np.asarray(freq_hz, dtype=float)
    out = tilt * np.log2(f / pivot)
    # A smooth second-order-like shelf in dB: full gain well below, 0 well above.
    out += shelf_db / (1.0 + (f / shelf_hz) ** 2)
    points = table.get("points")
    if points:
        try:
            arr = np.asarray(points, dtype=float)
        except (TypeError, ValueError):
            raise SettingsError(f"{source}: target points must be [frequency, dB] pairs") from None
        if arr.ndim != 2 or arr.shape[1] != 2 or np.any(arr[:, 0] <= 0):
            raise SettingsError(f"{source}: target points must be [frequency, dB] pairs")
        order = np.argsort(arr[:, 0])
        out += interp_log(f, arr[order, 0], arr[order, 1])
    return out


def target_from_points(freq_hz: np.ndarray, pts_hz: np.ndarray, pts_db: np.ndarray) -> np.ndarray:
    """Target from a user's frequency/dB pairs, linear in log frequency, ends held."""
    return interp_log(freq_hz, pts_hz, pts_db)


def _first_run_below(level_db: np.ndarray, ref_db: float, idx: np.ndarray) -> int | None:
    for i in idx:
        if level_db[i] < ref_db - ROLLOFF_DB:
            return int(i)
    return None


def auto_band(freq_hz: np.ndarray, wide_db: np.ndarray) -> tuple[float, float]:
    """Correction band from the measured roll-off of the loudspeaker.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    wide_db : ndarray, shape (n_freqs,)
        Position average smoothed over about an octave (so single dips do
        not end the band).

    Returns
    -------
    (band_lo_hz, band_hi_hz)
        Where the response first falls :data:`ROLLOFF_DB` below the median
        level of :data:`REFERENCE_BAND_HZ`, searching outward from it. No
        correction (and so no boost) is applied beyond the loudspeaker's own
        roll-off (common practice).
    """
    f = np.asarray(freq_hz)
    ref_mask = (f >= REFERENCE_BAND_HZ[0]) & (f <= REFERENCE_BAND_HZ[1])
    ref = float(np.median(wide_db[ref_mask]))
    lo_i = np.flatnonzero(f < REFERENCE_BAND_HZ[0])[::-1]
    hi_i = np.flatnonzero(f > REFERENCE_BAND_HZ[1])
    i_lo = _first_run_below(wide_db, ref, lo_i)
    i_hi = _first_run_below(wide_db, ref, hi_i)
    lo = f[i_lo] if i_lo is not None else f[0]
    hi = f[i_hi] if i_hi is not None else f[-1]
    return float(max(lo, AUTO_LIMITS_HZ[0])), float(min(hi, AUTO_LIMITS_HZ[1]))


def band_fade(freq_hz: np.ndarray, band_hz: tuple[float, float], fade_oct: float = FADE_OCT):
    """Weight 1 inside the band, raised-cosine fade to 0 over ``fade_oct`` outside.

    Returns
    -------
    ndarray, shape (n_freqs,)
    """
    f = np.asarray(freq_hz, dtype=float)
    lo, hi = band_hz
    w = np.ones_like(f)
    below = np.log2(lo / f)
    above = np.log2(f / hi)
    for d in (below, above):
        m = d > 0
        w[m] *= np.where(d[m] >= fade_oct, 0.0, 0.5 + 0.5 * np.cos(np.pi * d[m] / fade_oct))
    return w
