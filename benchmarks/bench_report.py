"""Report generation for the demo design, against plain matplotlib savefig.

``ours``: :func:`roomcorr.report.html.build_report` + :func:`render_html` on the
demo design (all analysis, every figure, the page), in-process, best of 3.
``reference``: the same number of figures drawn with plain matplotlib (Figure
+ Agg, default layout, no analysis; 4 axes x 8 lines of the grid's length, and
a minimal 2 axes x 1 line) and saved to PNG at the same dpi. The ratio is what
the report costs beyond the bare drawing. The whole command
``roomcorr report DIR`` (start-up, loading, files) is timed as a process too.
Run: ``python benchmarks/bench_report.py``.
"""

from __future__ import annotations

import io
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _util import best_of  # noqa: E402


def _demo_design():
    from roomcorr.audio_io import read_ir_set
    from roomcorr.pipeline import run_design
    from roomcorr.settings import DesignSettings, Settings

    irs, fs, _ = read_ir_set([REPO / "measurements_demo"])
    return run_design(irs, fs, Settings(design=DesignSettings(), measure={}))


def _plain_matplotlib(n_figs: int, n_axes: int, n_lines: int, n_points: int, dpi: int) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    x = np.geomspace(20, 20000, n_points)
    y = np.random.default_rng(0).standard_normal((n_lines, n_points))
    for _ in range(n_figs):
        fig = Figure(figsize=(9, 5))
        FigureCanvasAgg(fig)
        for k in range(n_axes):
            ax = fig.add_subplot(n_axes // 2, 2, k + 1)
            for row in y:
                ax.plot(x, row)
            ax.set_xscale("log")
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi)


def main() -> None:
    from roomcorr.deliver.export import write_design
    from roomcorr.report.html import build_report, render_html
    from roomcorr.report.summary import curves_from_result
    from roomcorr.settings import settings_to_dict

    dpi = 90
    result = _demo_design()
    curves = curves_from_result(result)
    settings = settings_to_dict(result.settings)
    holder = {}

    def ours() -> None:
        holder["r"] = build_report(curves, settings, dpi=dpi)
        render_html(holder["r"])

    ours()  # warm-up: imports, font cache
    t_ours = best_of(ours, repeat=3)
    n_figs = sum(len(s.all_figures()) for s in holder["r"].sections)
    n_points = curves["freq_hz"].size

    def ref() -> None:
        _plain_matplotlib(n_figs, 4, 8, n_points, dpi)

    ref()
    t_ref = best_of(ref, repeat=3)

    def ref_min() -> None:
        _plain_matplotlib(n_figs, 2, 1, n_points, dpi)

    t_min = best_of(ref_min, repeat=3)

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "demo"
        write_design(result, out)
        cmd = [sys.executable, "-m", "roomcorr", "report", str(out)]
        best = float("inf")
        for _ in range(2):
            t0 = time.perf_counter()
            subprocess.run(cmd, check=True, capture_output=True, cwd=REPO)
            best = min(best, time.perf_counter() - t0)
        size_kib = (out / "report.html").stat().st_size / 1024

    print("benchmark                                   ours       reference    ratio")
    print(f"report of the demo ({n_figs} figures, in-process) {t_ours:6.2f} s   {t_ref:6.2f} s"
          f"   {t_ours / t_ref:5.2f}x  (reference: plain matplotlib savefig, {n_figs} figures "
          "x 4 axes x 8 lines)")
    print(f"same, against minimal figures              {t_ours:6.2f} s   {t_min:6.2f} s"
          f"   {t_ours / t_min:5.2f}x  (reference: {n_figs} figures x 2 axes x 1 line)")
    print(f"roomcorr report DIR (whole process)        {best:6.2f} s   (goal: a few seconds)")
    print(f"report.html size                           {size_kib:6.0f} KiB")


if __name__ == "__main__":
    main()
