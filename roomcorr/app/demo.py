"""The demo: design filters for the invented demo room and write its report (``roomcorr demo``)."""

from __future__ import annotations

import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from roomcorr.app.design import design_from_files
from roomcorr.app.report import write_folder_report
from roomcorr.deliver.export import MANIFEST, read_manifest
from roomcorr.demo import write_demo_measurements
from roomcorr.pipeline import DesignResult
from roomcorr.settings import Settings


def demo_measurements(scratch: Path) -> tuple[list[str], str]:
    """The bundled demo folder, or a fresh synthesis of the same room into ``scratch``.

    Returns
    -------
    (list of str, str)
        The impulse-response paths and where they came from, as a phrase.
    """
    for cand in (
        Path.cwd() / "measurements_demo",
        Path(__file__).resolve().parents[2] / "measurements_demo",
    ):
        if cand.is_dir() and any(cand.glob("*.wav")):
            return [str(cand)], f"bundled measurements in {cand}"
    write_demo_measurements(scratch)
    return [str(scratch)], "demo room synthesised afresh (no measurements_demo/ folder here)"


def run_demo(
    out: Path,
    settings: Settings,
    replace: bool = False,
    on_source: Callable[[str], None] | None = None,
    on_start: Callable[[], None] | None = None,
    on_design: Callable[[DesignResult, list[dict[str, Any]]], None] | None = None,
) -> Path:
    """Design the demo room's filters into ``out`` and write the report there.

    An earlier demo output in ``out`` is refreshed without ``replace``; any
    other existing folder is refused as for every design.

    Parameters
    ----------
    out : Path
    settings : Settings
    replace : bool
    on_source : callable, optional
        Called with where the measurements come from, before the design.
    on_start : callable, optional
        As for :func:`roomcorr.app.design.design_from_files`.
    on_design : callable, optional
        Called with the design and the manifest's file entries once written,
        before the report.

    Returns
    -------
    Path
        The ``report.html`` written.
    """
    if (out / MANIFEST).exists() and read_manifest(out).get("demo"):
        replace = True  # the demo may refresh its own earlier output
    with tempfile.TemporaryDirectory(prefix="roomcorr-demo-") as scratch:
        paths, where = demo_measurements(Path(scratch))
        if on_source is not None:
            on_source(where)
        result, entries = design_from_files(
            paths, out, settings, replace, extra={"demo": True}, on_start=on_start
        )
    if on_design is not None:
        on_design(result, entries)
    return write_folder_report(out)
