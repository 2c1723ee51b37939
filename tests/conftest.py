"""Shared test fixtures."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

#: The repository root (tests read the bundled demo measurements from it).
REPO = Path(__file__).resolve().parent.parent


def synthetic_ir(
    fs: int = 48000,
    n: int = 24000,
    delay_s: float = 0.004,
    modes: tuple[tuple[float, float, float], ...] = ((55.0, 0.6, 0.25), (120.0, -0.4, 0.3)),
    reflections: tuple[tuple[float, float], ...] = ((0.0031, 0.45), (0.0072, 0.3)),
    noise_db: float = -90.0,
    seed: int = 1,
) -> np.ndarray:
    """A small room-like impulse response: direct sound, reflections, decaying modes."""
    rng = np.random.default_rng(seed)
    h = np.zeros(n)
    d = int(round(delay_s * fs))
    h[d] = 1.0
    for dt, g in reflections:
        h[d + int(round(dt * fs))] += g
    t = np.arange(n - d) / fs
    for f0, amp, t60 in modes:
        h[d:] += amp * 0.05 * np.sin(2 * np.pi * f0 * t) * 10 ** (-3 * t / t60)
    h += rng.standard_normal(n) * 10 ** (noise_db / 20)
    return h


@pytest.fixture
def ir_set() -> tuple[np.ndarray, int]:
    """Three positions x two channels of synthetic impulse responses at 48 kHz."""
    fs = 48000
    irs = np.stack(
        [
            np.stack(
                [
                    synthetic_ir(
                        fs,
                        delay_s=0.004 + 0.0003 * p,
                        seed=10 * p + c,
                        reflections=((0.0031 + 0.0004 * p, 0.45), (0.0072, 0.3 - 0.05 * c)),
                    )
                    for c in range(2)
                ]
            )
            for p in range(3)
        ]
    )
    return irs * 0.5, fs
