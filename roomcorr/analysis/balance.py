"""Broad balance from the steady state, fine detail from the frequency-dependent window.

The frequency-dependent window (:mod:`roomcorr.analysis.window`) keeps 15
cycles of each frequency: hundreds of milliseconds in the low bass, tens of
milliseconds at a few hundred hertz, a few milliseconds in the treble. The
shorter the window, the more of the reverberant field it leaves out, so the
windowed response falls, relative to what a listener hears in the room (the
steady state), by several dB from the bass to the treble, more in a live
room (on the evaluation rooms of :mod:`roomcorr.evaluation`: about 4 dB
from 300 Hz to 2 kHz in a damped room, 8 dB in a live one). That bend is not
in the room; a correction designed on it lifts the treble and leaves a hump
where the window shortens.

:func:`steady_balance_db` keeps the windowed response's detail (everything
narrower than :data:`BALANCE_OCT`, where the window does its job of
suppressing position-specific late interference) and replaces its broad
trend by that of a long, fixed window (:data:`LONG_WINDOW_S`), i.e. the
steady state.

In the modal range (below :data:`MODAL_DETAIL_HZ`) the detail, too, comes
from the long window. There the room's response is a sum of a few
resonances whose decay (T60 / 6.9 per neper) is longer than 15 cycles: a
mode at 100 Hz in a room with T60 = 0.6 s still rings when the 150 ms window
closes, so the window reads its peak 1 to 2 dB low and wider than it is,
while a listener hears (and the quality figures measure) the steady state.
Cutting the peak the window shows leaves part of the resonance in place.

References
----------
.. [1] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3
       (steady-state response of a room as a sum of damped modes).
"""

from __future__ import annotations

import numpy as np

from roomcorr.analysis.smoothing import smooth_log_grid, variable_width_oct
from roomcorr.analysis.window import fdw_power
from roomcorr.grid import points_per_octave_of

#: Length of the fixed window giving the steady-state trend, s.
LONG_WINDOW_S = 0.5
#: Width of the broad trend that is exchanged, octaves.
BALANCE_OCT = 1.0
#: Below the first frequency the level is the long window's in full detail (the
#: modal range), above the second the windowed detail; a raised cosine in log
#: frequency between them, Hz. ``None``: the windowed detail everywhere.
MODAL_DETAIL_HZ: tuple[float, float] | None = (300.0, 600.0)
#: Length of the window giving the modal range's detail, s (at most the response's length).
MODAL_WINDOW_S = 0.5


def _trend_db(freq_hz: np.ndarray, level_db: np.ndarray) -> np.ndarray:
    ppo = points_per_octave_of(freq_hz)
    power = smooth_log_grid(10 ** (level_db / 10), ppo, BALANCE_OCT)
    return 10 * np.log10(np.maximum(power, 1e-30))


def steady_balance_db(
    ir: np.ndarray,
    fs: int,
    onset: float,
    freq_hz: np.ndarray,
    windowed_db: np.ndarray,
    modal_detail: bool = True,
) -> np.ndarray:
    """Windowed level with its broad trend taken from the steady state.

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
    fs : int
    onset : float
        Direct-sound arrival in samples.
    freq_hz : ndarray, shape (n_freqs,)
        Log grid.
    windowed_db : ndarray, shape (n_freqs,)
        The frequency-dependent-windowed, smoothed level of ``ir`` in dB.
    modal_detail : bool
        Take the modal range's detail from the long window as well
        (:data:`MODAL_DETAIL_HZ`).

    Returns
    -------
    level_db : ndarray, shape (n_freqs,)
        ``windowed_db`` minus its 1-octave power trend plus the 1-octave
        power trend of the :data:`LONG_WINDOW_S` window; with
        ``modal_detail``, below :data:`MODAL_DETAIL_HZ` the
        :data:`MODAL_WINDOW_S` window's level smoothed like ``windowed_db``
        (:func:`roomcorr.analysis.smoothing.variable_width_oct`).
    """
    f = np.asarray(freq_hz, dtype=float)
    long_power = fdw_power(ir, fs, onset, f, min_s=LONG_WINDOW_S, max_s=LONG_WINDOW_S)
    long_db = 10 * np.log10(np.maximum(long_power, 1e-30))
    level_db = windowed_db + _trend_db(f, long_db) - _trend_db(f, windowed_db)
    if MODAL_DETAIL_HZ is None or not modal_detail:
        return level_db
    if MODAL_WINDOW_S != LONG_WINDOW_S:
        long_power = fdw_power(ir, fs, onset, f, min_s=MODAL_WINDOW_S, max_s=MODAL_WINDOW_S)
    ppo = points_per_octave_of(f)
    modal_power = smooth_log_grid(long_power, ppo, variable_width_oct(f))
    modal_db = 10 * np.log10(np.maximum(modal_power, 1e-30))
    lo_hz, hi_hz = MODAL_DETAIL_HZ
    t = np.clip(np.log2(f / lo_hz) / np.log2(hi_hz / lo_hz), 0.0, 1.0)
    w = 0.5 + 0.5 * np.cos(np.pi * t)
    return w * modal_db + (1.0 - w) * level_db


def steady_balance_set(
    irs: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    windowed_db: np.ndarray,
    arrival_s: np.ndarray,
    modal_detail: bool = True,
) -> np.ndarray:
    """:func:`steady_balance_db` for a whole set.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
    windowed_db : ndarray, shape (n_positions, n_channels, n_freqs)
    arrival_s : ndarray, shape (n_positions, n_channels)
    modal_detail : bool
        See :func:`steady_balance_db`.

    Returns
    -------
    level_db : ndarray, shape (n_positions, n_channels, n_freqs)
    """
    out = np.empty_like(windowed_db)
    for p in range(irs.shape[0]):
        for c in range(irs.shape[1]):
            out[p, c] = steady_balance_db(
                irs[p, c], fs, arrival_s[p, c] * fs, freq_hz, windowed_db[p, c], modal_detail
            )
    return out
