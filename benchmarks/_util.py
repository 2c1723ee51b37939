"""Shared timing and memory helpers for the benchmarks (not part of the package).

Benchmarks report ratios against reference libraries measured in the same run,
never absolute times, because the machine they run on varies.
"""

from __future__ import annotations

import gc
import time
import tracemalloc
from collections.abc import Callable
from typing import Any


def best_of(fn: Callable[[], Any], repeat: int = 5) -> float:
    """Best wall-clock time of ``repeat`` calls of ``fn()``, in seconds.

    The minimum is the least disturbed by other load on the machine. The
    garbage collector is paused during each call.
    """
    best = float("inf")
    for _ in range(max(1, repeat)):
        gc.collect()
        was_enabled = gc.isenabled()
        gc.disable()
        try:
            t0 = time.perf_counter()
            fn()
            best = min(best, time.perf_counter() - t0)
        finally:
            if was_enabled:
                gc.enable()
    return best


def peak_memory(fn: Callable[[], Any]) -> tuple[int, Any]:
    """Peak memory allocated while running ``fn()`` once, in bytes, and its result.

    Measured with :mod:`tracemalloc`, which sees numpy's array buffers. Memory
    that already existed before the call is not counted.
    """
    gc.collect()
    already = tracemalloc.is_tracing()
    if not already:
        tracemalloc.start()
    tracemalloc.reset_peak()
    base, _ = tracemalloc.get_traced_memory()
    try:
        result = fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        if not already:
            tracemalloc.stop()
    return peak - base, result


def print_table(title: str, header: list[str], rows: list[list[str]]) -> None:
    """Print a plain fixed-width table with a title line."""
    widths = [max(len(str(c)) for c in col) for col in zip(header, *rows, strict=True)]
    line = "  ".join("-" * w for w in widths)
    print(title)
    print("  ".join(str(h).ljust(w) for h, w in zip(header, widths, strict=True)))
    print(line)
    for r in rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)))
