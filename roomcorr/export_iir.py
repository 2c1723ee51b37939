"""Writers for biquad (IIR) output: JSON, CSV and a parameter table per channel and rate.

Layout inside a design output folder::

    DIR/iir/48000/left.json   sections (type, f0, gain, Q), coefficients, pre-gain, fit figures
    DIR/iir/48000/left.csv    coefficients in cascade order, a0 = 1: b0,b1,b2,a1,a2
    DIR/iir/48000/left.txt    human-readable table for devices that take parameters

The first CSV row (``stage 0``, type ``gain``) is the pre-gain as a pure-gain
section (``b0 = 10 ** (pre_gain_db / 20)`` rounded down to float32, all else 0); load every row and
the cascade is complete and safe. Coefficient values are float32-exact and
written with full float64 precision, so devices running either precision use
exactly the values that were checked. Each file gets a manifest entry of kind
``"iir"`` (via :func:`roomcorr.export.add_manifest_entries`). Every file goes
through :mod:`roomcorr.atomic`.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.atomic import atomic_write_text
from roomcorr.design.iir_fit import IirDesign, IirStats
from roomcorr.errors import OutputError

IIR_DIR = "iir"
SAFETY_NOTE = (
    "Start playback quiet and raise the level slowly; protect your hearing; boosts cost "
    "headroom and driver excursion; follow local rules on noise exposure."
)


def pre_gain_linear(pre_gain_db: float) -> float:
    """Float32-exact linear pre-gain, rounded towards zero so it never adds level."""
    exact = 10.0 ** (pre_gain_db / 20.0)
    g = np.float32(exact)
    if float(g) > exact:
        g = np.nextafter(g, np.float32(0.0))
    return float(g)


def _r(v: float | None, nd: int = 3) -> float | None:
    return None if v is None else round(float(v), nd)


def _stat_fields(s: IirStats, pre_gain_db: float) -> dict[str, Any]:
    return {
        "sections": s.n_sections,
        "pre_gain_db": _r(pre_gain_db),
        "peak_gain_db": _r(s.peak_gain_db),
        "cascade_peak_db": _r(s.cascade_peak_db),
        "worst_case_gain_db": _r(s.worst_case_gain_db),
        "max_boost_db": _r(s.max_boost_db),
        "fit_rms_error_db": _r(s.rms_error_db),
        "fit_max_error_db": _r(s.max_error_db),
        "fir_rms_error_db": _r(s.rms_error_fir_db),
        "fir_max_error_db": _r(s.max_error_fir_db),
        "float32_deviation_db": _r(s.float32_deviation_db, 4),
        "max_pole_radius": _r(s.max_pole_radius, 9),
    }


def iir_documents(design: IirDesign) -> dict[str, str]:
    """Render every IIR file as text, keyed by path relative to the design folder."""
    stats = {(s.channel, s.fs): s for s in design.stats}
    pre = design.pre_gain_db
    docs: dict[str, str] = {}
    for ch in design.channels:
        for fs in design.sample_rates:
            secs = ch.sections[fs]
            coeffs = ch.coeffs[fs]
            st = stats[(ch.index, fs)]
            base = f"{IIR_DIR}/{fs}/{ch.name}"
            doc = {
                "format": "roomcorr-iir",
                "format_version": 1,
                "channel": ch.index,
                "channel_name": ch.name,
                "sample_rate": fs,
                "band_hz": list(ch.band_hz),
                "coefficient_order": ["b0", "b1", "b2", "a1", "a2"],
                "normalisation": "a0 = 1; H(z) = (b0 + b1/z + b2/z^2) / (1 + a1/z + a2/z^2)",
                "formulas": "Audio EQ Cookbook (R. Bristow-Johnson, W3C Audio WG Note 2021)",
                "pre_gain_db": pre,
                "pre_gain_linear": pre_gain_linear(pre),
                "sections": [
                    {
                        "type": s.kind,
                        "freq_hz": s.f0_hz,
                        "gain_db": s.gain_db,
                        "q": s.q,
                        "coefficients": [float(v) for v in c],
                    }
                    for s, c in zip(secs, coeffs, strict=True)
                ],
                "figures": _stat_fields(st, pre),
                "safety": SAFETY_NOTE,
            }
            docs[base + ".json"] = json.dumps(doc, indent=2) + "\n"
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(["stage", "type", "b0", "b1", "b2", "a1", "a2"])
            w.writerow([0, "gain", repr(pre_gain_linear(pre)), 0.0, 0.0, 0.0, 0.0])
            for i, (s, c) in enumerate(zip(secs, coeffs, strict=True), start=1):
                w.writerow([i, s.kind, *(repr(float(v)) for v in c)])
            docs[base + ".csv"] = buf.getvalue()
            docs[base + ".txt"] = _table(ch.name, ch.band_hz, fs, secs, st, pre)
    return docs


def _table(name, band_hz, fs, secs, st: IirStats, pre: float) -> str:
    lines = [
        f"roomcorr biquad correction: channel {name}, {fs} Hz, {len(secs)} sections",
        f"Pre-gain: {pre:.2f} dB (one plain gain stage, anywhere in the chain)",
        f"Peak gain {st.peak_gain_db:.2f} dB, worst-case gain (sum |h|) "
        f"{st.worst_case_gain_db:.2f} dB, pre-gain included; largest boost "
        f"{st.max_boost_db:.2f} dB",
        f"Fit in band {band_hz[0]:.0f}-{band_hz[1]:.0f} Hz: RMS {st.rms_error_db:.2f} dB, "
        f"max {st.max_error_db:.2f} dB vs the correction curve",
    ]
    if st.rms_error_fir_db is not None:
        lines.append(
            f"  vs the FIR design: RMS {st.rms_error_fir_db:.2f} dB, "
            f"max {st.max_error_fir_db:.2f} dB"
        )
    lines += [
        "",
        f"{'#':>3}  {'type':<10}{'freq Hz':>10}{'gain dB':>9}{'Q':>8}",
    ]
    for i, s in enumerate(secs, start=1):
        lines.append(f"{i:>3}  {s.kind:<10}{s.f0_hz:>10.2f}{s.gain_db:>9.2f}{s.q:>8.3f}")
    lines += [
        "",
        "Q and frequencies follow the Audio EQ Cookbook: peaking freq is the centre, shelf",
        "freq is the midpoint (half the gain); shelf Q 0.707 is slope S = 1. Parameters are",
        f"for a device running at {fs} Hz; use the .csv coefficients where possible.",
        SAFETY_NOTE,
        "",
    ]
    return "\n".join(lines)


def manifest_entries(design: IirDesign) -> list[dict[str, Any]]:
    """Manifest entries (without SHA-256) for every IIR file."""
    stats = {(s.channel, s.fs): s for s in design.stats}
    out = []
    for ch in design.channels:
        for fs in design.sample_rates:
            for ext, fmt in ((".json", "json"), (".csv", "csv"), (".txt", "table")):
                out.append(
                    {
                        "path": f"{IIR_DIR}/{fs}/{ch.name}{ext}",
                        "kind": "iir",
                        "format": fmt,
                        "channel": ch.index,
                        "channel_name": ch.name,
                        "sample_rate": fs,
                        **_stat_fields(stats[(ch.index, fs)], design.pre_gain_db),
                    }
                )
    return out


def write_iir(
    design: IirDesign, out_dir: str | Path, update_manifest: bool = True
) -> list[dict[str, Any]]:
    """Write the IIR files into a design folder and add them to its manifest.

    Parameters
    ----------
    design : IirDesign
    out_dir : path-like
        Design output folder (must exist; normally written by
        :func:`roomcorr.export.write_design` first).
    update_manifest : bool
        Append entries to ``manifest.json`` (needs the manifest to exist).

    Returns
    -------
    list of dict
        The manifest entries of the files written.
    """
    out = Path(out_dir)
    if not out.is_dir():
        raise OutputError(f"--out {out}: folder does not exist; write the FIR design first")
    docs = iir_documents(design)
    entries = manifest_entries(design)
    for rel, text in docs.items():
        p = out / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        atomic_write_text(p, text)
    if update_manifest:
        from roomcorr import export

        export.add_manifest_entries(out, entries)
    return entries
