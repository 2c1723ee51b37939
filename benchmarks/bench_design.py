"""Whole-process figures: `roomcorr design` on the demo, and `roomcorr --help` start-up.

Ratios are against reference processes measured in the same run:
``python -c "import numpy, scipy.signal"`` (the least any numpy/scipy tool
must pay to start) for the design, and a bare ``python -c pass`` for --help.
Run: ``python benchmarks/bench_design.py``.
"""

from __future__ import annotations

import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def _time_process(args: list[str], repeat: int = 3) -> tuple[float, float]:
    """Best wall time (s) and the peak resident memory (MiB) of the children."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        subprocess.run(args, check=True, capture_output=True, cwd=REPO)
        best = min(best, time.perf_counter() - t0)
    peak_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return best, peak_kib / 1024


def main() -> None:
    py = sys.executable
    with tempfile.TemporaryDirectory() as tmp:
        base_t, _ = _time_process([py, "-c", "import numpy, scipy.signal"])
        design = [py, "-m", "roomcorr", "design", str(REPO / "measurements_demo"),
                  "--out", str(Path(tmp) / "o"), "--replace"]
        design_t, design_mem = _time_process(design)
    bare_t, _ = _time_process([py, "-c", "pass"], repeat=5)
    help_t, _ = _time_process([py, "-m", "roomcorr", "--help"], repeat=5)
    print("benchmark                                  ours       reference    ratio")
    print(f"design on demo (3 rates, 2 ch)          {design_t:7.2f} s   {base_t:7.2f} s"
          f"   {design_t / base_t:6.1f}x  (reference: python importing numpy+scipy.signal)")
    print(f"peak memory of the design process       {design_mem:7.0f} MiB")
    print(f"roomcorr --help start-up                {help_t:7.3f} s   {bare_t:7.3f} s"
          f"   {help_t / bare_t:6.1f}x  (reference: bare python; goal: under 0.3 s)")


if __name__ == "__main__":
    main()
