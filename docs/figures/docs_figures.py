"""Sphinx extension: draws the documentation's pictures at build time.

At ``builder-inited`` it writes into ``docs/_generated/`` (not in git):

- ``setup.png`` and ``positions.png``: plan views of the measurement set-up and of
  the microphone positions around a seat, drawn by :mod:`plan_views`;
- ``report/*.png``: the report's main figures, made by running ``roomcorr demo``
  on the bundled demo measurements (so they always show what the code draws today).

Pages include them with ``![text](/_generated/setup.png)``.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

import plan_views

REPORT_FIGURES = ("left-room.png", "left-result.png", "left-filter.png", "left-ringing.png",
                  "left-decay.png", "left-time.png")


def report_figures(root: Path, out_dir: Path) -> None:
    """Run ``roomcorr demo`` in a temporary folder and copy the report's main figures.

    Parameters
    ----------
    root : Path
        The repository's top folder (holds ``roomcorr/`` and ``measurements_demo/``).
    out_dir : Path
        Where the PNG files go.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ, PYTHONPATH=str(root) + os.pathsep + os.environ.get("PYTHONPATH", ""),
               MPLBACKEND="Agg")
    with tempfile.TemporaryDirectory() as tmp:
        done = subprocess.run([sys.executable, "-m", "roomcorr", "demo"], cwd=tmp, env=env,
                              capture_output=True, text=True, timeout=300)
        if done.returncode != 0:
            raise RuntimeError(f"roomcorr demo failed while drawing the docs' figures:\n"
                               f"{done.stdout}\n{done.stderr}")
        made = Path(tmp) / "roomcorr-demo" / "report"
        for name in REPORT_FIGURES:
            if not (made / name).is_file():
                raise RuntimeError(f"the demo report no longer draws {name}; update "
                                   f"docs/figures/docs_figures.py and the pages that show it")
            shutil.copyfile(made / name, out_dir / name)


def _build(app: Any) -> None:
    docs = Path(app.srcdir)
    out = docs / "_generated"
    out.mkdir(exist_ok=True)
    plan_views.draw_setup(out / "setup.png")
    plan_views.draw_positions(out / "positions.png")
    report_figures(docs.parent, out / "report")


def setup(app: Any) -> dict[str, Any]:
    app.connect("builder-inited", _build)
    return {"version": "1", "parallel_read_safe": True, "parallel_write_safe": True}
