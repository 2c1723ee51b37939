"""Writers for biquad (IIR) output: JSON, CSV and a parameter table per channel and rate.

Layout inside a design output folder::

    DIR/iir/48000/left.json   sections (type, f0, gain, Q), coefficients, pre-gain, fit figures
    DIR/iir/48000/left.csv    coefficients in cascade order, a0 = 1: b0,b1,b2,a1,a2
    DIR/iir/48000/left.txt    human-readable table for devices that take parameters,
                              sorted by frequency, with notes

The biquads carry their own pre-gain, which differs a little from the FIR's
(:func:`pre_gain_note`); both are stated in the JSON and the table. Narrow
(high-Q) sections beside a dip whose boost was refused are explained in the
notes (:func:`section_notes`).

The first CSV row (``stage 0``, type ``gain``) is the pre-gain as a pure-gain
section (``b0 = 10 ** (pre_gain_db / 20)`` rounded down to float32, all else 0); load every row and
the cascade is complete and safe. Coefficient values are float32-exact and
written with full float64 precision, so devices running either precision use
exactly the values that were checked. Each file gets a manifest entry of kind
``"iir"`` (via :func:`roomcorr.deliver.manifest.add_manifest_entries`). Every file goes
through :mod:`roomcorr.deliver.atomic`.
"""

from __future__ import annotations

import csv
import io
import json
import textwrap
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.deliver.figures import fmt_db
from roomcorr.deliver.manifest import add_manifest_entries
from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise.iir_fit import IirDesign, IirStats
from roomcorr.errors import OutputError
from roomcorr.report.summary import withheld_regions

if TYPE_CHECKING:  # pragma: no cover
    from roomcorr.pipeline import DesignResult

IIR_DIR = "iir"
SAFETY_NOTE = (
    "Start playback quiet and raise the level slowly; protect your hearing; boosts cost "
    "headroom and driver excursion; follow local rules on noise exposure."
)


#: A section this narrow or narrower (Q) is explained when it sits beside a refused dip ...
HIGH_Q = 4.0
#: ... within this many octaves of the dip's edges.
BESIDE_OCT = 1.0 / 3.0


def pre_gain_note(pre_gain_db: float, fir_pre_gain_db: float | None) -> str:
    """Why the biquads' pre-gain is not the FIR's (one paragraph, both values stated)."""
    if fir_pre_gain_db is None:
        return (
            f"Pre-gain {fmt_db(pre_gain_db, 2)} belongs to these biquads: it brings their highest "
            "peak (all channels and rates) to the ceiling."
        )
    return (
        f"Pre-gain {fmt_db(pre_gain_db, 2)} for these biquads; the FIR files use "
        f"{fmt_db(fir_pre_gain_db, 2)}. Each filter set gets the pre-gain that brings its own "
        "highest peak (all channels and rates) to the ceiling, and the few biquads follow the "
        "correction only approximately, so their peak, and with it the pre-gain, differs a "
        "little from the FIR's. Use each pre-gain with its own filters only."
    )


def section_notes(
    sections: list[Any],
    coeffs: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    correction_db: np.ndarray,
    regions: list[dict[str, Any]],
) -> list[str]:
    """Explain every high-Q section that sits beside a dip whose boost was refused.

    Parameters
    ----------
    sections : list of Section
        Cascade order (numbered from 1 as in the CSV).
    coeffs : ndarray, shape (n_sections, 5)
    fs : int
    freq_hz, correction_db : ndarray, shape (n_freqs,)
        The designed correction curve (before pre-gain).
    regions : list of dict
        Refused-boost regions (``lo_hz``, ``hi_hz``, ``freq_hz``, ``withheld_db``,
        ``reason``) as :func:`roomcorr.report.summary.withheld_regions` gives them.

    Returns
    -------
    list of str
        One sentence per such section, with how far the cascade rises above the
        designed correction inside the dip (it does not fill it).
    """
    notes: list[str] = []
    f = np.asarray(freq_hz, dtype=float)
    for i, s in enumerate(sections, start=1):
        if s.kind != "peaking" or s.q < HIGH_Q or s.f0_hz >= 0.49 * fs:
            continue
        near = [
            r
            for r in regions
            if r["lo_hz"] * 2**-BESIDE_OCT <= s.f0_hz <= r["hi_hz"] * 2**BESIDE_OCT
        ]
        if not near:
            continue
        r = min(near, key=lambda r: abs(np.log2(s.f0_hz / r["freq_hz"])))
        inside = (f >= r["lo_hz"]) & (f <= r["hi_hz"]) & (f < 0.49 * fs)
        excess = 0.0
        if inside.any():
            cascade = bq.cascade_response_db(coeffs, f[inside], fs)
            excess = float(np.max(cascade - np.asarray(correction_db)[inside]))
        where = f"the dip at {hz_range(r['lo_hz'], r['hi_hz'])}"
        head = (
            f"Section {i} ({s.f0_hz:.0f} Hz, {s.gain_db:+.1f} dB, Q {s.q:.1f}) sits beside "
            f"{where}, where {r['withheld_db']:.1f} dB of boost was refused"
        )
        if s.gain_db > 0:
            why = (
                "it lifts the dip's shallow edge, where the boost rule still allows some "
                "boost, and is narrow so that it stops where the refusal begins"
            )
        else:
            why = "it cuts a room peak right next to the dip, narrow so as not to deepen the dip"
        excess = max(excess, 0.0)
        if excess < 0.5 * r["withheld_db"]:
            tail = (
                f"The cascade rises at most {excess:.1f} dB above the designed correction "
                "inside the dip, so the dip is not filled."
            )
        else:
            tail = (
                f"Caution: the cascade rises up to {excess:.1f} dB above the designed "
                "correction inside the dip; prefer the FIR filters here."
            )
        notes.append(f"{head}: {why}. {tail}")
    return notes


def hz_range(lo_hz: float, hi_hz: float) -> str:
    """``102-123 Hz``, or ``193 Hz`` when both ends round to the same whole hertz."""
    lo, hi = f"{lo_hz:.0f}", f"{hi_hz:.0f}"
    return f"{lo} Hz" if lo == hi else f"{lo}-{hi} Hz"


def _channel_regions(fir: DesignResult | None, index: int) -> tuple[list, Any]:
    """Refused-boost regions and the correction curve of one channel of a FIR design."""
    if fir is None:
        return [], None

    ch = next(c for c in fir.channels if c.index == index)
    curves = {
        key: getattr(ch, key)
        for key in (
            "raw_correction_db",
            "correction_db",
            "boost_withheld_db",
            "spread_db",
            "band_hz",
            "average_db",
        )
    }
    regions = withheld_regions(fir.freq_hz, curves, fir.settings.design.max_boost_db)
    return regions, ch.correction_db


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


def iir_documents(design: IirDesign, fir: DesignResult | None = None) -> dict[str, str]:
    """Render every IIR file as text, keyed by path relative to the design folder.

    ``fir`` (the FIR design the biquads were fitted to) adds its pre-gain and
    the notes on high-Q sections beside refused dips.
    """
    stats = {(s.channel, s.fs): s for s in design.stats}
    pre = design.pre_gain_db
    fir_pre = None if fir is None else float(fir.pre_gain_db)
    docs: dict[str, str] = {}
    for ch in design.channels:
        regions, correction = _channel_regions(fir, ch.index)
        for fs in design.sample_rates:
            secs = ch.sections[fs]
            coeffs = ch.coeffs[fs]
            st = stats[(ch.index, fs)]
            base = f"{IIR_DIR}/{fs}/{ch.name}"
            notes = (
                section_notes(secs, coeffs, fs, design.freq_hz, correction, regions)
                if correction is not None
                else []
            )
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
                "fir_pre_gain_db": fir_pre,
                "pre_gain_note": pre_gain_note(pre, fir_pre),
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
                "notes": notes,
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
            docs[base + ".txt"] = _table(ch.name, ch.band_hz, fs, secs, st, pre, fir_pre, notes)
    return docs


def _wrap(text: str, width: int = 88) -> list[str]:
    return textwrap.wrap(text, width)


def _table(
    name, band_hz, fs, secs, st: IirStats, pre: float, fir_pre: float | None, notes: list[str]
) -> str:
    lines = [
        f"roomcorr biquad correction: channel {name}, {fs} Hz, {len(secs)} sections",
        f"Pre-gain: {fmt_db(pre, 2)} (one plain gain stage, anywhere in the chain)",
        *_wrap(pre_gain_note(pre, fir_pre)),
        f"Peak gain {fmt_db(st.peak_gain_db, 2)} (DC to Nyquist), worst-case gain (sum |h|) "
        f"{fmt_db(st.worst_case_gain_db, 2)}, pre-gain included; largest boost "
        f"{fmt_db(st.max_boost_db, 2)}",
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
        "Sections sorted by frequency; '#' is the stage number in the .csv (cascade order).",
        f"{'#':>3}  {'type':<10}{'freq Hz':>10}{'gain dB':>9}{'Q':>8}",
    ]
    order = sorted(range(len(secs)), key=lambda k: (secs[k].f0_hz, k))
    for k in order:
        s = secs[k]
        lines.append(f"{k + 1:>3}  {s.kind:<10}{s.f0_hz:>10.2f}{s.gain_db:>9.2f}{s.q:>8.3f}")
    if notes:
        lines += ["", "Narrow sections beside refused dips:"]
        for note in notes:
            lines += ["  " + ln for ln in _wrap(note, 86)]
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
    design: IirDesign,
    out_dir: str | Path,
    update_manifest: bool = True,
    fir: DesignResult | None = None,
) -> list[dict[str, Any]]:
    """Write the IIR files into a design folder and add them to its manifest.

    Parameters
    ----------
    design : IirDesign
    out_dir : path-like
        Design output folder (must exist; normally written by
        :func:`roomcorr.deliver.export.write_design` first).
    update_manifest : bool
        Append entries to ``manifest.json`` (needs the manifest to exist).
    fir : DesignResult, optional
        The FIR design the biquads were fitted to: its pre-gain is stated
        beside theirs, and high-Q sections beside its refused dips explained.

    Returns
    -------
    list of dict
        The manifest entries of the files written.
    """
    out = Path(out_dir)
    if not out.is_dir():
        raise OutputError(f"--out {out}: folder does not exist; write the FIR design first")
    docs = iir_documents(design, fir)
    entries = manifest_entries(design)
    for rel, text in docs.items():
        p = out / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        atomic_write_text(p, text)
    if update_manifest:
        add_manifest_entries(out, entries)
    return entries
