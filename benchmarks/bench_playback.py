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

Then ``listen`` for 60 s through a JACK server (dummy driver, 48 kHz, 256-sample
periods, started here under its own name) at a 256-sample block, with
tests/jack_recorder.py as the output device: the buffers PortAudio reports lost
(goal: none on an idle machine) and the recording against the offline rendering
(a lost buffer shows as a large error). Skipped without jackd or JACK-Client.

Run: ``python benchmarks/bench_playback.py [--minutes 60] [--listen-only]`` from the
repository root. Needs about 1.4 GB of free disk per hour of input, twice (input
and output).
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


_PLAYER = """
import json, sys
sys.path.insert(0, {root!r})
from roomcorr.app.playback import prepare_listening
from roomcorr.playback.device import play
paths, music, fig = prepare_listening({music!r}, {design!r}, level_db=-6.0, block=256)
status = play(paths, music, "rc_bench_rec")
print(json.dumps({{"underflows": status.underflows, "blocks": status.blocks}}))
"""


def listen_dropouts(folder: Path, seconds: float = 60.0, taps: int = TAPS) -> list[str] | None:
    """``listen``'s real-time path for ``seconds`` through a dummy-driver JACK server.

    Returns the table row (None when skipped).
    """
    import os
    import shutil

    import soundfile as sf

    if shutil.which("jackd") is None:
        print("listen: skipped (jackd not installed)")
        return None
    from speaker_rooms import Room, seats, simulate

    from roomcorr.deliver.export import write_design
    from roomcorr.pipeline import run_design
    from roomcorr.playback.render import apply_file
    from roomcorr.settings import Settings, design_from_dict

    room = Room(speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0)], kinds=["main", "main"],
                gains_db=[0.0, -1.0], mics_m=seats((3.1, 2.05, 1.1), 3))  # fmt: skip
    settings = Settings(design=design_from_dict(
        {"channel_names": ["left", "right"], "sample_rates": [FS], "taps": taps}
    ))  # fmt: skip
    design = folder / f"listen-design-{taps}"
    write_design(run_design(simulate(room, length_s=0.6), FS, settings), design)
    music = folder / "listen.wav"
    write_music(music, seconds)
    name = f"rc_bench_{os.getpid()}"
    env = dict(os.environ, JACK_DEFAULT_SERVER=name)
    jackd = subprocess.Popen(
        ["jackd", "-n", name, "--no-realtime", "-d", "dummy", "-r", str(FS), "-p", "256"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
    )  # fmt: skip
    try:
        time.sleep(2.0)
        rec = subprocess.Popen(
            [sys.executable, str(ROOT / "tests" / "jack_recorder.py"), "rc_bench_rec", "2",
             str(folder / "rec.npy")],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env,
        )  # fmt: skip
        if rec.stdout.readline().strip() != "READY":
            print("listen: skipped (the JACK recorder did not start)")
            return None
        code = _PLAYER.format(root=str(ROOT), music=str(music), design=str(design))
        r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                           env=env, timeout=seconds * 4 + 60)  # fmt: skip
        rec.stdin.close()
        rec.wait(60)
    finally:
        jackd.terminate()
        jackd.wait(10)
    if r.returncode != 0:
        print(f"listen: failed ({r.stderr.strip().splitlines()[-1:]})")
        return None
    res = json.loads(r.stdout.strip().splitlines()[-1])
    y = np.load(folder / "rec.npy").astype(np.float64)
    apply_file(music, design, folder / "ref.wav", subtype="DOUBLE")
    ref = 10 ** (-6 / 20) * sf.read(folder / "ref.wav", always_2d=True)[0].T
    ref = ref[:, : int(seconds * FS)]
    c = np.abs(np.fft.irfft(np.fft.rfft(y[0], 2 * y.shape[1]) * np.conj(
        np.fft.rfft(ref[0], 2 * y.shape[1]))))  # fmt: skip
    lag = int(np.argmax(c[: y.shape[1]]))
    seg = y[:, lag : lag + ref.shape[1]]
    n = seg.shape[1]
    err = 20 * np.log10(np.linalg.norm(seg - ref[:, :n]) / np.linalg.norm(ref[:, :n]))
    return [str(taps), str(res["blocks"]), str(res["underflows"]), f"{n / FS:.1f}", f"{err:.1f}"]


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=60.0)
    ap.add_argument("--listen-only", action="store_true")
    a = ap.parse_args()
    if not a.listen_only:
        main(a.minutes)
    with tempfile.TemporaryDirectory(prefix="bench-listen-") as tmp:
        import os

        load = os.getloadavg()[0]
        rows = [r for t in (TAPS, 512) if (r := listen_dropouts(Path(tmp), taps=t))]
        if rows:
            print_table(
                "listen, 60 s through JACK (dummy driver, 256-sample periods), block 256, "
                f"load average {load:.1f} on {os.cpu_count()} CPUs (goal: no buffer lost on an "
                "idle machine; the 512-tap row is the same path with short filters, same run)",
                ["taps", "blocks", "buffers lost", "recorded (s)", "error vs offline (dB)"],
                rows,
            )
