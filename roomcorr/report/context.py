"""What every per-channel section of the report reads: the design's caps and
figures, and one channel's curves.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from roomcorr.design.realise.fir import fir_response_db
from roomcorr.report import glance
from roomcorr.report.curves import fir_for, predicted_responses


def _design_caps(settings: dict[str, Any] | None) -> dict[str, Any]:
    d = (settings or {}).get("design", {}) if isinstance(settings, dict) else {}
    return {
        "max_boost_db": d.get("max_boost_db"),
        "max_cut_db": d.get("max_cut_db"),
        "ceiling_db": d.get("ceiling_db", 0.0),
        "allow_gain": d.get("allow_gain", False),
    }


@dataclass
class ReportContext:
    """What every section of one report shares."""

    freq: np.ndarray
    fs: int
    caps: dict[str, Any]
    pre_gain: float
    designed: bool
    png: Any
    iir: dict[str, list[dict[str, Any]]] | None
    ringing_notes: list[str] = field(default_factory=list)
    mixed: dict[str, Any] | None = None  # ``mixed_phase`` of load_design_curves, if any
    target_spec: str | None = None  # the design's --target (preset name or file)
    target_shape: np.ndarray | None = None  # its shape on ``freq``, when it can be read
    #: The manifest's figures block (roomcorr/deliver/figures.py), when there is a manifest.
    figures: dict[str, Any] | None = None


@dataclass
class ReportChannel:
    """One channel's curves and what is computed from them once for all sections."""

    ch: dict[str, Any]
    index: int
    name: str
    tag: str
    band: tuple[float, float] | None
    pos_irs: np.ndarray | None
    fir: np.ndarray | None = None
    rate: int | None = None
    predicted: np.ndarray | None = None
    corrected: np.ndarray | None = None
    how: str = ""


def channel_of(curves: dict[str, Any], ch: dict[str, Any], ctx: ReportContext) -> ReportChannel:
    c = int(ch["index"])
    irs = curves.get("irs")
    x = ReportChannel(
        ch=ch, index=c, name=str(ch["name"]),
        tag=f"{ch['name']} ({len(ch['measured_db'])} positions)",
        band=tuple(ch["band_hz"]) if "band_hz" in ch else None,
        pos_irs=None if irs is None else np.asarray(irs)[:, c],
    )
    if ctx.designed:
        x.fir, x.rate = fir_for(curves, c)
    if x.fir is not None and x.pos_irs is not None:
        if x.rate == ctx.fs:
            x.predicted, x.corrected = predicted_responses(
                x.pos_irs, ctx.fs, x.fir, ctx.freq, ch["measured_db"]
            )
            x.how = "each measured response convolved with the exported filter"
        else:  # no filter at the measurement rate: apply the filter's response

            x.predicted = ch["measured_db"] + fir_response_db(x.fir, x.rate, ctx.freq)[None, :]
            x.how = f"the {x.rate} Hz filter's response added to each measured response"
    return x


def report_context(
    curves: dict[str, Any],
    settings: dict[str, Any] | None = None,
    png: Any = None,
    iir: dict[str, list[dict[str, Any]]] | None = None,
    figures: dict[str, Any] | None = None,
) -> ReportContext:
    """What every section of a report of ``curves`` shares (arguments as :func:`build_report`).

    Each channel's own data is then ``channel_of(curves, ch, ctx)``.
    """
    designed = bool(curves.get("firs")) and all("correction_db" in ch for ch in curves["channels"])
    freq = np.asarray(curves["freq_hz"], dtype=float)
    design = (settings or {}).get("design", {}) if isinstance(settings, dict) else {}
    spec = design.get("target") if isinstance(design, dict) else None
    spec = str(spec) if spec else None
    return ReportContext(
        freq=freq,
        fs=int(curves["fs_in"]),
        caps=_design_caps(settings),
        pre_gain=float(curves.get("pre_gain_db", 0.0)),
        designed=designed,
        png=png,
        iir=iir,
        mixed=curves.get("mixed_phase"),
        target_spec=spec,
        target_shape=glance.target_shape_db(freq, spec),
        figures=figures,
    )
