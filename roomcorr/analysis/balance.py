"""Broad balance from the steady state, fine detail from the frequency-dependent window.

The frequency-dependent window (:mod:`roomcorr.analysis.window`) keeps 15
cycles of each frequency: hundreds of milliseconds in the bass, a few
milliseconds in the treble. In the bass that is the room's steady state; in
the midrange and treble it keeps the direct sound and early reflections and
leaves out more and more of the reverberant field as the frequency rises.
The windowed response therefore falls, relative to what a listener hears in
the room, by several dB across the midrange (about 4 dB from 300 Hz to 2 kHz
in a damped room, 8 dB in a live one), a bend that is not in the room: a
correction designed on it lifts the treble and leaves a hump where the
window shortens.

:func:`steady_balance_db` keeps the windowed response's detail (everything
narrower than :data:`BALANCE_OCT`) and replaces the shape of its broad trend
above the modal range by that of a long, fixed window (:data:`LONG_WINDOW_S`),
anchored at :data:`BLEND_FROM_HZ` and blended in over the octave above it.
Below, the windowed response is kept as it is: its windows are long there,
and the bass keeps the relation to the low midrange it has in the
windowed view.
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
#: The steady-state trend is blended in over the octave above this frequency, Hz.
BLEND_FROM_HZ = 300.0


def _trend_db(freq_hz: np.ndarray, level_db: np.ndarray) -> np.ndarray:
    ppo = points_per_octave_of(freq_hz)
    return 10 * np.log10(
        np.maximum(smooth_log_grid(10 ** (level_db / 10), ppo, BALANCE_OCT), 1e-30)
    )


def steady_balance_db(
    ir: np.ndarray, fs: int, onset: float, freq_hz: np.ndarray, windowed_db: np.ndarray
) -> np.ndarray:
    """Windowed level with its broad trend taken from the steady state above the modal range.

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
    """
    f = np.asarray(freq_hz, dtype=float)
    long_power = fdw_power(ir, fs, onset, f, min_s=LONG_WINDOW_S, max_s=LONG_WINDOW_S)
    long_db = 10 * np.log10(np.maximum(long_power, 1e-30))
    shift = _trend_db(f, long_db) - _trend_db(f, windowed_db)
    # Anchored where the blend starts: the bass keeps its relation to the
    # low midrange as the windowed response has it; only the bend above
    # changes.
    shift = shift - float(np.interp(np.log2(BLEND_FROM_HZ), np.log2(f), shift))
    t = np.clip(np.log2(np.maximum(f, 1e-9) / BLEND_FROM_HZ), 0.0, 1.0)
    weight = 0.5 - 0.5 * np.cos(np.pi * t)
    return windowed_db + weight * shift


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
