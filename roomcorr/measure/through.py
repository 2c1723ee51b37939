"""Playing the sweeps through a design's own filters (``roomcorr measure --through``).

Before anything is loaded into a player, the sweeps are convolved in software
with the design's FIR filter of each loudspeaker (pre-gain included, as
exported) so the measurement shows the corrected room. When filtering would
raise the playback's peak above the sweep's own level, the whole playback is
scaled down to it (never louder than asked) and the impulse responses are
scaled back, so they are ``room * filter``.

Loading the design and comparing the result with its prediction are the
application layer's (:mod:`roomcorr.app.through`): they read a design folder
and use the analysis stage, which the measuring stage must not import.
"""

from __future__ import annotations

import numpy as np
import scipy.signal


def filter_rows(
    rows: np.ndarray, outs: list[int], outputs: tuple[int, ...], firs: np.ndarray, level_dbfs: float
) -> tuple[np.ndarray, float]:
    """Convolve each playback row with the filter of its loudspeaker; cap the peak.

    Parameters
    ----------
    rows : ndarray, shape (n_rows, n)
    outs : list[int]
        Output channel of each row.
    outputs : tuple[int, ...]
        Loudspeaker outputs in the design's channel order.
    firs : ndarray, shape (n_channels, n_taps)
    level_dbfs : float
        The sweep's peak level: the filtered playback never exceeds it.

    Returns
    -------
    filtered : ndarray, shape (n_rows, n)
    scale : float
        Factor applied after filtering (1 or less); divide the responses by it.
    """
    out = np.array(
        [
            scipy.signal.fftconvolve(r, firs[outputs.index(o)])[: rows.shape[1]]
            for r, o in zip(rows, outs, strict=True)
        ]
    )
    cap = 10 ** (level_dbfs / 20)
    peak = float(np.max(np.abs(out))) if out.size else 0.0
    scale = min(1.0, cap / peak) if peak > 0 else 1.0
    return out * scale, scale
