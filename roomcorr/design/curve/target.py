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

from roomcorr.checked import checked_number
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

#: Limits of a ``[target]`` table (the preset files and the browser app's editor).
TILT_LIMIT_DB = 3.0
SHELF_LIMIT_DB = 10.0
#: Target points and the tilt pivot and shelf corner lie on the design grid.
POINT_RANGE_HZ = (10.0, 24000.0)
#: A target point moves the target at most this far (dB) from the tilt and shelf.
POINT_LIMIT_DB = 20.0
#: At most this many target points.
MAX_POINTS = 64

_TARGET_KEYS = {"tilt_db_per_octave", "tilt_pivot_hz", "bass_shelf_db", "bass_shelf_hz", "points"}


def target_from_table(freq_hz: np.ndarray, table: dict[str, Any], source: str) -> np.ndarray:
    """Evaluate a preset's ``[target]`` table on ``freq_hz`` (dB, shape (n_freqs,))."""
    unknown = set(table) - _TARGET_KEYS
    if unknown:
        raise SettingsError(f"{source}: unknown target key {sorted(unknown)[0]!r}")

    def number(key: str, default: float, lo: float, hi: float, unit: str) -> float:
        value = table.get(key, default)
        if isinstance(value, str | bool):
            raise SettingsError(f"{source}: target values must be numbers")
        return checked_number(value, f"{source}: target {key}", lo, hi, unit=unit)

    # NaN compares false with every limit: each value goes through checked_number
    tilt = number("tilt_db_per_octave", 0.0, -TILT_LIMIT_DB, TILT_LIMIT_DB, "dB/octave")
    pivot = number("tilt_pivot_hz", 1000.0, *POINT_RANGE_HZ, "Hz")
    shelf_db = number("bass_shelf_db", 0.0, -SHELF_LIMIT_DB, SHELF_LIMIT_DB, "dB")
    shelf_hz = number("bass_shelf_hz", 120.0, *POINT_RANGE_HZ, "Hz")
    f = np.asarray(freq_hz, dtype=float)
    out = tilt * np.log2(f / pivot)
    # A smooth second-order-like shelf in dB: full gain well below, 0 well above.
    out += shelf_db / (1.0 + (f / shelf_hz) ** 2)
    points = table.get("points")
    if points:
        arr = target_points(points, source)
        order = np.argsort(arr[:, 0])
        out += interp_log(f, arr[order, 0], arr[order, 1])
    return out


def target_points(points: Any, source: str) -> np.ndarray:
    """A target's ``points`` as an array of [Hz, dB] rows, every value checked.

    Frequencies lie in :data:`POINT_RANGE_HZ` (the design grid), gains within
    ±:data:`POINT_LIMIT_DB`, all finite; no frequency twice.

    Returns
    -------
    ndarray, shape (n_points, 2)
    """
    pairs_msg = f"{source}: target points must be [frequency, dB] pairs"
    if not isinstance(points, list | tuple) or len(points) > MAX_POINTS:
        raise SettingsError(f"{pairs_msg}, at most {MAX_POINTS}")
    rows = []
    for k, pair in enumerate(points, start=1):
        if not isinstance(pair, list | tuple) or len(pair) != 2:
            raise SettingsError(pairs_msg)
        if any(isinstance(v, str | bool) for v in pair):
            raise SettingsError(pairs_msg)
        f_hz = checked_number(
            pair[0], f"{source}: target point {k} frequency", *POINT_RANGE_HZ, unit="Hz"
        )
        g_db = checked_number(
            pair[1], f"{source}: target point {k} gain", -POINT_LIMIT_DB, POINT_LIMIT_DB, unit="dB"
        )
        rows.append((f_hz, g_db))
    arr = np.asarray(rows, dtype=float).reshape(-1, 2)
    if np.unique(arr[:, 0]).size != arr.shape[0]:
        raise SettingsError(f"{source}: target points: the same frequency appears twice")
    return arr


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
