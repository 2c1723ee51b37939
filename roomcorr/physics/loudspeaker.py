"""Analog models of a loudspeaker's own response and of simple filters.

References
----------
.. [1] R. H. Small, "Closed-box loudspeaker systems, part I: analysis", JAES 20(10),
       1972, and "Vented-box loudspeaker systems, part I", JAES 21(5), 1973
       (2nd- and 4th-order high-pass responses of loudspeakers in boxes).
.. [2] S. H. Linkwitz, "Active crossover networks for noncoincident drivers",
       JAES 24(1), 1976.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def shelf(freq_hz: np.ndarray, f_lo: float, f_hi: float) -> np.ndarray:
    """First-order shelf (1 + s/w_hi) / (1 + s/w_lo): gain f_lo/f_hi above f_hi (min-phase)."""
    s = 2j * np.pi * freq_hz
    return (1.0 + s / (2 * np.pi * f_hi)) / (1.0 + s / (2 * np.pi * f_lo))


def highpass_response(freq_hz: np.ndarray, corner_hz: float, q: Sequence[float]) -> np.ndarray:
    """A loudspeaker's low-frequency roll-off: one 2nd-order high-pass section per Q.

    One Q is a closed box (2nd order), two a vented box (4th order) [1]_.

    Parameters
    ----------
    freq_hz : ndarray
    corner_hz : float
    q : sequence of float

    Returns
    -------
    ndarray, complex, like ``freq_hz``
    """
    s = 2j * np.pi * np.asarray(freq_hz, dtype=float)
    wc = 2.0 * np.pi * corner_hz
    resp = np.ones(s.shape, dtype=complex)
    for qi in q:
        resp *= s**2 / (s**2 + s * wc / qi + wc**2)
    return resp


def speaker_response(freq_hz: np.ndarray, p: dict) -> np.ndarray:
    """Analog model of one loudspeaker on the given frequencies (complex, causal).

    ``p`` holds ``gain_db``, ``hp_hz`` and ``hp_q`` (the high-pass), ``bump``
    (f, gain dB, Q of a crossover peak), ``lp_hz`` (2nd-order treble roll-off),
    ``tilt_hz`` and ``tilt_db`` (a gentle downward tilt between two corners).
    """
    s = 2j * np.pi * freq_hz
    resp = np.full(freq_hz.shape, 10.0 ** (p["gain_db"] / 20.0), dtype=complex)
    wc = 2.0 * np.pi * p["hp_hz"]
    for q in p["hp_q"]:  # the high-pass as 2nd-order sections (as highpass_response)
        resp *= s**2 / (s**2 + s * wc / q + wc**2)
    f0, gain_db, q = p["bump"]
    w0, a = 2.0 * np.pi * f0, 10.0 ** (gain_db / 40.0)
    resp *= (s**2 + s * a * w0 / q + w0**2) / (s**2 + s * w0 / (a * q) + w0**2)
    wl = 2.0 * np.pi * p["lp_hz"]
    resp *= wl**2 / (s**2 + s * wl / 0.6 + wl**2)
    # Tilt: four first-order shelves spaced evenly in log frequency between the
    # corners, each dropping a quarter of tilt_db.
    f_lo, f_hi = p["tilt_hz"]
    step = 10.0 ** (p["tilt_db"] / 4.0 / 20.0)
    for f_pole in np.geomspace(f_lo, f_hi, 4):
        resp *= shelf(freq_hz, f_pole, f_pole / step)
    return resp


def linkwitz_riley4(freq_hz: np.ndarray, fc_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """4th-order Linkwitz-Riley low-pass and high-pass (their sum is an all-pass) [2]_."""
    s = 2j * np.pi * freq_hz / (2.0 * np.pi * fc_hz)
    d = s**2 + np.sqrt(2.0) * s + 1.0
    return 1.0 / d**2, s**4 / d**2


def wall_shelf(freq_hz: np.ndarray) -> np.ndarray:
    """Treble loss of one reflection: about −1.5 dB above ~6 kHz (first-order shelf)."""
    return shelf(freq_hz, 6000.0, 6000.0 * 10.0 ** (1.5 / 20.0))
