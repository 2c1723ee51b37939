"""Soak test for files: kill ``design --replace`` and ``report`` many times, check every time.

Run: ``python benchmarks/soak_files.py [N] [SEED]`` (default 40 kills, seed 13). Not run
by ``run_all.py`` (it is a long robustness run, not a speed figure). Each round
starts the command as a subprocess, sends SIGKILL or SIGINT after a random
(seeded) delay, then checks that the design folder holds exactly the files its
manifest lists with matching SHA-256 (the old design or the new one, never a
mixture) and that nothing outside it changed apart from a staging folder the
next run removes. Prints how many rounds were cut short and how many failed.
"""

from __future__ import annotations

import hashlib
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "measurements_demo"
TEMP = (".roomcorr-tmp-", ".roomcorr-old-")


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _whole(d: Path) -> bool:
    from roomcorr.deliver.export import design_differences

    return not design_differences(d)


def _outside(root: Path, d: Path) -> dict[str, str]:
    return {
        p.relative_to(root).as_posix(): _sha(p)
        for p in root.rglob("*")
        if p.is_file() and d not in p.parents and not p.relative_to(root).parts[0].startswith(TEMP)
    }


def _cmd(*args: object) -> list[str]:
    return [sys.executable, "-m", "roomcorr", *map(str, args)]


def main(n: int = 40, seed: int = 13) -> None:
    sys.path.insert(0, str(REPO))  # the same roomcorr as the commands below
    env = dict(os.environ, PYTHONPATH=str(REPO), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    rng = random.Random(seed)
    with tempfile.TemporaryDirectory(prefix="roomcorr-soak-") as tmp:
        root = Path(tmp)
        d = root / "d"
        half = root / "half"  # a second input: every other design differs from the last
        half.mkdir()
        for p in sorted(DEMO.glob("*.wav"))[:2]:
            shutil.copy(p, half / p.name)
        subprocess.run(
            _cmd("design", DEMO, "--out", d, "--rates", "48000"),
            env=env,
            check=True,
            capture_output=True,
        )
        outside = _outside(root, d)
        cut = failed = 0
        for i in range(n):
            if i % 3 == 2:
                args = _cmd("report", d)
            else:
                args = _cmd(
                    "design", half if i % 2 else DEMO, "--out", d, "--replace", "--rates", "48000"
                )
            proc = subprocess.Popen(
                args, env=env, cwd=root, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
            )
            try:
                proc.wait(timeout=rng.uniform(0.3, 4.0))
            except subprocess.TimeoutExpired:
                proc.send_signal(signal.SIGKILL if rng.random() < 0.5 else signal.SIGINT)
                cut += 1
            proc.wait()
            ok = _whole(d) and _outside(root, d) == outside
            failed += not ok
            print(
                f"round {i + 1:3d}: {'cut' if proc.returncode else 'done'} "
                f"({' '.join(args[3:5])}) -> {'whole' if ok else 'DAMAGED'}",
                flush=True,
            )
        final = subprocess.run(
            _cmd("design", DEMO, "--out", d, "--replace", "--rates", "48000"),
            env=env,
            cwd=root,
            capture_output=True,
        )
        left = [p.name for p in root.iterdir() if p.name.startswith(TEMP)]
        print(
            f"{n} rounds, {cut} cut short, {failed} left damage; final run exit "
            f"{final.returncode}, temporary folders left after it: {len(left)}"
        )


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:3]))
