"""Benchmark: octave-band decay times with our band filters vs pyfar's filter bank.

The decay curve and the regression are pyrato's in both rows; only the band filter
differs: ours (:func:`roomcorr.analysis.decay.band_sos`, 3rd-order Butterworth prototype)
or :func:`pyfar.dsp.filter.fractional_octave_bands` (its default order). Input: seeded
Gaussian noise decaying exponentially with T = 0.3 s and 0.6 s (60 dB of energy per T),
80 dB above a white floor, 2 s at 48 kHz, five seeds each. Printed per octave: the mean
absolute error of T30 and EDT against T (the decay is single-slope, so every range sees T,
ISO 3382-1), and the time ratio of the filtering (pyfar / ours).

Run: ``python benchmarks/bench_decay.py``
"""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import pyfar as pf  # noqa: E402
from _util import best_of, print_table  # noqa: E402
from scipy.signal import sosfilt  # noqa: E402

from roomcorr.analysis import decay  # noqa: E402

FS = 48000
SEEDS = range(5)


def _response(t60_s: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(2 * FS) / FS
    return rng.standard_normal(t.size) * 10 ** (-3 * t / t60_s) + 1e-4 * rng.standard_normal(t.size)


def main() -> None:
    warnings.simplefilter("ignore")
    centres = decay.octave_band_centres(63, 8000)
    for t60 in (0.3, 0.6):
        err = {k: np.zeros((2, len(centres))) for k in ("ours", "pyfar")}
        t_ours = t_pf = 0.0
        for seed in SEEDS:
            h = _response(t60, seed)
            t_ours += best_of(lambda h=h: [sosfilt(decay.band_sos(fc, FS), h) for fc in centres], 1)
            t_pf += best_of(lambda h=h: pf.dsp.filter.fractional_octave_bands(
                pf.Signal(h, FS), 1, frequency_range=(63, 8000)), 1)
            ours = [sosfilt(decay.band_sos(fc, FS), h) for fc in centres]
            bank = pf.dsp.filter.fractional_octave_bands(
                pf.Signal(h, FS), 1, frequency_range=(63, 8000)).time.reshape(len(centres), -1)
            for name, bands in (("ours", ours), ("pyfar", bank)):
                for k, fc in enumerate(centres):
                    v = decay.decay_parameters(decay.schroeder_decay(bands[k], FS, centre_hz=fc))[0]
                    err[name][0, k] += abs(v["t30"] / t60 - 1) * 100 / len(SEEDS)
                    err[name][1, k] += abs(v["edt"] / t60 - 1) * 100 / len(SEEDS)
        rows = [
            [decay.nominal_label(fc), f"{err['ours'][0, k]:.1f}", f"{err['pyfar'][0, k]:.1f}",
             f"{err['ours'][1, k]:.1f}", f"{err['pyfar'][1, k]:.1f}"]
            for k, fc in enumerate(centres)
        ]
        print_table(
            f"T = {t60} s: mean |error| in % over {len(SEEDS)} seeds; filtering time ratio "
            f"pyfar / ours = {t_pf / t_ours:.1f}",
            ["band", "T30 ours", "T30 pyfar bank", "EDT ours", "EDT pyfar bank"], rows,
        )
        print()


if __name__ == "__main__":
    main()
