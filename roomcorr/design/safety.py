"""Safety rules applied to every filter before export.

* One common pre-gain for all channels and rates, so the channel balance
  stays: chosen so that no filter's peak gain exceeds the ceiling (0 dB
  unless the user explicitly allows gain). Peak gain is evaluated over the
  whole band the filter passes, from DC to Nyquist (:data:`PEAK_BAND`), not
  only over the audible band: gain at 15 Hz costs driver excursion and gain
  at 22 kHz can clip a DAC as surely as gain at 1 kHz. If every filter
  already sits below the ceiling, no make-up gain is added.
* Worst-case gain, ``20 log10 sum |h|``, is reported for every filter: the
  largest output a full-scale input of any waveform could produce.
* A filter whose boost (gain above the pre-gain, anywhere from DC to
  Nyquist) exceeds the boost cap by more than ``BOOST_TOLERANCE_DB`` is
  refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from roomcorr.design.fir import peak_gain_db, worst_case_gain_db
from roomcorr.errors import SafetyError

#: Allowed excess of a synthesised filter over the boost cap (FIR ripple), dB.
BOOST_TOLERANCE_DB = 0.3
#: Allowed excess over the ceiling after the pre-gain (rounding), dB.
CEILING_TOLERANCE_DB = 0.01

#: Where peak gain and boost are evaluated (stated in the manifest and the report).
PEAK_BAND = "DC to Nyquist"

CAUTIONS = (
    "Caution: start playback quietly and raise the volume slowly; protect your hearing.",
    "Boosted bass costs driver excursion and amplifier headroom: respect your loudspeakers' "
    "limits and follow local regulations on noise exposure.",
)


@dataclass
class FilterStats:
    """Safety figures of one exported filter."""

    channel: int
    fs: int
    n_taps: int
    peak_gain_db: float
    worst_case_gain_db: float
    max_boost_db: float


def full_band_peak_gain_db(h: np.ndarray, fs: float) -> float:
    """Largest gain in dB of FIR ``h`` anywhere from DC to Nyquist (:data:`PEAK_BAND`).

    :func:`roomcorr.design.fir.peak_gain_db` over ``0 .. fs/2``: every bin of
    a zero-padded FFT (at least 8x the filter length), DC and Nyquist included,
    refined around the highest maxima by a chirp-z zoom.
    """
    return peak_gain_db(h, fs, 0.0, fs / 2.0)


def common_pre_gain_db(peaks_db: list[float], ceiling_db: float) -> float:
    """Pre-gain (dB, never positive) that brings the highest peak down to the ceiling.

    Returns 0 when every peak is already at or below the ceiling: no make-up
    gain is ever added.
    """
    return min(0.0, ceiling_db - max(peaks_db))


def apply_safety(
    firs: dict[int, np.ndarray], ceiling_db: float, max_boost_db: float
) -> tuple[dict[int, np.ndarray], float, list[FilterStats]]:
    """Apply a common pre-gain, verify the limits and collect the figures.

    Parameters
    ----------
    firs : dict of int to ndarray, shape (n_channels, n_taps)
        Filters per sample rate, before pre-gain.
    ceiling_db, max_boost_db : float

    Returns
    -------
    firs_out, pre_gain_db, stats

    Raises
    ------
    SafetyError
        If a filter would break the boost cap or the ceiling.
    """
    if not (np.isfinite(ceiling_db) and np.isfinite(max_boost_db)):
        raise SafetyError(  # settings are checked before this; never trust NaN here either
            f"ceiling {ceiling_db} dB / boost cap {max_boost_db} dB: not finite numbers"
        )
    peaks = {
        (fs, ch): full_band_peak_gain_db(h[ch], fs)
        for fs, h in firs.items()
        for ch in range(h.shape[0])
    }
    pre = common_pre_gain_db(list(peaks.values()), ceiling_db)
    scale = 10 ** (pre / 20)
    out: dict[int, np.ndarray] = {}
    stats: list[FilterStats] = []
    for fs, h in firs.items():
        hs = h * scale
        out[fs] = hs
        for ch in range(h.shape[0]):
            peak = peaks[(fs, ch)] + pre
            boost = peaks[(fs, ch)]
            if not boost <= max_boost_db + BOOST_TOLERANCE_DB:  # NaN fails too
                raise SafetyError(
                    f"channel {ch + 1} at {fs} Hz would boost {boost:.1f} dB, above the "
                    f"{max_boost_db:g} dB cap; nothing was written"
                )
            if not peak <= ceiling_db + CEILING_TOLERANCE_DB:
                raise SafetyError(
                    f"channel {ch + 1} at {fs} Hz peaks at {peak:+.2f} dB, above the "
                    f"{ceiling_db:+g} dB ceiling; nothing was written"
                )
            stats.append(
                FilterStats(
                    channel=ch,
                    fs=fs,
                    n_taps=int(h.shape[1]),
                    peak_gain_db=float(peak),
                    worst_case_gain_db=float(worst_case_gain_db(hs[ch])),
                    max_boost_db=float(max(boost, 0.0)),
                )
            )
    return out, pre, stats
