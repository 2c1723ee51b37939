"""One self-contained HTML page (plus PNG files) about a design or a measurement session.

:func:`build_report` turns the curves of a design (layout of
:func:`roomcorr.deliver.export.load_design_curves`) into sections with figures and
tables; :func:`render_html` makes the page (figures embedded as base64 PNG,
inline styles, no network access); :func:`write_report` does the file work
for ``roomcorr report DIR``: it reads DIR, writes ``DIR/report/*.png`` and
``DIR/report.html`` through the atomic-write helper, and adds them to the
manifest of a design folder.
"""

from __future__ import annotations

import base64
import html
import os
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.signal import fftconvolve, freqz, sosfreqz

from roomcorr import rooms
from roomcorr.analysis.average import power_average
from roomcorr.analysis.decay import decay_method as _decay_method
from roomcorr.analysis.decay import low_frequency_decay_map, octave_band_decay, ringing_modes
from roomcorr.analysis.decay import mean_band_decay as _mean_band_decay
from roomcorr.audio_io import read_ir_set
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import (
    PathEscapeError,
    atomic_write_bytes,
    atomic_write_text,
    contained,
    disk_error_text,
    holds_working_folder,
    sha256_of,
    staged_copy,
    staged_folder,
)
from roomcorr.deliver.export import (
    check_folder_target,
    design_differences,
    load_design_curves,
)
from roomcorr.deliver.export_iir import pre_gain_note
from roomcorr.deliver.figures import figures_of_manifest, fmt_db
from roomcorr.deliver.loading import file_groups
from roomcorr.deliver.manifest import add_manifest_entries, read_manifest, write_manifest
from roomcorr.design.phase.mixedphase import PRE_RING_LIMIT_DB, PRE_RING_S
from roomcorr.design.realise.fir import fir_response_db, worst_case_gain_db
from roomcorr.design.realise.safety import CAUTIONS, PEAK_BAND, full_band_peak_gain_db
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.grid import log_grid
from roomcorr.pipeline import analyse_positions, default_channel_names
from roomcorr.report import figures as fg
from roomcorr.report import glance
from roomcorr.report.compare import comparison_png, format_comparison
from roomcorr.report.files import files_parts
from roomcorr.report.parts import Column, Figure, Report, Section
from roomcorr.report.summary import fmt_hz, summary_sentences, withheld_regions
from roomcorr.report.system import system_sections
from roomcorr.rooms import COMPLETE_MARKER, measurement_record, refuse_finished_run

REPORT_HTML = "report.html"
FIG_DIR = "report"

#: Section ids, in page order (per channel sections get a ``-<channel>`` suffix).
SECTION_TITLES = {
    "overview": "At a glance",
    "changes": "What the correction did, channel by channel",
    "compare": "What changed since the earlier measurement",
    "room": "The room as measured",
    "result": "Predicted result at every position",
    "filter": "The correction filter",
    "time": "Impulse and step",
    "phase": "Direct sound and latency (mixed phase)",
    "decay": "Reverberation by octave",
    "ringing": "Low-frequency ringing",
    "iir": "The biquad version",
    "quality": "How good the measurement was",
    "through": "Measured through the design's filters",
    "causes": "Why the peaks and dips are there",
    "safety": "Safety and levels",
    "files": "The files and how to load them",
}


def _fir_for(curves: dict[str, Any], index: int) -> tuple[np.ndarray | None, int | None]:
    """The exported filter at the measurement rate (or the nearest rate)."""
    firs = curves.get("firs") or {}
    if not firs:
        return None, None
    fs = int(curves["fs_in"])
    rate = fs if fs in firs else min(firs, key=lambda r: abs(r - fs))
    return np.asarray(firs[rate][index], dtype=float), int(rate)


def corrected_responses(irs: np.ndarray, fir: np.ndarray) -> np.ndarray:
    """Each position's response convolved with the filter, cut to the original length.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_samples)
    fir : ndarray, shape (n_taps,)

    Returns
    -------
    corrected_irs : ndarray, shape (n_positions, n_samples)
    """

    return fftconvolve(irs, fir[None, :], axes=-1)[:, : irs.shape[-1]]


def predicted_responses(
    irs: np.ndarray, fs: int, fir: np.ndarray, freq_hz: np.ndarray, measured_db: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Each position convolved with the filter, analysed exactly like the measurement.

    The pipeline's own position analysis (onset, frequency-dependent window,
    smoothing) is run on the convolved and on the raw responses; their
    difference is added to ``measured_db``, so the calibration applied to the
    measurement carries over unchanged.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_samples)
    fs : int
    fir : ndarray, shape (n_taps,)
    freq_hz : ndarray, shape (n_freqs,)
    measured_db : ndarray, shape (n_positions, n_freqs)

    Returns
    -------
    predicted_db : ndarray, shape (n_positions, n_freqs)
    corrected_irs : ndarray, shape (n_positions, n_samples)
        Convolved responses cut to the original length.
    """

    conv = corrected_responses(irs, fir)
    after, _ = analyse_positions(conv[:, None, :], fs, freq_hz)
    before, _ = analyse_positions(irs[:, None, :], fs, freq_hz)
    return measured_db + after[:, 0] - before[:, 0], conv


def filter_response(
    fir: np.ndarray, fs: int, freq_hz: np.ndarray, min_fft: int = 1 << 18
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Gain (dB), wrapped phase (degrees) and group delay (ms) of an FIR on ``freq_hz``.

    One zero-padded FFT of the taps and one of ``n * h[n]``; group delay is
    ``Re(FFT(n h) / FFT(h))`` (the standard FIR identity, as in
    :func:`scipy.signal.group_delay`), read at ``freq_hz`` by linear
    interpolation between bins at most ``fs / min_fft`` apart; where the delay
    changes by more than 1 µs between two bins (a notch) the frequency is
    evaluated exactly (:func:`scipy.signal.freqz`). Frequencies at or above
    Nyquist give NaN.
    """
    h = np.asarray(fir, dtype=float)
    f = np.asarray(freq_hz, dtype=float)
    ok = f < fs / 2
    n_fft = max(min_fft, 1 << int(np.ceil(np.log2(8 * h.size))))
    spec = np.fft.rfft(h, n_fft)
    ramp = np.fft.rfft(np.arange(h.size) * h, n_fft)
    bins = np.fft.rfftfreq(n_fft, 1.0 / fs)
    with np.errstate(divide="ignore", invalid="ignore"):
        gd_bins = np.real(ramp / spec)
    re = np.interp(f[ok], bins, spec.real)
    im = np.interp(f[ok], bins, spec.imag)
    gain = np.full(f.shape, np.nan)
    phase = np.full(f.shape, np.nan)
    gd = np.full(f.shape, np.nan)
    with np.errstate(divide="ignore"):
        gain[ok] = 20 * np.log10(np.hypot(re, im))
    phase[ok] = np.degrees(np.arctan2(im, re))
    gd[ok] = np.interp(f[ok], bins, gd_bins) / fs * 1000.0
    # Near a notch the delay changes fast between two bins and a line between
    # them misreads it: evaluate those few frequencies exactly (scipy's freqz,
    # the same identity as scipy.signal.group_delay).
    idx = np.flatnonzero(ok)
    k = np.clip(np.searchsorted(bins, f[idx]), 1, bins.size - 1)
    sel = idx[np.abs(gd_bins[k] - gd_bins[k - 1]) > 0.001 * fs / 1000.0]
    if sel.size:
        _, s_sel = freqz(h, worN=f[sel], fs=fs)
        _, r_sel = freqz(np.arange(h.size) * h, worN=f[sel], fs=fs)
        with np.errstate(divide="ignore", invalid="ignore"):
            gain[sel] = 20 * np.log10(np.abs(s_sel))
            gd[sel] = np.real(r_sel / s_sel) / fs * 1000.0
        phase[sel] = np.degrees(np.angle(s_sel))
    return gain, phase, gd


def _decay_table(bands: list[Any]) -> list[list[str]]:
    def cell(v: float, ok: bool) -> str:
        if not np.isfinite(v):
            return "n/a"
        # rounded first to the 4 decimals the app's decay view stores, so both print the
        # same two decimals (no double-rounding difference at x.xx5)
        return f"{float(np.round(v, 4)):.2f}" + ("" if ok else " *")

    rows = [["band (Hz)", "EDT (s)", "T20 (s)", "T30 (s)", "peak-to-noise (dB)"]]
    for b in bands:
        rows.append(
            [
                b.label,
                cell(b.edt_s, b.valid["edt"]),
                cell(b.t20_s, b.valid["t20"]),
                cell(b.t30_s, b.valid["t30"]),
                f"{b.dynamic_range_db:.0f}",
            ]
        )
    return rows


def quality_from_record(record: dict[str, Any]) -> list[dict[str, Any]]:
    """Per-recording quality figures from a session's ``measurement.json`` record.

    Returns
    -------
    list of dict
        ``label`` ("pos1 out1"), ``snr_db``, ``hd_freq_hz``, ``hd_db``,
        ``repeat_db`` and ``gates`` (list of gate dicts), one per recording.
    """
    out = []
    for pos in record.get("positions", []) or []:
        for ch in pos.get("channels", []) or []:
            fig = ch.get("figures", {}) or {}
            hd = fig.get("harmonic_distortion", {}) or {}
            out.append(
                {
                    "label": f"pos{pos.get('position', '?')} out{ch.get('output', '?')}",
                    "snr_db": fig.get("snr_db_per_octave") or {},
                    "hd_freq_hz": hd.get("fundamental_hz") or [],
                    "hd_db": hd.get("orders") or {},
                    "repeat_db": fig.get("repeat_disagreement_db"),
                    "gates": ch.get("gates") or [],
                }
            )
    return out


def _quality_section(recordings: list[dict[str, Any]], png: Any) -> Section:
    sec = Section("quality", SECTION_TITLES["quality"])
    sec.paragraphs.append(
        "Signal to noise per octave band (40 dB or more is comfortable), the loudspeaker's "
        "harmonic distortion during the sweep (second harmonic solid, third dashed), and how "
        "far repeated sweeps differed from their mean, in dB relative to the response "
        "(lower is better)."
    )
    failed = [
        f"{r['label']}: {g.get('name')} ({g.get('message', '')})"
        for r in recordings
        for g in r["gates"]
        if not g.get("passed", True) and g.get("severity") != "warning"
    ]
    warned = [
        f"{r['label']}: {g.get('message', g.get('name'))}"
        for r in recordings
        for g in r["gates"]
        if not g.get("passed", True) and g.get("severity") == "warning"
    ]
    if warned:
        sec.paragraphs.append("Warning: " + "; ".join(warned) + ".")
    if failed:
        sec.paragraphs.append("Checks that failed (kept on request): " + "; ".join(failed) + ".")
    elif not warned:
        sec.paragraphs.append("Every recording passed every quality check.")
    rows = [["recording", "lowest SNR (dB)", "repeat difference (dB)", "checks passed"]]
    for r in recordings:
        snr = [float(v) for v in r["snr_db"].values() if v is not None]
        rep = r["repeat_db"]
        rows.append(
            [
                r["label"],
                f"{min(snr):.0f}" if snr else "n/a",
                "n/a" if rep is None else f"{float(rep):.1f}",
                f"{sum(bool(g.get('passed')) for g in r['gates'])} of {len(r['gates'])}",
            ]
        )
    sec.table = rows
    sec.figures.append(
        Figure("quality", "Measurement quality", png(fg.plot_quality(recordings, "Measurement")))
    )
    return sec


def iir_response_db(doc: dict[str, Any], freq_hz: np.ndarray) -> np.ndarray:
    """Response in dB of one biquad document (cascade and pre-gain) on ``freq_hz``.

    Coefficients ``[b0, b1, b2, a1, a2]`` with ``a0 = 1``, evaluated with
    :func:`scipy.signal.sosfreqz`; NaN at and above Nyquist.
    """

    fs = float(doc["sample_rate"])
    f = np.asarray(freq_hz, dtype=float)
    out = np.full(f.shape, np.nan)
    ok = f < fs / 2
    gain = float(doc.get("pre_gain_linear", 10 ** (float(doc.get("pre_gain_db", 0)) / 20)))
    secs = doc.get("sections") or []
    if secs:
        sos = np.array([[c[0], c[1], c[2], 1.0, c[3], c[4]]
                        for c in (s["coefficients"] for s in secs)], dtype=float)
        _, h = sosfreqz(sos, worN=f[ok], fs=fs)
    else:
        h = np.ones(int(ok.sum()))
    with np.errstate(divide="ignore"):
        out[ok] = 20 * np.log10(np.abs(h) * gain)
    return out


def _iir_column(x: _Channel, ctx: _Context) -> Column | None:
    """The biquad version of one channel: both pre-gains, the sections by frequency, notes."""

    docs = (ctx.iir or {}).get(x.name)
    if not docs or "correction_db" not in x.ch:
        return None
    freq = ctx.freq
    col = Column(x.name)
    cascades = {int(d["sample_rate"]): iir_response_db(d, freq) for d in docs}
    fir_db = filter_response(x.fir, x.rate, freq)[0] if x.fir is not None else None
    doc = min(docs, key=lambda d: abs(int(d["sample_rate"]) - 48000))
    figs = doc.get("figures") or {}
    iir_pre = float(doc.get("pre_gain_db", 0.0))
    col.paragraphs.append(
        f"{len(doc.get('sections') or [])} biquad sections (Audio EQ Cookbook forms) fitted to "
        "the same correction, for players that take parametric filters instead of an FIR; "
        "the table lists the sections at "
        f"{doc['sample_rate']} Hz by frequency (# is the stage in the .csv). Peak gain "
        f"{fmt_db(figs.get('peak_gain_db'), 2)}, "
        f"worst-case gain {fmt_db(figs.get('worst_case_gain_db'), 2)}, fit error "
        f"{fmt_db(figs.get('fit_rms_error_db'), 2)} rms."
    )

    col.paragraphs.append(pre_gain_note(iir_pre, ctx.pre_gain))
    notes = [str(n) for n in doc.get("notes") or []]
    if notes:
        col.details = (f"Why {len(notes)} narrow section(s) sit beside refused dips", notes)
    rows = [["#", "type", "frequency (Hz)", "gain (dB)", "Q"]]
    secs = list(enumerate(doc.get("sections") or [], start=1))
    for i, sct in sorted(secs, key=lambda t: (float(t[1].get("freq_hz", 0)), t[0])):
        rows.append([str(i), str(sct.get("type")), f"{float(sct.get('freq_hz', 0)):.1f}",
                     f"{float(sct.get('gain_db', 0)):.2f}", f"{float(sct.get('q', 0)):.2f}"])
    col.table = rows
    col.figures.append(
        Figure(f"{x.name}-iir", f"Biquad cascade against the FIR, {x.name}",
               ctx.png(fg.plot_iir(freq, cascades, fir_db,
                                   np.asarray(x.ch["correction_db"]) + ctx.pre_gain, x.band,
                                   f"Biquads: {x.name}")))
    )
    return col


def _channel_sentences(block: list[str]) -> str:
    """One channel's lines of :func:`roomcorr.report.compare.format_comparison` as plain sentences.

    Lines indented by two spaces are items; deeper lines continue the item above
    (band cells, peak and dip lines). Items are joined with "; ".
    """
    items: list[str] = []
    for line in block:
        text = re.sub(r"\s{2,}", ", ", line.strip())
        if not text:
            continue
        if items and len(line) - len(line.lstrip()) > 2:
            items[-1] += (" " if items[-1].endswith(":") else ", ") + text
        else:
            items.append(text)
    return "; ".join(items)


def _sentence(line: str) -> str:
    text = line.strip()
    return text[:1].upper() + text[1:]


def comparison_section(res: dict[str, Any]) -> Section:
    """The comparison section: both responses overlaid, and a table per channel.

    Parameters
    ----------
    res : dict
        :func:`roomcorr.app.compare.compare_measurements` result with ``with_curves=True``
        (``before`` and ``after`` are shown as given).

    Returns
    -------
    Section
        Id ``compare``; one figure (key ``compare``, from
        :func:`roomcorr.report.compare.comparison_png`); table rows ``channel, arrival
        change (ms), distance change (m), level change (dB), what changed``, the
        last column holding that channel's sentences of
        :func:`roomcorr.report.compare.format_comparison`.
    """

    lines = format_comparison(res)
    blocks: list[list[str]] = [[]]
    for line in lines:
        if line == "":
            blocks.append([])
        else:
            blocks[-1].append(line)
    chans = res["channels"]
    sec = Section("compare", SECTION_TITLES["compare"])
    sec.paragraphs.append(
        f"The measurement behind this folder ({res['after']}) against the earlier one "
        f"({res['before']}). Blue is before, orange after, both position-averaged and "
        "smoothed to 1/24 octave, drawn relative to the earlier level between 100 Hz and "
        "10 kHz; the right-hand panels mark peaks and dips below 500 Hz that appeared, moved "
        "or vanished."
    )
    per_channel: list[str]
    if len(blocks) == len(chans) + 2:  # header, one block per channel, filter check
        sec.paragraphs.extend(_sentence(ln) for ln in blocks[0][2:])
        per_channel = [_channel_sentences(b[1:]) for b in blocks[1:-1]]
        sec.paragraphs.extend(_sentence(ln) for ln in blocks[-1])
    else:  # layout not as expected: keep every line, nothing lost
        sec.paragraphs.extend(_sentence(ln) for ln in lines[2:] if ln.strip())
        per_channel = ["" for _ in chans]
    rows = [["channel", "arrival change (ms)", "distance change (m)", "level change (dB)",
             "what changed"]]
    for ch, text in zip(chans, per_channel, strict=True):
        dist = ch["distance_change_m"]
        rows.append([str(ch["name"]), f"{ch['arrival_change_ms']:+.3f}",
                     "unsure" if dist is None else f"{dist:+.3f}",
                     f"{ch['level_change_db']:+.2f}", text])
    sec.table = rows
    sec.figures.append(
        Figure("compare", "Before and after, both responses overlaid per channel",
               comparison_png(res))
    )
    return sec


def _comparison_sentence(res: dict[str, Any]) -> str:
    parts = [
        f"{ch['name']} "
        + ("distance unsure" if ch["distance_change_m"] is None
           else f"{ch['distance_change_m']:+.3f} m")
        + f", {ch['level_change_db']:+.1f} dB"
        for ch in res["channels"]
    ]
    move = res.get("move")
    return (
        f"Since the earlier measurement ({res['before']}): " + "; ".join(parts)
        + " (distance and level changes; see the comparison section)."
        + (f" Who moved: {move['sentence']}." if move else "")
    )


def _design_caps(settings: dict[str, Any] | None) -> dict[str, Any]:
    d = (settings or {}).get("design", {}) if isinstance(settings, dict) else {}
    return {
        "max_boost_db": d.get("max_boost_db"),
        "max_cut_db": d.get("max_cut_db"),
        "ceiling_db": d.get("ceiling_db", 0.0),
        "allow_gain": d.get("allow_gain", False),
    }


@dataclass
class _Context:
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
class _Channel:
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


def _channel(curves: dict[str, Any], ch: dict[str, Any], ctx: _Context) -> _Channel:
    c = int(ch["index"])
    irs = curves.get("irs")
    x = _Channel(
        ch=ch, index=c, name=str(ch["name"]),
        tag=f"{ch['name']} ({len(ch['measured_db'])} positions)",
        band=tuple(ch["band_hz"]) if "band_hz" in ch else None,
        pos_irs=None if irs is None else np.asarray(irs)[:, c],
    )
    if ctx.designed:
        x.fir, x.rate = _fir_for(curves, c)
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


def _target_note(x: _Channel, ctx: _Context) -> str:
    """What the dashed target line is, beside each figure that draws it."""
    return glance.target_note(ctx.freq, x.ch["target_db"], ctx.target_shape, ctx.target_spec)


def _room_column(x: _Channel, ctx: _Context) -> Column | None:
    col = Column(x.name)
    if x.ch.get("target_db") is not None:
        col.paragraphs.append(_target_note(x, ctx))
    col.figures.append(
        Figure(
            f"{x.name}-room",
            f"Measured response, {x.name}",
            ctx.png(
                fg.plot_responses(
                    ctx.freq, x.ch["measured_db"], x.ch["average_db"], x.ch.get("target_db"),
                    x.band, ctx.caps["max_boost_db"], f"Measured: {x.tag}",
                )
            ),
        )
    )
    return col


def _result_column(x: _Channel, ctx: _Context) -> Column | None:
    if x.predicted is None:
        return None
    col = Column(x.name)
    col.paragraphs.append(f"Predicted from {x.how}.")
    col.paragraphs.append(_target_note(x, ctx))
    col.figures.append(
        Figure(
            f"{x.name}-result",
            f"Predicted result, {x.name}",
            ctx.png(fg.plot_predicted(ctx.freq, x.predicted, x.ch["average_db"],
                                      np.asarray(x.ch["target_db"]) + ctx.pre_gain, x.band,
                                      f"Corrected: {x.tag}", ctx.pre_gain)),
        )
    )
    return col


_REFUSAL_REASONS = {
    "cancellation": "the dip is a cancellation that moves with the listener, "
    "so boost would burn headroom for nothing",
    "spread": "the positions disagree too much there",
    "cap": "the boost cap was reached",
}


def _filter_column(x: _Channel, ctx: _Context) -> Column | None:
    if x.fir is None or x.predicted is None:
        return None
    gain, phase, gd = filter_response(x.fir, x.rate, ctx.freq)
    col = Column(x.name)
    col.paragraphs.append(_filter_description(x, ctx))
    regions = withheld_regions(ctx.freq, x.ch, ctx.caps["max_boost_db"])
    for r in regions[:4]:
        col.paragraphs.append(
            f"Boost refused around {fmt_hz(r['freq_hz'])} "
            f"({fmt_hz(r['lo_hz'])} to {fmt_hz(r['hi_hz'])}, "
            f"{r['withheld_db']:.1f} dB withheld): {_REFUSAL_REASONS[r['reason']]}."
        )
    if not regions:
        col.paragraphs.append("No boost was refused.")
    col.figures.append(
        Figure(
            f"{x.name}-filter",
            f"Filter magnitude, phase and group delay, {x.name}",
            ctx.png(fg.plot_filter(ctx.freq, gain, phase, gd, x.ch["correction_db"],
                                   x.ch["boost_withheld_db"], x.band, ctx.pre_gain, x.rate,
                                   f"Filter: {x.name}")),
        )
    )
    return col


def _filter_description(x: _Channel, ctx: _Context) -> str:
    """What the filter is: minimum phase, or mixed phase with latency and measured pre-ringing."""
    pre = fmt_db((ctx.figures or {}).get("pre_gain_db", ctx.pre_gain), 2, True)
    if not ctx.mixed:
        return (
            f"Minimum-phase FIR at {x.rate} Hz, {len(x.fir)} taps, pre-gain {pre} included; "
            "a minimum-phase filter adds no latency and has no pre-ringing."
        )
    n = ctx.mixed["latency_samples"].get(x.rate)
    lat = f"{ctx.mixed['latency_ms']:g} ms" + ("" if n is None else f" ({n} samples)")
    ring = (ctx.figures or {}).get("pre_ringing_db")
    ring_txt = (
        "" if ring is None
        else f"; its pre-ringing, measured, is at most {fmt_db(ring)} re its main peak"
    )
    return (
        f"Mixed-phase FIR at {x.rate} Hz, {len(x.fir)} taps, latency {lat}, pre-gain {pre} "
        f"included: minimum phase in the bass, and above it the loudspeaker's excess phase "
        f"undone as well{ring_txt} (see the time and mixed-phase sections)."
    )


def _latency_samples_at(ctx: _Context, fs: int) -> int:
    """Design latency in samples at ``fs`` (0 for minimum phase)."""
    if not ctx.mixed:
        return 0
    n = ctx.mixed["latency_samples"].get(fs)
    if n is None:
        return int(round(float(ctx.mixed["latency_ms"]) * fs / 1000.0))
    return int(n)


def _time_column(x: _Channel, ctx: _Context) -> Column | None:
    if x.corrected is None or x.fir is None or x.pos_irs is None:
        return None
    col = Column(x.name)
    after = np.asarray(x.corrected[0])
    lat = _latency_samples_at(ctx, ctx.fs)
    if lat:  # drawn aligned: the design latency is taken out, so only pre-ringing leads
        after = np.concatenate([after[lat:], np.zeros(min(lat, after.size))])
    col.figures.append(
        Figure(
            f"{x.name}-time",
            f"Impulse and step response, {x.name}",
            ctx.png(fg.plot_time(ctx.fs, x.fir, x.pos_irs[0], after,
                                 f"Time response: {x.name}")),
        )
    )
    return col


def _phase_column(x: _Channel, ctx: _Context) -> Column | None:
    """The mixed-phase part of one channel (``None`` for a minimum-phase design)."""

    mixed = ctx.mixed
    if not mixed or x.index >= len(mixed["channels"]):
        return None
    ch = mixed["channels"][x.index]
    col = Column(x.name)
    lo, hi = (float(v) for v in ch["band_hz"])
    col.paragraphs.append(
        f"The loudspeaker's excess phase (the measured phase minus that of the minimum-phase "
        f"response with the same magnitude) was estimated from the direct sound of every "
        f"position, before the first strong reflection, and undone between {fmt_hz(lo)} and "
        f"{fmt_hz(hi)} where the positions agree. Below that the room owns the phase, and "
        "the filter leaves it alone (a pure delay). The magnitude is the minimum-phase "
        "design's. From 300 Hz up (fading in from 150 Hz) the filter also takes out the group "
        "delay of its own magnitude correction, as far as the pre-ringing limit allows, so "
        "the corrected direct sound arrives at once at every frequency; in the bass it stays "
        "minimum phase."
    )
    if "view_gd_s" in ch:
        view = {k[len("view_") :]: v for k, v in ch.items() if k.startswith("view_")}
        col.figures.append(
            Figure(
                f"{x.name}-phase",
                f"Direct sound before and after, and pre-ringing, {x.name}",
                ctx.png(
                    fg.plot_mixed_phase(
                        view,
                        float(mixed["latency_ms"]),
                        PRE_RING_LIMIT_DB,
                        1000 * PRE_RING_S,
                        f"Mixed phase: {x.name}",
                    )
                ),
            )
        )
    else:
        col.paragraphs.append(
            "No filter was designed at the measurement's sample rate, so the direct sound "
            "could not be shown before and after."
        )
    return col  # the latency and its caution are stated once, in the overview


def _position_decay(x: _Channel, ctx: _Context) -> list[Any]:
    """Octave-band decay averaged over positions (empty when it cannot be analysed)."""

    if x.pos_irs is None:
        return []
    try:
        per_pos = [octave_band_decay(x.pos_irs[p], ctx.fs) for p in range(len(x.pos_irs))]
    except ValueError:  # too short or silent: no decay analysis possible
        return []
    return _mean_band_decay(per_pos) if per_pos and per_pos[0] else []


def _decay_column(x: _Channel, ctx: _Context) -> Column | None:
    bands = _position_decay(x, ctx)
    if not bands:
        return None
    col = Column(x.name)
    col.table = _decay_table(bands)
    col.figures.append(
        Figure(f"{x.name}-decay", f"Decay curves and times, {x.name}",
               ctx.png(fg.plot_decay(bands, f"Decay: {x.name}")))
    )
    return col


def _ringing_column(x: _Channel, ctx: _Context) -> Column | None:
    if x.pos_irs is None or not _position_decay(x, ctx):
        return None
    before_map = low_frequency_decay_map(x.pos_irs[0], ctx.fs)
    modes = ringing_modes(before_map)
    maps = [("as measured", before_map)]
    if x.corrected is not None:
        maps.append(("corrected", low_frequency_decay_map(x.corrected[0], ctx.fs)))
    col = Column(x.name)
    if modes:
        txt = ", ".join(f"{f0:.0f} Hz ({t0:.2f} s)" for f0, t0 in modes)
        col.paragraphs.append(
            f"Peaks still loudest 200 ms after the sound stops (60 dB decay time): {txt}."
        )
        ctx.ringing_notes.append(
            f"{x.name} around {fmt_hz(modes[0][0])} ({modes[0][1]:.2f} s to decay 60 dB)"
        )
    col.figures.append(
        Figure(f"{x.name}-ringing", f"Low-frequency decay map, {x.name}",
               ctx.png(fg.plot_decay_map(maps, modes, f"Low-frequency decay: {x.name}")))
    )
    return col


#: Intro of the time section for a mixed-phase design (instead of the minimum-phase one).
TIME_INTRO_MIXED = (
    "Top: the filter alone. Bottom: the first position before and after correction, the "
    "corrected response drawn with the design latency taken out so that both main peaks sit "
    "at 0 ms. Anything left of 0 ms is pre-ringing: a mixed-phase filter has some (measured "
    "in the mixed-phase section)."
)

#: Sections with one column per channel: (id, text above the columns, column builder).
#: Add a per-channel section by writing a ``_xxx_column(x, ctx)`` and listing it here.
CHANNEL_SECTIONS: list[tuple[str, str, Any]] = [
    ("room", "Thin lines are the individual microphone positions, the thick line is their "
     "power average. Grey areas lie outside the correction band.", _room_column),
    ("result", "Analysed with the same window and smoothing as the measurement. The filters "
     "include the pre-gain, so the target is drawn lowered by it. Lines close to the target at "
     "every position mean the correction holds across the listening area.", _result_column),
    ("filter", "Pink areas mark frequencies where boost was wanted but refused.",
     _filter_column),
    ("time", "Top: the filter alone. Bottom: the first position before and after correction. "
     "Anything left of 0 ms is pre-ringing; a minimum-phase filter has none.", _time_column),
    ("phase", "", _phase_column),
    ("iir", "", _iir_column),
    ("decay", _decay_method() + ". Per octave band: the noise floor is subtracted, the "
     "backward integration stops where the late decay meets the noise and the energy it "
     "would still have had is added back. EDT from 0 to -10 dB, T20 from -5 to -25 dB, T30 "
     "from -5 to -35 dB, each extrapolated to 60 dB (ISO 3382-1), averaged over positions; "
     "curves show the first position. * marks a value whose range comes within 10 dB of the "
     "noise floor.", _decay_column),
    ("ringing", "Sliding-window spectra of the first position from 20 to 300 Hz: each row "
     "starts 10 ms later than the one below. A bright ridge reaching high up is a room mode "
     "that keeps ringing after the sound stops.", _ringing_column),
]


def channel_section(
    sec_id: str, intro: str, chans: list[_Channel], ctx: _Context, build: Any
) -> Section | None:
    """A section with one column per channel (None when no channel has anything to show)."""
    cols = [c for c in (build(x, ctx) for x in chans) if c is not None]
    if not cols:
        return None
    sec = Section(sec_id, SECTION_TITLES[sec_id], columns=cols)
    if intro:
        sec.paragraphs.append(intro)
    return sec


def _safety_section(chans: list[_Channel], curves: dict[str, Any], ctx: _Context) -> Section:
    caps = ctx.caps
    if ctx.figures is not None:  # the manifest's figures, never recomputed here
        rows = [["channel", "rate (Hz)", "taps", "largest boost (dB)", "peak gain (dB)",
                 "worst-case gain (dB)"]]
        for c in ctx.figures.get("filters", []):
            rows.append([str(c["name"]), str(c["sample_rate"]), str(c["taps"]),
                         fmt_db(c["largest_boost_db"], 2, unit=False),
                         fmt_db(c["peak_gain_db"], 2, True, unit=False),
                         fmt_db(c["worst_case_gain_db"], 2, True, unit=False)])
    else:  # curves without a manifest (a design in memory): the filters' own figures
        rows = [["channel", "rate (Hz)", "taps", "peak gain (dB)", "worst-case gain (dB)"]]
        for x in chans:
            if x.fir is None:
                continue
            for r in sorted(curves["firs"]):
                h = np.asarray(curves["firs"][r][x.index], dtype=float)
                rows.append([x.name, str(r), str(h.size),
                             fmt_db(full_band_peak_gain_db(h, r), 2, True, unit=False),
                             fmt_db(worst_case_gain_db(h), 2, True, unit=False)])
    saf = Section("safety", SECTION_TITLES["safety"])
    mb = "n/a" if caps["max_boost_db"] is None else f"{caps['max_boost_db']:g} dB"
    mc = "n/a" if caps["max_cut_db"] is None else f"{caps['max_cut_db']:g} dB"
    saf.paragraphs.append(
        f"Pre-gain {fmt_db((ctx.figures or {}).get('pre_gain_db', ctx.pre_gain), 2, True)} "
        "(common to all channels and rates). Caps in force: "
        f"boost at most {mb}, cut at most {mc}, peak gain ceiling "
        f"{caps['ceiling_db']:g} dB" + (" (gain allowed)." if caps["allow_gain"] else ".")
    )
    saf.paragraphs.append(
        f"Largest boost is a filter's largest gain before the pre-gain and peak gain its "
        f"largest gain with it, both anywhere from {PEAK_BAND} (not only between "
        "20 Hz and 20 kHz), largest over the sample rates; worst-case gain (20 log10 of the "
        "sum of |taps|) is the most any input waveform could grow."
    )
    if ctx.iir:
        saf.paragraphs.append(
            "The biquad files carry their own pre-gain (see the biquad section): use each "
            "pre-gain with its own filters only."
        )
    saf.paragraphs.extend(CAUTIONS)
    saf.table = rows
    return saf


def report_context(
    curves: dict[str, Any],
    settings: dict[str, Any] | None = None,
    png: Any = None,
    iir: dict[str, list[dict[str, Any]]] | None = None,
    figures: dict[str, Any] | None = None,
) -> _Context:
    """What every section of a report of ``curves`` shares (arguments as :func:`build_report`).

    Each channel's own data is then ``_channel(curves, ch, ctx)``.
    """
    designed = bool(curves.get("firs")) and all("correction_db" in ch for ch in curves["channels"])
    freq = np.asarray(curves["freq_hz"], dtype=float)
    design = (settings or {}).get("design", {}) if isinstance(settings, dict) else {}
    spec = design.get("target") if isinstance(design, dict) else None
    spec = str(spec) if spec else None
    return _Context(
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


def build_report(
    curves: dict[str, Any],
    settings: dict[str, Any] | None = None,
    quality: list[dict[str, Any]] | None = None,
    iir: dict[str, list[dict[str, Any]]] | None = None,
    title: str = "Room correction report",
    dpi: int = 90,
    comparison: dict[str, Any] | None = None,
    through: dict[str, Any] | None = None,
    facts: list[str] | None = None,
    figures: dict[str, Any] | None = None,
    files: tuple[list[dict[str, Any]], str] | None = None,
    causes: list[dict[str, Any]] | None = None,
) -> Report:
    """Compute every section and figure of the report.

    Sections come in :data:`SECTION_TITLES` order; the per-channel ones
    (:data:`CHANNEL_SECTIONS`) hold one :class:`Column` per loudspeaker channel,
    drawn side by side.

    Parameters
    ----------
    curves : dict
        Layout of :func:`roomcorr.deliver.export.load_design_curves`. A measurement
        session without a design gives ``channels`` with only ``name``,
        ``index``, ``measured_db``, ``average_db`` and ``firs`` empty; the
        design sections are then left out.
    settings : dict, optional
        :func:`roomcorr.settings.settings_to_dict` of the design (caps in force).
    quality : list of dict, optional
        Per-recording quality figures (:func:`quality_from_record`).
    iir : dict, optional
        Channel name -> the ``iir/<rate>/<name>.json`` documents of a biquad
        design (one per rate), when the design has one.
    title : str
    dpi : int
        Resolution of the PNGs.
    comparison : dict, optional
        :func:`roomcorr.app.compare.compare_measurements` result (``with_curves=True``)
        against an earlier measurement; adds the comparison section after the
        overview. Left out when None.
    through : dict, optional
        ``through.check`` of a ``measurement.json`` made with ``measure
        --through``: the responses measured through a design's filters
        against that design's prediction (see :func:`through_section`).
    facts : list of str, optional
        Lines under the title (:func:`roomcorr.report.glance.header_lines`).
    figures : dict, optional
        The manifest's figures block (:func:`roomcorr.deliver.figures.figures_of_manifest`):
        the overview and the safety section state these numbers, never their own.
    files : (list of dict, str), optional
        The design's file groups (:func:`roomcorr.deliver.loading.file_groups`)
        and folder name: adds the section on the files and how to load them.
    causes : list of dict, optional
        ``causes`` of the design's manifest (one entry per channel, each with its
        list of causes, :func:`roomcorr.app.placement.causes_for_design`).

    Returns
    -------
    Report
    """

    def png(fig: Any) -> bytes:
        return fg.png_bytes(fig, dpi=dpi)

    ctx = report_context(curves, settings, png, iir, figures)
    designed = ctx.designed
    overview = Section("overview", SECTION_TITLES["overview"])
    if designed:
        overview.paragraphs.extend(
            glance.glance_sentences(curves, ctx.caps["max_boost_db"], ctx.figures)
        )
    else:
        overview.paragraphs.append(
            "This folder holds measurements only; run the design step to see a correction."
        )
    sections = [overview]
    if comparison is not None:
        sections.append(comparison_section(comparison))
        overview.paragraphs.append(_comparison_sentence(comparison))
    if designed:  # every sentence, channel by channel, below the short overview
        changes = Section("changes", SECTION_TITLES["changes"])
        changes.paragraphs.extend(
            summary_sentences(curves, ctx.caps["max_boost_db"], ctx.figures, latency=False)
        )
        sections.append(changes)
    if designed:
        sections.extend(system_sections(curves, png))
    chans = [_channel(curves, ch, ctx) for ch in curves["channels"]]
    for sec_id, intro, build in CHANNEL_SECTIONS:
        if sec_id == "time" and ctx.mixed:
            intro = TIME_INTRO_MIXED
        sec = channel_section(sec_id, intro, chans, ctx, build)
        if sec is not None:
            sections.append(sec)
    if ctx.ringing_notes and designed:
        overview.paragraphs.append(
            "Loudest ringing after the sound stops: " + "; ".join(ctx.ringing_notes)
            + " (see the low-frequency decay maps)."
        )
    if causes and any(e.get("causes") for e in causes):
        sections.append(causes_section(causes))
    if quality:
        sections.append(_quality_section(quality, png))
    if through and "measured_db" in through:
        sections.append(through_section(through, [str(c["name"]) for c in curves["channels"]], png))
        overview.paragraphs.append(_through_sentence(through))
    if designed:
        sections.append(_safety_section(chans, curves, ctx))
    if designed and files is not None:
        table, paragraphs = files_parts(*files)
        sections.append(Section("files", SECTION_TITLES["files"], paragraphs, table=table))
    return Report(title=title, subtitle=f"measured at {ctx.fs} Hz", sections=sections,
                  facts=list(facts or []))


def causes_section(causes: list[dict[str, Any]]) -> Section:
    """The cause of each peak and withheld dip, as stored in the manifest."""
    sec = Section("causes", SECTION_TITLES["causes"])
    sec.paragraphs.append(
        "A physical cause for each significant peak and each dip whose boost was withheld: "
        "a room mode, a nearby surface's reflection cancelling the direct sound, a "
        "cancellation that differs between positions, or unknown. Filters can lower peaks; "
        "dips move only when a loudspeaker or the seat moves (roomcorr advise)."
    )
    table = [["Channel", "Frequency", "Kind", "Cause"]]
    for entry in causes:
        for item in entry.get("causes", []):
            table.append([str(entry.get("channel", "")), f"{float(item['freq_hz']):.0f} Hz",
                          str(item.get("kind", "")), str(item.get("text", ""))])
    sec.table = table
    return sec


def _through_ranges(ranges: list[list[float]]) -> str:
    return ", ".join(f"{fmt_hz(lo)} to {fmt_hz(hi)}" for lo, hi in ranges[:5]) or "nowhere"


def through_section(check: dict[str, Any], names: list[str], png: Any) -> Section:
    """Measured through the filters against the design's prediction, one column per channel.

    ``check`` is ``through.check`` of ``measurement.json``: ``freq_hz``,
    ``measured_db`` and ``predicted_db`` (positions x channels x freqs, 1/6
    octave), ``positions``, ``limit_db`` and ``over_limit_hz`` (per position and
    channel, the ranges where the two differ by more than ``limit_db``).
    """

    freq = np.asarray(check["freq_hz"], dtype=float)
    meas = np.asarray(check["measured_db"], dtype=float)
    pred = np.asarray(check["predicted_db"], dtype=float)
    limit = float(check.get("limit_db", 1.0))
    positions = list(check.get("positions") or range(1, meas.shape[0] + 1))
    over = check.get("over_limit_hz") or []
    sec = Section("through", SECTION_TITLES["through"])
    sec.paragraphs.append(
        "The sweeps were played through the design's filters (pre-gain included) and "
        "compared with what the design predicted for the same positions "
        f"({float(check.get('smoothing_oct', 1 / 6)):.2g}-octave smoothing). Where the two "
        f"differ by more than {limit:g} dB, the room or the microphone position changed, or "
        "the filters are not loaded as designed."
    )
    for c in range(meas.shape[1]):
        name = names[c] if c < len(names) else f"channel {c + 1}"
        col = Column(name)
        for i, pos in enumerate(positions):
            ranges = over[i][c] if i < len(over) and c < len(over[i]) else []
            col.paragraphs.append(
                f"Position {pos}: more than {limit:g} dB apart {_through_ranges(ranges)}."
            )
        col.figures.append(
            Figure(
                f"{name}-through",
                f"Measured through the filters against the prediction, {name}",
                png(fg.plot_through(freq, meas[:, c], pred[:, c], positions, f"Through: {name}")),
            )
        )
        sec.columns.append(col)
    return sec


def _through_sentence(check: dict[str, Any]) -> str:
    over = check.get("over_limit_hz") or []
    n_bad = sum(1 for per_pos in over for ranges in per_pos if ranges)
    n_all = sum(len(per_pos) for per_pos in over)
    limit = float(check.get("limit_db", 1.0))
    if n_bad == 0:
        return (
            f"Measured through the filters, every position stays within {limit:g} dB of the "
            "design's prediction."
        )
    return (
        f"Measured through the filters, {n_bad} of {n_all} loudspeaker positions differ from "
        f"the design's prediction by more than {limit:g} dB somewhere (see that section)."
    )


_CSS = """
body{margin:0;font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#24313f;
background:#f6f7f9;line-height:1.45}
header{background:#155e6b;color:#fff;padding:18px 28px}
header h1{margin:0;font-size:1.5em}header p{margin:4px 0 0;opacity:.85}
header p.fact{font-size:.92em;opacity:.95}
nav{background:#e3eaef;padding:8px 28px;font-size:.9em}
nav a{color:#155e6b;margin-right:14px;text-decoration:none}
main{max-width:1760px;margin:0 auto;padding:10px 20px 40px}
section{background:#fff;border-radius:6px;margin:18px 0;padding:14px 22px;
box-shadow:0 1px 2px rgba(0,0,0,.08)}
section h2{font-size:1.2em;color:#155e6b;margin:4px 0 10px;border-bottom:2px solid #e3eaef}
#overview{border-left:6px solid #c8553d}
#safety{border-left:6px solid #b8892b}
figure{margin:12px 0}figure img{max-width:100%;height:auto;display:block}
figcaption{font-size:.85em;color:#5b6877}
table{border-collapse:collapse;font-size:.9em;margin:8px 0}
td,th{border:1px solid #d5dce3;padding:3px 10px;text-align:right}
th{background:#eef2f5}
#compare td:last-child{text-align:left}
.channels{display:grid;grid-template-columns:repeat(auto-fit,minmax(min(100%,480px),1fr));
gap:8px 24px;align-items:start}
.channel{min-width:0}.channel h3{margin:8px 0 2px;font-size:1.05em;color:#155e6b}
.scroll{overflow-x:auto}
details{margin:6px 0}summary{cursor:pointer;color:#155e6b}
"""


def _render_block(paragraphs: list[str], table: list[list[str]] | None,
                  figures: list[Figure]) -> list[str]:
    """Paragraphs, table and figures of a section or a column, as HTML pieces."""
    esc = html.escape
    parts = [f"<p>{esc(p)}</p>" for p in paragraphs]
    if table:
        head = "".join(f"<th>{esc(h)}</th>" for h in table[0])
        body = "".join(
            "<tr>" + "".join(f"<td>{esc(v)}</td>" for v in row) + "</tr>" for row in table[1:]
        )
        parts.append(f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
                     f"<tbody>{body}</tbody></table></div>")
    for f in figures:
        b64 = base64.b64encode(f.png).decode("ascii")
        parts.append(
            f'<figure data-figure="{esc(f.key)}"><img alt="{esc(f.caption)}" '
            f'src="data:image/png;base64,{b64}"><figcaption>{esc(f.caption)}</figcaption>'
            "</figure>"
        )
    return parts


def render_html(report: Report) -> str:
    """The page as one string: inline CSS, figures as base64 data URIs, no external links.

    A section's channel columns sit side by side in a CSS grid (one below the
    other on a narrow window); no script is needed.
    """
    esc = html.escape
    nav = " ".join(f'<a href="#{esc(s.id)}">{esc(s.title)}</a>' for s in report.sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(report.title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{esc(report.title)}</h1><p>{esc(report.subtitle)}</p>"
        + "".join(f'<p class="fact">{esc(line)}</p>' for line in report.facts)
        + "</header>",
        f"<nav>{nav}</nav><main>",
    ]
    for s in report.sections:
        parts.append(f'<section id="{esc(s.id)}"><h2>{esc(s.title)}</h2>')
        if s.id == "overview" and s.paragraphs:
            parts.append("<ul>" + "".join(f"<li>{esc(p)}</li>" for p in s.paragraphs) + "</ul>")
            parts.extend(_render_block([], s.table, s.figures))
        else:
            parts.extend(_render_block(s.paragraphs, s.table, s.figures))
        if s.columns:
            parts.append('<div class="channels">')
            for c in s.columns:
                parts.append(f'<div class="channel" id="{esc(s.id)}-{esc(c.channel)}" '
                             f'data-channel="{esc(c.channel)}"><h3>{esc(c.channel)}</h3>')
                parts.extend(_render_block(c.paragraphs, [], []))
                if c.details:
                    summary, paras = c.details
                    parts.append(f"<details><summary>{esc(summary)}</summary>")
                    parts.extend(_render_block(paras, [], []))
                    parts.append("</details>")
                parts.extend(_render_block([], c.table, c.figures))
                parts.append("</div>")
            parts.append("</div>")
        parts.append("</section>")
    parts.append("</main></body></html>")
    return "\n".join(parts)


def _read_through(folder: Path) -> dict[str, Any] | None:
    """``through.check`` of a measurement made with ``measure --through`` (None otherwise)."""

    data = measurement_record(folder)  # a damaged record is one line, never a traceback
    check = (data.get("through") or {}).get("check") if data is not None else None
    return check if isinstance(check, dict) and "measured_db" in check else None


def _read_quality(folder: Path) -> list[dict[str, Any]] | None:
    data = measurement_record(folder)  # a damaged record is one line, never a traceback
    return quality_from_record(data) if data is not None else None


def _read_iir(folder: Path) -> dict[str, list[dict[str, Any]]] | None:
    """The biquad documents ``iir/<rate>/<name>.json`` of a design folder, by channel name."""
    out: dict[str, list[dict[str, Any]]] = {}
    for p in sorted(folder.glob("iir/*/*.json")):
        try:
            doc = read_json(p, "biquad file")
        except RoomcorrError:
            continue
        if isinstance(doc, dict) and doc.get("format") == "roomcorr-iir":
            out.setdefault(str(doc.get("channel_name", p.stem)), []).append(doc)
    return out or None


def _session_curves(folder: Path) -> dict[str, Any]:
    """Curves of a measurement session folder (IR WAVs, no design)."""

    wavs: list[Path] = []
    data = measurement_record(folder)  # the session's own list of impulse responses, in order
    if data is not None:
        try:
            positions = data.get("positions", [])
            wavs = [contained(folder, p["file"]) for p in positions if p.get("file")]
        except PathEscapeError as exc:
            raise InputFileError(f"{folder / 'measurement.json'}: damaged record: {exc}") from None
    if not wavs:
        wavs = sorted(p for p in folder.glob("*.wav"))
    if not wavs:
        raise InputFileError(
            f"{folder}: neither a design folder (manifest.json, design.npz) nor a measurement "
            "folder (impulse-response WAVs); point report at one of those"
        )
    irs, fs, _ = read_ir_set(wavs)
    freq = log_grid()
    measured, _ = analyse_positions(irs, fs, freq)
    channels = []
    for c, name in enumerate(default_channel_names(irs.shape[1])):
        avg, spread = power_average(measured[:, c])
        channels.append({"index": c, "name": name, "measured_db": measured[:, c],
                         "average_db": avg, "spread_db": spread})
    return {"freq_hz": freq, "fs_in": fs, "pre_gain_db": 0.0, "irs": irs, "firs": {},
            "channels": channels}


def _how_measured(folder: Path) -> str:
    """The sweep of a measurement folder's record, or that its responses came as WAV files."""
    try:
        record = read_json(folder / "measurement.json", "measurement.json")
        ms = record["settings"]
        return (
            f"sweeps {float(ms['f_start_hz']):g} Hz to {float(ms['f_end_hz']):g} Hz, "
            f"{float(ms['sweep_s']):g} s, peak {float(ms['level_dbfs']):g} dBFS, "
            f"{int(ms['repeats'])} per loudspeaker"
        )
    except (RoomcorrError, OSError, ValueError, KeyError, TypeError):
        return "impulse responses read from WAV files"


def _facts(d: Path, manifest: dict[str, Any] | None, curves: dict[str, Any]) -> list[str]:
    """The header's lines for a design (``manifest`` given) or measurement folder."""
    names = [str(ch["name"]) for ch in curves["channels"]]
    if manifest is not None:
        sources = [Path(str(m)) for m in manifest.get("measurements") or []]
        positions = [p.stem for p in sources]
        measured_in = sources[0].parent if sources else None
        m_id = manifest.get("measurement")
        m_id = str(m_id) if m_id else (measured_in.name if measured_in is not None else None)
    else:
        positions = [p.stem for p in sorted(d.glob("*.wav"))]
        measured_in, m_id = d, None
    what = _how_measured(measured_in) if measured_in is not None else None
    return glance.header_lines(d.name, manifest is not None, m_id, positions, names,
                               int(curves["fs_in"]), what)


def _complete(run_dir: Path) -> bool:
    try:
        data = read_json(run_dir / COMPLETE_MARKER, COMPLETE_MARKER)
    except RoomcorrError:
        return False
    return isinstance(data, dict) and data.get("complete") is True


def _ours(d: Path) -> bool:
    """Whether folder ``d`` was written by roomcorr (a design, a measurement or a room run),
    so its report may go into it; someone else's folder of WAVs is never written to."""

    if (d / "complete.json").is_file():
        return True
    if (d / "manifest.json").is_file():
        try:
            return read_manifest(d).get("generator") == "roomcorr"
        except OutputError:
            return False
    try:
        record = read_json(d / "measurement.json", "measurement.json")
    except RoomcorrError:
        return False
    return isinstance(record, dict)


def report_destination(folder: str | Path, out_dir: str | Path | None = None) -> Path:
    """The folder ``roomcorr report FOLDER [--out OUT_DIR]`` writes into.

    Default: ``folder`` itself when roomcorr wrote it (a design folder, a
    measurement folder, a run of a room: the report goes beside the run as
    before), else a new folder ``<name>-report`` in the working folder. A
    given or default folder must be new, empty or hold an earlier report only.

    Raises
    ------
    OutputError
        For a destination that is a link, a file, a finished room run (other
        than the reported run itself), or a folder holding other files.
    """

    d = Path(folder)
    if out_dir is None:
        dest = d if _ours(d) else Path.cwd() / f"{d.resolve().name}-report"
        option = "report" if dest == d else f"report (default --out {dest})"
    else:
        dest = Path(out_dir)
        option = f"--out {out_dir}"
    check_folder_target(dest, option)
    if dest.exists() and dest.resolve() == d.resolve():
        return dest  # the folder itself (a finished run: its report goes beside its files)
    refuse_finished_run(dest, option)
    if not dest.exists():
        return dest
    others = sorted(p.name for p in dest.iterdir() if p.name not in (REPORT_HTML, FIG_DIR))
    if others:
        raise OutputError(
            f"{option}: holds {others[0]}, which is not a roomcorr report; choose a new or "
            "empty folder with --out"
        )
    return dest


def check_report_folder(folder: str | Path) -> None:
    """Raise :class:`~roomcorr.errors.InputFileError` unless ``folder`` can be reported:
    it must exist, and must not be a damaged run of a room (named, not reported)."""

    d = Path(folder)
    if not d.is_dir():
        raise InputFileError(f"{d}: no such folder; give a design or measurement folder")
    rooms.verified(rooms.find_room(d), d)


def write_report(
    folder: str | Path,
    dpi: int = 90,
    comparison: dict[str, Any] | None = None,
    out_dir: str | Path | None = None,
) -> Path:
    """Write ``report.html`` and ``report/*.png`` about a design or measurement folder.

    Parameters
    ----------
    folder : path
        A design output folder (``manifest.json`` + ``design.npz``) or a
        measurement session folder (impulse-response WAVs, optional
        ``measurement.json``).
    dpi : int
    comparison : dict, optional
        The comparison section's data
        (:func:`roomcorr.app.report.report_comparison` works it out); without
        it the report has no comparison section.
    out_dir : path, optional
        Where to write (see :func:`report_destination` for the default).

    Returns
    -------
    Path of ``report.html``.

    Notes
    -----
    The figures are written into a temporary folder that replaces
    ``report/`` only when all of them and ``report.html`` are complete, so
    an interrupted or failed report leaves the earlier one whole and nothing
    half-written; a new destination folder appears only when it is complete.
    """

    d = Path(folder)
    check_report_folder(d)
    dest = report_destination(d, out_dir)
    is_design = (d / "manifest.json").is_file() and (d / "design.npz").is_file()
    settings = None
    through = None
    if is_design:
        if not (d / "complete.json").is_file():  # a run of a room is checked by its record
            # every file the manifest lists, with its SHA-256, and nothing else: a deleted
            # or changed filter is named, never redrawn from design.npz
            changed = design_differences(d)
            if changed:
                more = f" (and {len(changed) - 1} more)" if len(changed) > 1 else ""
                raise OutputError(
                    f"{d}: the design folder changed since it was written: {changed[0]}{more}; "
                    "design again (--replace) to make it whole"
                )
        curves = load_design_curves(d)
        manifest = read_manifest(d)
        settings = manifest.get("settings")
        figures = figures_of_manifest(manifest)
        quality = None
        for src in manifest.get("measurements") or []:  # the folder the IRs came from
            parent = Path(str(src)).parent
            if not parent.is_absolute():
                parent = Path.cwd() / parent
            if (parent / "measurement.json").is_file():
                quality = _read_quality(parent)
                break
    else:
        figures = None
        curves = _session_curves(d)
        quality = _read_quality(d)
        through = _read_through(d)
    iir = _read_iir(d) if is_design else None
    facts = _facts(d, manifest if is_design else None, curves)
    report = build_report(
        curves, settings, quality, iir=iir, dpi=dpi, comparison=comparison, through=through,
        facts=facts,
        figures=figures,
        files=(file_groups(manifest), d.name) if is_design else None,
        causes=manifest.get("causes") if is_design else None,
    )
    basis = manifest.get("timing_basis") if is_design else None
    if isinstance(basis, dict) and isinstance(basis.get("label"), str):
        report.sections[0].paragraphs.append(  # the manifest's words (measure/timing.py)
            f"Timing basis of the measurement behind this design: {basis['label']}."
        )
    # A finished room run is sealed by its complete.json (SHA-256 of every file,
    # manifest included): the report is added beside it, never into its manifest.
    same = dest.resolve() == d.resolve()
    _write_report_files(
        dest, report, list_in_manifest=same and is_design and not (d / "complete.json").is_file()
    )
    return dest / REPORT_HTML


def _list_report_in_manifest(d: Path, written: list[str]) -> None:
    manifest = read_manifest(d)
    known = {e.get("path") for e in manifest.get("files", [])}
    if known & {*written, REPORT_HTML}:  # a report written before: refresh its digests
        manifest["files"] = [
            e
            for e in manifest["files"]
            if not str(e["path"]).startswith(f"{FIG_DIR}/") or e["path"] in written
        ]  # figures the new report no longer has went with the old report/
        for e in manifest["files"]:
            if e.get("path") in {*written, REPORT_HTML}:
                e["sha256"] = sha256_of(d / e["path"])
        write_manifest(d, manifest)
    entries = [{"path": p, "kind": "report-figure"} for p in written if p not in known]
    if REPORT_HTML not in known:
        entries.append({"path": REPORT_HTML, "kind": "report"})
    if entries:
        add_manifest_entries(d, entries)


def _write_report_files(dest: Path, report: Report, list_in_manifest: bool) -> list[str]:
    """Write the figures and the page (and their manifest entries) into ``dest``, all or
    nothing: the folder is built beside ``dest`` and swapped in when complete."""


    figures = [f for s in report.sections for f in s.all_figures()]
    written = [f"{FIG_DIR}/{f.key}.png" for f in figures]
    page = render_html(report)
    # ``roomcorr report .``: the folder is replaced as a whole like any other (all or
    # nothing under a kill); this process then stands in the new folder, and a shell
    # standing in the old one finds the new one with ``cd .`` (the command says so).
    here = dest.exists() and holds_working_folder(dest)
    absolute = dest.resolve()
    try:
        with staged_copy(absolute) if dest.exists() else staged_folder(absolute) as stage:
            if (stage / FIG_DIR).is_dir():
                shutil.rmtree(stage / FIG_DIR)  # links to the old figures; they stay intact
            (stage / FIG_DIR).mkdir()
            for f, rel in zip(figures, written, strict=True):
                atomic_write_bytes(stage / rel, f.png)
            atomic_write_text(stage / REPORT_HTML, page)
            if list_in_manifest:
                _list_report_in_manifest(stage, written)
        if here:
            os.chdir(absolute)
    except OSError as exc:
        raise OutputError(f"{dest}: cannot write the report ({disk_error_text(exc)})") from None
    return written
