"""Benchmark: minimum phase of a 2**18-tap response, roomcorr vs pyfar (and scipy).

All methods get the same input in the same run. Printed: best-of-N time, the
time ratio against ``pyfar.dsp.minimum_phase`` (goal: ours <= 1) and the
magnitude error in dB against the input, measured on a dense grid (twice the
8x FFT) over the bins within 60 dB of the peak, and on the input's own
n-point DFT bins (pyfar first gives the input a linear phase, which keeps the
magnitude only at those bins, so it is judged there too).

Run: ``/work/venv/bin/python -m benchmarks.bench_minphase`` from the repository root.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np

FS = 48000
N_TAPS = 1 << 18
REPEAT = 3


def invented_room_response(n: int = N_TAPS, fs: int = FS) -> np.ndarray:
    """Synthesised response of an invented 40 m^3 room (seeded, deterministic).

    Direct sound after 2.5 ms, a few damped low modes, an exponentially
    decaying diffuse tail (T60 0.4 s) and a noise floor about 90 dB down.
    """
    rng = np.random.default_rng(2026)
    t = np.arange(n) / fs
    delay = int(0.0025 * fs)
    h = np.zeros(n)
    h[delay] = 1.0
    tt = t[: n - delay]
    for f0, t60 in ((34.0, 0.6), (51.0, 0.5), (68.0, 0.5), (86.0, 0.45)):
        h[delay:] += 0.03 * np.exp(-6.9 * tt / t60) * np.sin(2 * np.pi * f0 * tt)
    h[delay:] += 0.05 * rng.standard_normal(n - delay) * np.exp(-6.9 * tt / 0.4)
    h += 10 ** (-90 / 20) * rng.standard_normal(n)
    return h


def best_time(fn: Callable[[], np.ndarray], repeat: int = REPEAT) -> tuple[float, np.ndarray]:
    """Return the best wall time of ``repeat`` calls and the last result."""
    best = np.inf
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def magnitude_errors_db(h_test: np.ndarray, h_ref: np.ndarray, n_fft: int) -> tuple[float, ...]:
    """Return (max, 99th percentile, median) |dB error| within 60 dB of the peak."""
    ref = np.abs(np.fft.rfft(h_ref, n_fft))
    got = np.abs(np.fft.rfft(h_test, n_fft))
    counted = ref >= np.max(ref) * 1e-3
    err = np.abs(20 * np.log10(got[counted] / ref[counted]))
    return float(np.max(err)), float(np.percentile(err, 99)), float(np.median(err))


def main() -> None:
    import pyfar
    import scipy.signal

    from roomcorr.design.phase.minphase import fft_length, minimum_phase

    h = invented_room_response()
    n_fft = fft_length(h.size, 8)
    dense = 2 * n_fft
    signal = pyfar.Signal(h, FS)

    rows = [
        ("roomcorr minimum_phase (8x)", lambda: minimum_phase(h)),
        ("roomcorr minimum_phase (32x)", lambda: minimum_phase(h, 32)),
        (
            "pyfar.dsp.minimum_phase (8x)",
            lambda: pyfar.dsp.minimum_phase(signal, n_fft=n_fft, truncate=False).time[0],
        ),
        (
            "scipy minimum_phase half=False (8x)",
            lambda: scipy.signal.minimum_phase(h, method="homomorphic", half=False, n_fft=n_fft),
        ),
    ]
    results = []
    for name, fn in rows:
        t, out = best_time(fn)
        errors = magnitude_errors_db(out, h, dense) + magnitude_errors_db(out, h, h.size)[:1]
        results.append((name, t, errors))
    t_pyfar = results[2][1]

    print(f"minimum phase of a {h.size}-tap response at {FS} Hz, best of {REPEAT}")
    print(f"magnitude error vs input on {dense // 2 + 1} bins within 60 dB of the peak;")
    print(f"last column: max error on the input's own {h.size}-point DFT bins only")
    head = (
        f"{'method':38s} {'time s':>8s} {'/pyfar':>7s} {'max dB':>9s} {'p99 dB':>9s}"
        f" {'med dB':>9s} {'max@n dB':>9s}"
    )
    print(head)
    print("-" * len(head))
    for name, t, (e_max, e_99, e_med, e_n) in results:
        print(
            f"{name:38s} {t:8.3f} {t / t_pyfar:7.2f} {e_max:9.4f} {e_99:9.1e}"
            f" {e_med:9.1e} {e_n:9.4f}"
        )


if __name__ == "__main__":
    main()
