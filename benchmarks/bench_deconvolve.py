"""Benchmark: deconvolving a 10 s sweep recorded at 96 kHz, with harmonic orders 2..5.

roomcorr (frequency-domain inverse + harmonic split + distortion per order) is
timed against the usual scipy recipe, ``scipy.signal.fftconvolve`` of the
recording with Farina's time-domain inverse filter (time-reversed sweep with a
-6 dB/octave envelope, AES 2000), on the same recording in the same run.
The inverse filter is built once outside the timing for scipy; roomcorr's
cached inverse is timed the same way ("cached") and also rebuilt on every call
("cold"). Printed: best-of-N times, the ratio ours / scipy (goal <= 1; absolute goal:
well under a second on a laptop) and how far the two linear responses differ.

Run: ``python benchmarks/bench_deconvolve.py`` (or ``benchmarks/run_all.py``).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy.signal import fftconvolve

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from _util import best_of  # noqa: E402

from roomcorr.measure.deconvolve import (  # noqa: E402
    band_energy_error_db,
    deconvolve,
    harmonic_distortion,
    inverse_spectrum,
    split_harmonics,
)
from roomcorr.measure.sweep import synchronized_sweep  # noqa: E402

FS = 96000
ORDERS = 5


def recording(sweep, tail_s: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """Invented room (direct sound, reflection, decaying tail) with a mild x^2 term."""
    rng = np.random.default_rng(96)
    n_ir = FS // 2
    h = np.zeros(n_ir)
    h[600] = 0.5
    h[900] = -0.2
    h[600:] += 0.01 * rng.standard_normal(n_ir - 600) * np.exp(-np.arange(n_ir - 600) / 8000)
    x = sweep.signal()
    x = np.r_[x, np.zeros(int(tail_s * FS))]
    y = fftconvolve(x + 0.3 * x**2, h)[: len(x)] + 1e-5 * rng.standard_normal(len(x))
    return y, h


def farina_inverse(sweep) -> np.ndarray:
    """Time-reversed sweep with an exponential envelope (Farina, AES 2000), unit gain at 1 kHz."""
    x = sweep.signal()
    t = np.arange(len(x)) / FS
    inv = x[::-1] * np.exp(-t / sweep.rate_s)
    n = 1 << 20
    resp = np.abs(np.fft.rfft(fftconvolve(x, inv), n))
    f = np.fft.rfftfreq(n, 1 / FS)
    return inv / np.median(resp[(f > 900) & (f < 1100)])


def main() -> None:
    sweep = synchronized_sweep(FS, 20.0, 40000.0, 10.0, -20.0)
    y, _h = recording(sweep)
    n_ir = FS // 2
    inv = farina_inverse(sweep)

    def ours():
        hh = deconvolve(y, sweep)
        split = split_harmonics(hh, sweep, n_ir, ORDERS)
        return hh, harmonic_distortion(split, FS, sweep.f_start_hz, sweep.f_end_hz)

    def ours_analytic():
        hh = deconvolve(y, sweep, method="analytic")
        split = split_harmonics(hh, sweep, n_ir, ORDERS)
        return hh, harmonic_distortion(split, FS, sweep.f_start_hz, sweep.f_end_hz)

    def ours_cold():
        inverse_spectrum.cache_clear()
        return ours()

    def reference():
        full = fftconvolve(y, inv)
        zero = len(inv) - 1  # lag 0 of the linear response
        cuts = [full[zero : zero + n_ir]]
        for k in range(2, ORDERS + 1):
            start = zero + 600 - int(round(sweep.rate_s * np.log(k) * FS)) - 200
            cuts.append(full[start : start + n_ir // 8])
        return full, cuts

    t_cold = best_of(ours_cold, 3)
    t_ours = best_of(ours, 3)
    t_an = best_of(ours_analytic, 3)
    t_ref = best_of(reference, 3)
    hh, _ = ours()
    full, _ = reference()
    lin_ref = full[len(inv) - 1 : len(inv) - 1 + n_ir]
    diff = band_energy_error_db(hh[:n_ir], lin_ref, FS, 100.0, 16000.0)
    print(f"10 s sweep at {FS} Hz, {len(y)} samples, orders 2..{ORDERS}")
    print(f"  roomcorr (division, cached) : {t_ours * 1000:7.1f} ms   ratio {t_ours / t_ref:5.2f}")
    print(f"  roomcorr (division, cold)   : {t_cold * 1000:7.1f} ms   ratio {t_cold / t_ref:5.2f}")
    print(f"  roomcorr (analytic inverse) : {t_an * 1000:7.1f} ms   ratio {t_an / t_ref:5.2f}")
    print(f"  scipy fftconvolve (Farina)  : {t_ref * 1000:7.1f} ms   ratio  1.00")
    print(f"  linear IRs differ by {diff:.1f} dB (energy, 100 Hz-16 kHz)")


if __name__ == "__main__":
    main()
