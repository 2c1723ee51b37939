"""Integrated loudness (ITU-R BS.1770) and the gain that matches two renderings of one piece.

A louder version of the same music is usually preferred, even by about 1 dB
(common practice), so listening through a design is compared with the
uncorrected path lowered to the same integrated loudness.

References
----------
.. [1] ITU-R BS.1770-4, "Algorithms to measure audio programme loudness and
       true-peak audio level", 2015 (K-weighting, 400 ms blocks, gating).
       Implemented by pyloudnorm (``pyloudnorm.Meter``).
"""

from __future__ import annotations

import math

import numpy as np
import pyloudnorm

#: BS.1770 needs at least one 400 ms gating block.
MIN_SECONDS = 0.4


def integrated_lufs(x: np.ndarray, fs: int) -> float:
    """Integrated loudness in LUFS of ``x``, shape (n_channels, n_samples).

    Every channel is weighted 1 (the BS.1770 weights of left, right and centre;
    up to three channels, the LFE-free layouts this project plays). Returns
    ``-inf`` for silence (every block below the absolute gate).
    """
    x = np.atleast_2d(np.asarray(x, dtype=np.float64))
    if x.shape[1] < MIN_SECONDS * fs:
        raise ValueError(f"loudness needs at least {MIN_SECONDS} s of audio")
    meter = pyloudnorm.Meter(fs)  # BS.1770-4 K-weighting and gating
    data = x.T if x.shape[0] > 1 else x[0]
    if x.shape[0] > 3:  # pyloudnorm weights channels 4 and 5 as surrounds (1.41)
        return _unweighted(meter, x)
    return float(meter.integrated_loudness(data))


def _unweighted(meter: pyloudnorm.Meter, x: np.ndarray) -> float:
    """Loudness with every channel weighted 1: the power sum of three-channel groups."""
    total = 0.0
    for k in range(0, x.shape[0], 3):
        part = x[k : k + 3]
        lufs = meter.integrated_loudness(part.T if part.shape[0] > 1 else part[0])
        if math.isfinite(lufs):
            total += 10 ** (lufs / 10)
    return 10 * math.log10(total) if total > 0 else -math.inf


def matching_gain_db(corrected: np.ndarray, uncorrected: np.ndarray, fs: int) -> float:
    """Gain in dB that brings ``uncorrected`` to the integrated loudness of ``corrected``.

    Both are (n_channels, n_samples) renderings of the same music. Usually
    negative: the correction's pre-gain makes the corrected version quieter.
    """
    a = integrated_lufs(corrected, fs)
    b = integrated_lufs(uncorrected, fs)
    if not (math.isfinite(a) and math.isfinite(b)):
        return 0.0
    return a - b
