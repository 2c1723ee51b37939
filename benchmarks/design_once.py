"""One design in a process of its own, timed as a command-line design pays it.

``python benchmarks/design_once.py IRS.npy SETTINGS_JSON`` loads the impulse responses
(shape (n_positions, n_channels, n_samples), 48 kHz), runs
:func:`roomcorr.pipeline.run_design` once with the design settings given as JSON (the
keys of the settings file's ``design`` table) and prints one JSON line: the wall clock
of the design alone (imports and loading excluded), its processor time (this process and
the child processes that ended during it) and the minor page faults this process took
meanwhile.

The process imports only numpy and roomcorr before the timed call, as ``roomcorr
design`` does, so its memory is that of a command-line run: nothing freed by earlier
designs waits to be reused (``benchmarks/bench_subwoofers.py timing`` explains why that
matters).
"""

from __future__ import annotations

import json
import os
import sys
import time

import numpy as np

from roomcorr.pipeline import run_design
from roomcorr.settings import Settings, design_from_dict

FS = 48000


def minor_faults() -> int:
    """Minor page faults of this process so far (-1 where ``resource`` is missing:
    Windows)."""
    try:
        import resource
    except ImportError:
        return -1
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt


def timed_design(irs: np.ndarray, spec: dict) -> tuple[float, float, int]:
    """(wall clock, processor time of this process and the children that ended meanwhile,
    minor page faults) of :func:`roomcorr.pipeline.run_design` on ``irs`` (48 kHz) with
    the design settings ``spec``."""
    settings = Settings(design=design_from_dict(spec))
    before, faults = os.times(), minor_faults()
    t = time.perf_counter()
    run_design(irs, FS, settings)
    wall = time.perf_counter() - t
    after = os.times()
    cpu = sum(
        getattr(after, k) - getattr(before, k)
        for k in ("user", "system", "children_user", "children_system")
    )
    return wall, cpu, minor_faults() - faults


def main(argv: list[str]) -> None:
    wall, cpu, faults = timed_design(np.load(argv[0]), json.loads(argv[1]))
    print(json.dumps({"wall_s": wall, "cpu_s": cpu, "minor_faults": faults}))


if __name__ == "__main__":
    main(sys.argv[1:])
