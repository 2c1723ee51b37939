"""Benchmark: fitting 10 biquads to one channel, roomcorr vs a plain scipy least-squares fit.

Both get the same correction curve (an invented room: five low-frequency modes,
a boundary dip, a gentle treble rise, clipped to +4/-15 dB like the FIR path)
and the same bounds, in the same run:

* roomcorr: :func:`roomcorr.design.realise.iir_fit.fit_sections` (greedy placement,
  analytic Jacobian, joint bounded refinement, boost and float32 penalties);
* baseline: ``scipy.optimize.least_squares`` (trf, finite-difference Jacobian)
  from a naive start: 10 peaking sections log-spaced over the band at 0 dB, Q 1.

Printed: best-of-N seconds, time ratio (ours / baseline; goal < 1 and ours
under 1 s absolute) and the in-band RMS / max error in dB of each result. Also
the full per-channel design at three sample rates (fit + cramping refit +
float32 proof), in seconds.

Run: ``/work/venv/bin/python -m benchmarks.bench_iir`` from the repository root.
"""

from __future__ import annotations

import numpy as np

from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise import iir_fit as fit
from roomcorr.grid import log_grid

try:
    from benchmarks._util import best_of, print_table
except ImportError:  # run from inside benchmarks/
    from _util import best_of, print_table

BAND = (25.0, 16000.0)
REPEAT = 3


def invented_correction(freq_hz: np.ndarray) -> np.ndarray:
    """Correction curve of an invented room (deterministic), +4/-15 dB limited."""
    room = bq.analog_response_db(
        [
            bq.Section("peaking", 38.0, 9.0, 7.0),
            bq.Section("peaking", 57.0, 6.0, 9.0),
            bq.Section("peaking", 76.0, 7.5, 6.0),
            bq.Section("peaking", 112.0, 4.0, 5.0),
            bq.Section("peaking", 163.0, 3.0, 8.0),
            bq.Section("peaking", 240.0, -7.0, 2.5),   # boundary dip
            bq.Section("highshelf", 4000.0, 2.0, 0.5),
            bq.Section("peaking", 1800.0, 1.5, 1.2),
        ],
        freq_hz,
    )
    corr = np.clip(-room, -15.0, 4.0)
    fade = (freq_hz >= BAND[0]) & (freq_hz <= BAND[1])
    return np.where(fade, corr, 0.0)


def baseline_fit(freq_hz, target_db, lim: fit.FitLimits) -> list[bq.Section]:
    """Plain bounded least squares from a naive start, finite-difference Jacobian."""
    from scipy.optimize import least_squares

    m = (freq_hz >= BAND[0]) & (freq_hz <= BAND[1])
    f, t = freq_hz[m], target_db[m]
    n = lim.n_sections
    kinds = np.zeros(n, dtype=int)
    f0 = np.geomspace(BAND[0] * 1.5, BAND[1] / 1.5, n)
    x0 = np.column_stack([np.log2(f0), np.zeros(n), np.zeros(n)]).ravel()
    lo, hi = fit._bounds(kinds, lim)

    def resid(x):
        xx = x.reshape(-1, 3)
        h = bq.analog_responses_from_arrays(kinds, 2 ** xx[:, 0], xx[:, 1], 2 ** xx[:, 2], f)
        return h.sum(axis=0) - t

    res = least_squares(resid, fit._clip(x0, lo, hi), bounds=(lo, hi), method="trf")
    return fit._sections(kinds, res.x)


def errors(freq_hz, target_db, secs) -> tuple[float, float]:
    m = (freq_hz >= BAND[0]) & (freq_hz <= BAND[1])
    d = bq.analog_response_db(secs, freq_hz[m]) - target_db[m]
    return float(np.sqrt(np.mean(d**2))), float(np.max(np.abs(d)))


def main() -> None:
    freq = log_grid()
    target = invented_correction(freq)
    lim = fit.FitLimits(n_sections=10, fs_max=96000.0)
    w = np.ones_like(freq)
    ours: list = []
    base: list = []
    t_ours = best_of(lambda: ours.append(fit.fit_sections(freq, target, w, BAND, lim)), REPEAT)
    t_base = best_of(lambda: base.append(baseline_fit(freq, target, lim)), 1)  # slow
    e_ours = errors(freq, target, ours[-1])
    e_base = errors(freq, target, base[-1])
    t_full = best_of(
        lambda: fit.design_iir_curves(freq, [(0, "left", target, np.zeros_like(freq), BAND)],
                                      (44100, 48000, 96000), lim),
        1,
    )
    print_table(
        "Fit 10 biquads to one channel (same curve, same bounds, same run)",
        ["method", "seconds", "ratio vs baseline", "RMS err dB", "max err dB"],
        [
            ["roomcorr fit_sections", f"{t_ours:.3f}", f"{t_ours / t_base:.2f}",
             f"{e_ours[0]:.3f}", f"{e_ours[1]:.3f}"],
            ["scipy least_squares, naive start", f"{t_base:.3f}", "1.00",
             f"{e_base[0]:.3f}", f"{e_base[1]:.3f}"],
        ],
    )
    print(f"full design (fit + 3 rates, cramping refit, float32 proof): {t_full:.3f} s")


if __name__ == "__main__":
    main()
