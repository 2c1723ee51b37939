"""Benchmark: ``roomcorr apply`` on long files (speed and memory) against scipy in the same run.

A stereo design at three rates (44.1, 48 and 96 kHz), 65,536 taps, designed
from an invented two-loudspeaker room (tests/speaker_rooms.py). Music is the
synthetic tune of tests/music_synth.py, written to a 48 kHz float WAV block by
block (it never sits in memory whole).

Printed:

* speed: seconds of computing per second of audio for ``apply`` on one hour
  (goal below 1/20 of real time on a 2-core laptop) and on a shorter file;
* CPU time (user + system) of that process, which other load on the machine does
  not inflate as it does the wall time;
* memory: peak resident set size (``ru_maxrss``) of a fresh process running
  ``apply`` on the short and on the long file: it must not grow with the length;
* ratios against ``scipy.signal.oaconvolve`` and ``scipy.signal.fftconvolve``
  through the same routes on 60 s held in memory (no file reading or writing;
  ``apply`` renders once, and again only when the result must be lowered).

Run: ``python benchmarks/bench_playback.py [--minutes 60]`` from the repository root.
Needs about 1.4 GB of free disk per hour of input, twice (input and output).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

from _util import print_table  # noqa: E402
from music_synth import synth_music  # noqa: E402
from scipy.signal import fftconvolve, oaconvolve  # noqa: E402

RATES = (44100, 48000, 96000)
TAPS = 65536
FS = 48000


def make_design(folder: Path) -> Path:
    from speaker_rooms import Room, seats, simulate

    from roomcorr.deliver.export import write_design
    from roomcorr.pipeline import run_design
    from roomcorr.settings import Settings, design_from_dict

    room = Room(speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0)], kinds=["main", "main"],
                gains_db=[0.0, -1.0], mics_m=seats((3.1, 2.05, 1.1), 3))  # fmt: skip
    irs = simulate(room, length_s=0.6)
    settings = Settings(design=design_from_dict(
        {"channel_names": ["left", "right"], "sample_rates": list(RATES), "taps": TAPS}
    ))  # fmt: skip
    out = folder / "design"
    write_design(run_design(irs, 48000, settings), out)
    return out


def write_music(path: Path, seconds: float) -> None:
    """``seconds`` of the synthetic tune, written 10 s at a time (a repeating loop)."""
    import soundfile as sf

    loop = synth_music(FS, 10.0, rms_dbfs=-20.0).T.astype(np.float32)
    n = int(seconds * FS)
    container = "RF64" if seconds > 3 * 3600 else "WAV"
    with sf.SoundFile(str(path), "w", FS, 2, "FLOAT", format=container) as f:
        done = 0
        while done < n:
            k = min(loop.shape[0], n - done)
            f.write(loop[:k])
            done += k


_CHILD = """
import json, resource, sys, time
sys.path.insert(0, {root!r})
from roomcorr.playback.render import apply_file
t0 = time.perf_counter()
r = apply_file({src!r}, {design!r}, {dst!r})
dt = time.perf_counter() - t0
ru = resource.getrusage(resource.RUSAGE_SELF)
cpu = ru.ru_utime + ru.ru_stime
print(json.dumps({{"seconds": dt, "cpu": cpu, "rss": ru.ru_maxrss * 1024, "peak": r.peak_dbfs}}))
"""


def run_apply(src: Path, design: Path, dst: Path) -> dict:
    code = _CHILD.format(root=str(ROOT), src=str(src), design=str(design), dst=str(dst))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def reference_speed(design: Path, seconds: float = 60.0) -> dict[str, float]:
    """Seconds of computing per second of audio for scipy through the same routes."""
    from roomcorr.deliver.plan import load_route_plan

    plan = load_route_plan(design, FS)
    x = synth_music(FS, seconds, rms_dbfs=-20.0)
    out = {}
    for name, fn in (("oaconvolve", oaconvolve), ("fftconvolve", fftconvolve)):
        t0 = time.perf_counter()
        for o in range(plan.n_outputs):
            fn(plan.mix[o] @ x, plan.filters[o])
        out[name] = (time.perf_counter() - t0) / seconds
    return out


def main(minutes: float = 60.0) -> None:
    with tempfile.TemporaryDirectory(prefix="bench-playback-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        design = make_design(folder)
        print(f"design: 3 rates x {TAPS} taps, stereo, in {time.perf_counter() - t0:.0f} s")
        ref = reference_speed(design)
        rows = []
        for m in (minutes / 10, minutes):
            src, dst = folder / "music.wav", folder / "out.wav"
            write_music(src, m * 60)
            res = run_apply(src, design, dst)
            per_s = res["seconds"] / (m * 60)
            rows.append([
                f"{m:g} min", f"{res['seconds']:.1f}", f"1/{1 / per_s:.0f}",
                f"{res['cpu']:.1f}",
                f"{res['rss'] / 2**20:.0f}", f"{per_s / ref['oaconvolve']:.2f}",
                f"{per_s / ref['fftconvolve']:.2f}", f"{res['peak']:+.1f}",
            ])  # fmt: skip
            src.unlink()
            dst.unlink()
        print_table(
            f"apply, stereo {FS} Hz through {TAPS} taps (goal: below 1/20 of real time; "
            "memory not growing with length)",
            ["length", "time (s)", "of real time", "CPU (s)", "peak RSS (MiB)", "x oaconvolve",
             "x fftconvolve", "peak (dBFS)"],
            rows,
        )  # fmt: skip
        print(
            "x oaconvolve / x fftconvolve: apply's wall time per second of audio (reading, "
            "rendering, writing) over scipy's (60 s in memory), same run. CPU (s): user + "
            "system time of the apply process (two FFT threads); on a shared machine the wall "
            "time also holds waiting for the CPU."
        )


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=60.0)
    main(ap.parse_args().minutes)
