"""Measuring through a design's own filters (``roomcorr measure --through DESIGN``).

Before anything is loaded into a player, the sweeps are convolved in software
with the design's FIR filter of each loudspeaker (pre-gain included, as
exported) so the measurement shows the corrected room. When filtering would
raise the playback's peak above the sweep's own level, the whole playback is
scaled down to it (never louder than asked) and the impulse responses are
scaled back, so they are ``room * filter``.

:func:`through_check` compares what was measured with what the design
predicted at each position (its measured response times its filter), both
smoothed to 1/6 octave, and lists where they differ by more than 1 dB.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import scipy.signal

from roomcorr.analysis.smoothing import smooth_bins_to_grid
from roomcorr.errors import InputFileError
from roomcorr.grid import log_grid

#: Measured-through and predicted responses further apart than this are reported.
DIFF_LIMIT_DB = 1.0
CHECK_SMOOTHING_OCT = 1.0 / 6.0


def load_through(design_dir: str | Path, fs: int, n_outputs: int) -> dict:
    """The design's filters at ``fs``: ``{"dir", "firs" (n_channels, n_taps), "pre_gain_db",
    "irs" (n_positions, n_channels, n), "fs_in"}``; errors name the folder and what to do."""
    from roomcorr.deliver.export import load_design_curves
    from roomcorr.errors import OutputError

    d = Path(design_dir)
    try:
        curves = load_design_curves(d)
    except OutputError as exc:
        raise InputFileError(f"--through {d}: not a design folder ({exc})") from None
    if fs not in curves["firs"]:
        rates = ", ".join(str(r) for r in sorted(curves["firs"]))
        raise InputFileError(
            f"--through {d}: no filters at {fs} Hz (it has {rates}); measure at one of "
            "those rates (--rate) or design with --rates including it"
        )
    firs = np.asarray(curves["firs"][fs], dtype=float)
    if firs.shape[0] != n_outputs:
        raise InputFileError(
            f"--through {d}: the design has {firs.shape[0]} channel(s) but --outputs lists "
            f"{n_outputs} loudspeaker(s); give them in the design's order"
        )
    return {
        "dir": str(d),
        "firs": firs,
        "pre_gain_db": curves["pre_gain_db"],
        "irs": curves["irs"],
        "fs_in": curves["fs_in"],
    }


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


def _smoothed_db(ir: np.ndarray, fs: int, grid: np.ndarray, n_fft: int) -> np.ndarray:
    power = np.abs(np.fft.rfft(ir, n_fft)) ** 2
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    return 10 * np.log10(
        np.maximum(smooth_bins_to_grid(power, f, grid, CHECK_SMOOTHING_OCT), 1e-30)
    )


def through_check(
    measured: np.ndarray,
    design_irs: np.ndarray,
    firs: np.ndarray,
    fs: int,
    band_hz: tuple[float, float],
) -> dict:
    """Measured-through against predicted, per position and channel, 1/6-octave smoothed.

    Parameters
    ----------
    measured : ndarray, shape (n_positions, n_channels, n)
        Responses measured through the filters.
    design_irs : ndarray, shape (n_design_positions, n_channels, m)
        The responses the design was made from; position ``p`` is compared with
        the design's position ``p`` (or its last one when fewer).
    firs : ndarray, shape (n_channels, n_taps)
    band_hz : (lo, hi)
        Band compared.

    Returns
    -------
    dict
        ``freq_hz`` (grid), ``measured_db`` and ``predicted_db`` (n_positions,
        n_channels, n_freqs), ``max_diff_db`` per position and channel, and
        ``over_limit``: for each position and channel the frequency ranges
        ``[lo_hz, hi_hz]`` where the two differ by more than 1 dB.
    """
    grid = log_grid(band_hz[0], band_hz[1], 24)
    n = max(measured.shape[-1], design_irs.shape[-1] + firs.shape[-1])
    n_fft = 1 << int(np.ceil(np.log2(2 * n)))
    meas_db = np.zeros(measured.shape[:2] + (len(grid),))
    pred_db = np.zeros_like(meas_db)
    over: list[list[list[list[float]]]] = []
    max_diff = np.zeros(measured.shape[:2])
    for p in range(measured.shape[0]):
        dp = min(p, design_irs.shape[0] - 1)
        over.append([])
        for c in range(measured.shape[1]):
            meas_db[p, c] = _smoothed_db(measured[p, c], fs, grid, n_fft)
            pred = scipy.signal.fftconvolve(design_irs[dp, c], firs[c])
            pred_db[p, c] = _smoothed_db(pred, fs, grid, n_fft)
            diff = meas_db[p, c] - pred_db[p, c]
            max_diff[p, c] = float(np.max(np.abs(diff)))
            over[p].append(_ranges(grid, np.abs(diff) > DIFF_LIMIT_DB))
    return {
        "freq_hz": grid,
        "measured_db": meas_db,
        "predicted_db": pred_db,
        "max_diff_db": max_diff,
        "over_limit": over,
        "limit_db": DIFF_LIMIT_DB,
        "smoothing_oct": CHECK_SMOOTHING_OCT,
    }


def _ranges(freq_hz: np.ndarray, mask: np.ndarray) -> list[list[float]]:
    """Contiguous runs of ``mask`` as ``[lo_hz, hi_hz]`` pairs."""
    out = []
    i = 0
    while i < len(mask):
        if mask[i]:
            j = i
            while j + 1 < len(mask) and mask[j + 1]:
                j += 1
            out.append([round(float(freq_hz[i]), 1), round(float(freq_hz[j]), 1)])
            i = j + 1
        else:
            i += 1
    return out
