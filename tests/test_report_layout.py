"""Every figure of the report keeps its text inside the figure (nothing clipped).

Check: matplotlib's own tight bounding box of each figure (``Figure.get_tightbbox``, which
spans every drawn text: titles, axis labels, tick labels, legends) lies within the figure's
area, and no axis label is longer than its axes (a rotated label longer than the plot spills
over its neighbours or the edge). Source of the check: matplotlib's layout model (the same
box ``savefig(bbox_inches="tight")`` would crop to).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_report import _record, _synthetic_room

from roomcorr.report import figures as fg
from roomcorr.report import html as rh
from roomcorr.report.quality import quality_from_record
from roomcorr.report.sources import read_iir

REPO = Path(__file__).resolve().parent.parent
FS = 48000
TOL_IN = 0.02  # inches: anti-aliasing, not a clipped glyph


def overflow(fig) -> list[str]:
    """What of ``fig`` lies outside it: a list of descriptions (empty when everything fits)."""
    renderer = fig.canvas.get_renderer()
    out = []
    w, h = fig.get_size_inches()
    bb = fig.get_tightbbox(renderer)  # inches
    if bb.x0 < -TOL_IN or bb.y0 < -TOL_IN or bb.x1 > w + TOL_IN or bb.y1 > h + TOL_IN:
        out.append(f"tight box {bb.x0:.2f},{bb.y0:.2f}..{bb.x1:.2f},{bb.y1:.2f} in {w}x{h}")
    for ax in fig.axes:
        if not ax.get_visible():
            continue
        box = ax.get_window_extent(renderer)
        for label, span in ((ax.yaxis.label, box.height), (ax.xaxis.label, box.width)):
            if label.get_text() and label.get_visible():
                ext = label.get_window_extent(renderer)
                length = ext.height if label is ax.yaxis.label else ext.width
                if length > span:
                    out.append(f"label {label.get_text()!r} is longer than its axes")
    return out


@pytest.fixture(scope="module")
def checked_figures(tmp_path_factory):
    """Every figure the report draws for a stereo mixed-phase biquad design with quality data."""
    from roomcorr.deliver.export import load_design_curves, write_design
    from roomcorr.deliver.export_iir import write_iir
    from roomcorr.design.realise.iir_fit import design_iir
    from roomcorr.pipeline import run_design
    from roomcorr.settings import DesignSettings, Settings

    base = tmp_path_factory.mktemp("layout")
    irs = np.concatenate([_synthetic_room(n_pos=3), _synthetic_room(n_pos=3, seed=9)], axis=1)
    settings = Settings(design=DesignSettings(sample_rates=(48000,), iir=True, phase="mixed"),
                        measure={})
    result = run_design(irs, FS, settings)
    write_design(result, base / "out")
    write_iir(design_iir(result), base / "out")
    curves = load_design_curves(base / "out")
    seen: list[tuple[str, list[str]]] = []
    real = fg.png_bytes

    def check(fig, dpi=90):
        labels = [ax.get_ylabel() or ax.get_title() for ax in fig.axes]
        title = fig._suptitle.get_text() if fig._suptitle is not None else "; ".join(labels)
        seen.append((title, overflow(fig)))
        return real(fig, dpi=40)

    mp = pytest.MonkeyPatch()
    mp.setattr(fg, "png_bytes", check)
    try:
        quality = quality_from_record(_record(3))
        rh.build_report(curves, None, quality, iir=read_iir(base / "out"))
    finally:
        mp.undo()
    return seen


def test_every_report_figure_keeps_its_text_inside(checked_figures):
    assert len(checked_figures) >= 10  # every section drew (2 channels x sections, quality)
    bad = [(t, o) for t, o in checked_figures if o]
    assert not bad, bad


def test_the_check_sees_a_clipped_label():
    # the check itself fails on a label that leaves the figure (a test that cannot fail is none)
    fig = fg.new_figure(3.0, 2.0)
    ax = fig.subplots()
    ax.set_ylabel("a far too long label for so small a plot (dB re something)")
    assert overflow(fig)
    fig2 = fg.new_figure(6.0, 4.4)
    ax2 = fig2.subplots()
    ax2.set_ylabel("level (dB)")
    ax2.set_xlabel("frequency (Hz)")
    assert not overflow(fig2)


def test_comparison_figure_keeps_its_text_inside(monkeypatch):
    # the comparison figure of two demo measurements (the second a little quieter)
    from roomcorr.app.compare import compare_measurements
    from roomcorr.report import compare as rc

    wavs = sorted((REPO / "measurements_demo").glob("*.wav"))
    res = compare_measurements([str(p) for p in wavs], [str(p) for p in wavs], with_curves=True)
    seen = []
    real = rc.png_bytes

    def check(fig, dpi=90):
        seen.append(overflow(fig))
        return real(fig, dpi=40)

    monkeypatch.setattr(rc, "png_bytes", check)
    rc.comparison_png(res)
    assert seen == [[]]
