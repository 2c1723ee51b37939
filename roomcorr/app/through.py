"""Measuring through a design's filters: loading the design, checking the result.

:func:`load_through` reads a design folder's FIR filters for the measurement's
sample rate (the measuring stage plays the sweeps through them,
:func:`roomcorr.measure.through.filter_rows`). :func:`through_check` compares
what was measured with what the design predicted at each position (its
measured response times its filter), both smoothed to 1/6 octave, and lists
where they differ by more than 1 dB; :func:`through_summary` is that check as
stored in ``measurement.json`` and said to the user.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from pathlib import Path

import numpy as np
import scipy.signal
import soundfile as sf

from roomcorr.analysis.smoothing import smooth_bins_to_grid
from roomcorr.deliver.export import load_design_curves
from roomcorr.errors import InputFileError, OutputError
from roomcorr.grid import log_grid
from roomcorr.measure.session import make_sweep
from roomcorr.measure.settings import MeasureSettings

#: Measured-through and predicted responses further apart than this are reported.
DIFF_LIMIT_DB = 1.0
CHECK_SMOOTHING_OCT = 1.0 / 6.0


def load_through(design_dir: str | Path, fs: int, n_outputs: int) -> dict:
    """The design's filters at ``fs``: ``{"dir", "firs" (n_channels, n_taps), "pre_gain_db",
    "irs" (n_positions, n_channels, n), "fs_in"}``; errors name the folder and what to do."""
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


def through_summary(
    ms: MeasureSettings, out: Path, record: dict, thru: dict, say: Callable[[str], None]
) -> dict:
    """Compare measured-through with the design's prediction; say where they differ.

    Returns the ``through.check`` entry of ``measurement.json``.
    """

    saved = [p for p in record["positions"] if p.get("file")]
    measured = np.array([sf.read(str(out / p["file"]), always_2d=True)[0].T for p in saved])
    if thru["fs_in"] != ms.sample_rate:
        say(f"through check skipped: the design was made from {thru['fs_in']} Hz measurements")
        return {"skipped": "different sample rate"}
    # from where the sweep is past its fade-in (full level) to below its end
    sw = make_sweep(ms)
    f_faded = sw.f_start_hz * math.exp(sw.fade_in_s / sw.rate_s)
    band = (
        max(ms.f_start_hz * 1.5, f_faded * 1.5, 20.0),
        min(ms.f_end_hz / 1.2, 0.45 * ms.sample_rate),
    )
    res = through_check(measured, thru["irs"], thru["firs"], ms.sample_rate, band)
    summary = {
        "positions": [p["position"] for p in saved],
        "band_hz": list(band),
        "limit_db": res["limit_db"],
        "smoothing_oct": res["smoothing_oct"],
        "max_diff_db": np.round(res["max_diff_db"], 2).tolist(),
        "over_limit_hz": res["over_limit"],
        "freq_hz": np.round(res["freq_hz"], 2).tolist(),
        "measured_db": np.round(res["measured_db"], 2).tolist(),
        "predicted_db": np.round(res["predicted_db"], 2).tolist(),
    }
    for i, p in enumerate(saved):
        for c, spk in enumerate(ms.outputs):
            ranges = res["over_limit"][i][c]
            where = ", ".join(f"{lo:g}-{hi:g} Hz" for lo, hi in ranges[:4]) or "nowhere"
            say(
                f"through check, position {p['position']}, output {spk}: measured vs "
                f"predicted differ by more than {res['limit_db']:g} dB: {where}"
            )
    return summary
