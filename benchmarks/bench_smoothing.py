"""Benchmark: 1/6-octave smoothing of a 2^18-bin power spectrum, ours vs pyfar.

Both run in the same process on the same input: the power spectrum of an
invented room response (direct sound, a few damped low-frequency modes and a
seeded, exponentially decaying diffuse tail, 0.34 s long at 48 kHz), zero-padded
to 2^19 samples. Printed: time ratio (pyfar / ours; goal >= 20), peak memory,
and the largest level difference in dB where the two definitions match (pyfar
given the power as its spectrum, our width set to the width pyfar actually
used, pyfar's log axis k + 1, bins whose window reaches past Nyquist left
out), plus the same with our default true-frequency axis from bin 100 up.

Run: ``python benchmarks/bench_smoothing.py``
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _util import best_of, peak_memory, print_table  # noqa: E402

from roomcorr.analysis.smoothing import (  # noqa: E402
    smooth_bins_to_grid,
    smooth_fractional_octave,
)
from roomcorr.grid import log_grid  # noqa: E402

FS = 48000
N_FFT = 2**19  # 2^18 + 1 rfft bins
FRACTION = 6
REPEAT = 3


def invented_room_power(n_fft: int = N_FFT, fs: int = FS, seed: int = 2026) -> np.ndarray:
    """Power spectrum of a synthetic room response, shape (n_fft // 2 + 1,)."""
    rng = np.random.default_rng(seed)
    n = int(0.34 * fs)
    t = np.arange(n) / fs
    ir = 0.05 * rng.standard_normal(n) * np.exp(-t / 0.06)  # diffuse tail, T60 ~ 0.4 s
    ir[int(0.004 * fs)] += 1.0  # direct sound after 4 ms
    for f_mode, tau_s, amp in ((38.0, 0.30, 0.02), (57.0, 0.25, 0.015), (81.0, 0.2, 0.01)):
        ir += amp * np.sin(2 * np.pi * f_mode * t) * np.exp(-t / tau_s)
    return np.abs(np.fft.rfft(ir, n_fft)) ** 2


def main() -> None:
    import pyfar as pf

    power = invented_room_power()
    n_bins = power.size
    k = np.arange(n_bins)
    sig = pf.Signal(power, FS, n_samples=N_FFT, domain="freq")

    def run_pyfar():
        return pf.dsp.smooth_fractional_octave(sig, FRACTION)

    ref_sig, (_, actual) = run_pyfar()
    ref = np.real(ref_sig.freq_raw[0])
    freq_hz = k * FS / N_FFT

    def run_ours():
        return smooth_fractional_octave(power, FRACTION, freq_hz)

    grid = log_grid()

    def run_grid():
        return smooth_bins_to_grid(power, freq_hz, grid, 1.0 / FRACTION)

    t_pyfar = best_of(run_pyfar, REPEAT)
    t_ours = best_of(run_ours, REPEAT)
    t_grid = best_of(run_grid, REPEAT)
    mem_pyfar, _ = peak_memory(run_pyfar)
    mem_ours, _ = peak_memory(run_ours)
    mem_grid, _ = peak_memory(run_grid)

    inside = (k + 1) * 2 ** (0.5 / actual) < n_bins
    matched = smooth_fractional_octave(power, actual, k + 1.0)
    err_matched = np.abs(10 * np.log10(matched[inside] / ref[inside])).max()
    true_axis = smooth_fractional_octave(power, actual, freq_hz)
    upper = inside & (k >= 100)
    err_true = np.abs(10 * np.log10(true_axis[upper] / ref[upper])).max()
    edge = ~inside
    err_edge = np.abs(10 * np.log10(matched[edge] / ref[edge])).max()

    mb = 1024.0**2
    rows = [
        ["pyfar smooth_fractional_octave", "1.0", f"{mem_pyfar / mb:.0f}", "-"],
        [
            "roomcorr smooth_fractional_octave",
            f"{t_pyfar / t_ours:.1f}",
            f"{mem_ours / mb:.0f}",
            f"{err_matched:.3f} (matched), {err_true:.3f} (true axis, bin>=100)",
        ],
        [
            f"roomcorr smooth_bins_to_grid ({grid.size} pts)",
            f"{t_pyfar / t_grid:.1f}",
            f"{mem_grid / mb:.0f}",
            "-",
        ],
    ]
    print_table(
        f"1/{FRACTION}-octave smoothing, {n_bins} bins (pyfar width used: 1/{actual:.3f} oct)",
        ["method", "speed vs pyfar (x)", "peak MiB", "max |diff| vs pyfar, dB"],
        rows,
    )
    print(
        f"goal speed >= 20x: {'met' if t_pyfar / t_ours >= 20 else 'NOT met'}; "
        f"top edge (window past Nyquist, definitions differ): max |diff| {err_edge:.2f} dB"
    )


if __name__ == "__main__":
    main()
