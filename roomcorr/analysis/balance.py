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
"""

from __future__ import annotations

import numpy as np

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.analysis.window import fdw_power
from roomcorr.grid import points_per_octave_of

#: Length of the fixed window giving the steady-state trend, s.
LONG_WINDOW_S = 0.5
#: Width of the broad trend that is exchanged, octaves.
BALANCE_OCT = 1.0


def _trend_db(freq_hz: np.ndarray, level_db: np.ndarray) -> np.ndarray:
    ppo = points_per_octave_of(freq_hz)
    power = smooth_log_grid(10 ** (level_db / 10), ppo, BALANCE_OCT)
    return 10 * np.log10(np.maximum(power, 1e-30))


def steady_balance_db(
    ir: np.ndarray, fs: int, onset: float, freq_hz: np.ndarray, windowed_db: np.ndarray
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

    Returns
    -------
    level_db : ndarray, shape (n_freqs,)
        ``windowed_db`` minus its 1-octave power trend plus the 1-octave
        power trend of the :data:`LONG_WINDOW_S` window.
    """
    f = np.asarray(freq_hz, dtype=float)
    long_power = fdw_power(ir, fs, onset, f, min_s=LONG_WINDOW_S, max_s=LONG_WINDOW_S)
    long_db = 10 * np.log10(np.maximum(long_power, 1e-30))
    return windowed_db + _trend_db(f, long_db) - _trend_db(f, windowed_db)


def steady_balance_set(
    irs: np.ndarray, fs: int, freq_hz: np.ndarray, windowed_db: np.ndarray, arrival_s: np.ndarray
) -> np.ndarray:
    """:func:`steady_balance_db` for a whole set.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
    windowed_db : ndarray, shape (n_positions, n_channels, n_freqs)
    arrival_s : ndarray, shape (n_positions, n_channels)

    Returns
    -------
    level_db : ndarray, shape (n_positions, n_channels, n_freqs)
    """
    out = np.empty_like(windowed_db)
    for p in range(irs.shape[0]):
        for c in range(irs.shape[1]):
            out[p, c] = steady_balance_db(
                irs[p, c], fs, arrival_s[p, c] * fs, freq_hz, windowed_db[p, c]
            )
    return out
