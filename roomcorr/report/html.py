"""One self-contained HTML page (plus PNG files) about a design or a measurement session.

:func:`build_report` turns the curves of a design (layout of
:func:`roomcorr.export.load_design_curves`) into sections with figures and
tables; :func:`render_html` makes the page (figures embedded as base64 PNG,
inline styles, no network access); :func:`write_report` does the file work
for ``roomcorr report DIR``: it reads DIR, writes ``DIR/report/*.png`` and
``DIR/report.html`` through the atomic-write helper, and adds them to the
manifest of a design folder.
"""

from __future__ import annotations

import base64
import html
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.report.summary import fmt_hz, summary_sentences, withheld_regions

REPORT_HTML = "report.html"
FIG_DIR = "report"

#: Section ids, in page order (per channel sections get a ``-<channel>`` suffix).
SECTION_TITLES = {
    "overview": "At a glance",
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
    "safety": "Safety and levels",
}


@dataclass
class Figure:
    """One PNG figure of the report."""

    key: str
    caption: str
    png: bytes


@dataclass
class Section:
    """One section of the page."""

    id: str
    title: str
    paragraphs: list[str] = field(default_factory=list)
    figures: list[Figure] = field(default_factory=list)
    table: list[list[str]] | None = None  # first row is the header


@dataclass
class Report:
    title: str
    subtitle: str
    sections: list[Section]


def _fir_for(curves: dict[str, Any], index: int) -> tuple[np.ndarray | None, int | None]:
    """The exported filter at the measurement rate (or the nearest rate)."""
    firs = curves.get("firs") or {}
    if not firs:
        return None, None
    fs = int(curves["fs_in"])
    rate = fs if fs in firs else min(firs, key=lambda r: abs(r - fs))
    return np.asarray(firs[rate][index], dtype=float), int(rate)


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
    from scipy.signal import fftconvolve

    from roomcorr.pipeline import analyse_positions

    n = irs.shape[-1]
    conv = fftconvolve(irs, fir[None, :], axes=-1)[:, :n]
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
    interpolation between bins at most ``fs / min_fft`` apart. Frequencies at
    or above Nyquist give NaN.
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
    return gain, phase, gd


def _mean_band_decay(per_position: list[list[Any]]) -> list[Any]:
    """Band values averaged over positions; curves of the first position; valid only if all are."""
    from roomcorr.analysis.decay import BandDecay

    out = []
    for k, first in enumerate(per_position[0]):
        rows = [pos[k] for pos in per_position if k < len(pos)]
        out.append(
            BandDecay(
                centre_hz=first.centre_hz,
                label=first.label,
                edt_s=float(np.nanmean([r.edt_s for r in rows])),
                t20_s=float(np.nanmean([r.t20_s for r in rows])),
                t30_s=float(np.nanmean([r.t30_s for r in rows])),
                valid={key: all(r.valid[key] for r in rows) for key in first.valid},
                curve=first.curve,
            )
        )
    return out


def _decay_table(bands: list[Any]) -> list[list[str]]:
    def cell(v: float, ok: bool) -> str:
        if not np.isfinite(v):
            return "n/a"
        return f"{v:.2f}" + ("" if ok else " *")

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
    from roomcorr.report import figures as fg

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
        if not g.get("passed", True)
    ]
    if failed:
        sec.paragraphs.append("Checks that failed (kept on request): " + "; ".join(failed) + ".")
    else:
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
    from scipy.signal import sosfreqz

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


def _iir_section(freq, ch, docs, fir, rate, pre_gain, band, png) -> Section:
    from roomcorr.report import figures as fg

    name = str(ch["name"])
    sec = Section(f"iir-{name}", f"{SECTION_TITLES['iir']}: {name}")
    cascades = {int(d["sample_rate"]): iir_response_db(d, freq) for d in docs}
    fir_db = filter_response(fir, rate, freq)[0] if fir is not None else None
    doc = min(docs, key=lambda d: abs(int(d["sample_rate"]) - 48000))
    figs = doc.get("figures") or {}
    sec.paragraphs.append(
        f"{len(doc.get('sections') or [])} biquad sections (Audio EQ Cookbook forms) fitted to "
        "the same correction, for players that take parametric filters instead of an FIR; "
        "the table lists the sections at "
        f"{doc['sample_rate']} Hz. Peak gain {figs.get('peak_gain_db', float('nan')):.2f} dB, "
        f"worst-case gain {figs.get('worst_case_gain_db', float('nan')):.2f} dB, fit error "
        f"{figs.get('fit_rms_error_db', float('nan')):.2f} dB rms."
    )
    rows = [["section", "type", "frequency (Hz)", "gain (dB)", "Q"]]
    for i, sct in enumerate(doc.get("sections") or [], start=1):
        rows.append([str(i), str(sct.get("type")), f"{float(sct.get('freq_hz', 0)):.1f}",
                     f"{float(sct.get('gain_db', 0)):.2f}", f"{float(sct.get('q', 0)):.2f}"])
    sec.table = rows
    sec.figures.append(
        Figure(f"{name}-iir", f"Biquad cascade against the FIR, {name}",
               png(fg.plot_iir(freq, cascades, fir_db,
                               np.asarray(ch["correction_db"]) + pre_gain, band,
                               f"Biquads: {name}")))
    )
    return sec


def _channel_sentences(block: list[str]) -> str:
    """One channel's lines of :func:`roomcorr.room.format_comparison` as plain sentences.

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
        :func:`roomcorr.room.compare_measurements` result with ``with_curves=True``
        (``before`` and ``after`` are shown as given).

    Returns
    -------
    Section
        Id ``compare``; one figure (key ``compare``, from
        :func:`roomcorr.room.comparison_png`); table rows ``channel, arrival
        change (ms), distance change (m), level change (dB), what changed``, the
        last column holding that channel's sentences of
        :func:`roomcorr.room.format_comparison`.
    """
    from roomcorr.room import comparison_png, format_comparison

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
        rows.append([str(ch["name"]), f"{ch['arrival_change_ms']:+.3f}",
                     f"{ch['distance_change_m']:+.3f}", f"{ch['level_change_db']:+.2f}", text])
    sec.table = rows
    sec.figures.append(
        Figure("compare", "Before and after, both responses overlaid per channel",
               comparison_png(res))
    )
    return sec


def _comparison_sentence(res: dict[str, Any]) -> str:
    parts = [
        f"{ch['name']} {ch['distance_change_m']:+.3f} m, {ch['level_change_db']:+.1f} dB"
        for ch in res["channels"]
    ]
    return (
        f"Since the earlier measurement ({res['before']}): " + "; ".join(parts)
        + " (distance and level changes; see the comparison section)."
    )


def mixed_phase_section(
    mixed: dict[str, Any] | None, channel: int, name: str, png: Any
) -> Section | None:
    """The mixed-phase section of one channel, or ``None`` for a minimum-phase design.

    ``mixed`` is the ``mixed_phase`` entry of :func:`roomcorr.export.load_design_curves`.
    """
    from roomcorr.design.mixedphase import (
        LATENCY_CAUTION,
        PRE_RING_LIMIT_DB,
        PRE_RING_S,
        latency_sentence,
    )
    from roomcorr.report import figures as fg

    if not mixed or channel >= len(mixed["channels"]):
        return None
    ch = mixed["channels"][channel]
    sec = Section(f"phase-{name}", f"{SECTION_TITLES['phase']}: {name}")
    sec.paragraphs.append(latency_sentence(mixed["latency_ms"], mixed["latency_samples"]))
    lo, hi = (float(x) for x in ch["band_hz"])
    sec.paragraphs.append(
        f"The loudspeaker's excess phase (the measured phase minus that of the minimum-phase "
        f"response with the same magnitude) was estimated from the direct sound of every "
        f"position, before the first strong reflection, and undone between {fmt_hz(lo)} and "
        f"{fmt_hz(hi)} where the positions agree. Below that the room owns the phase, and "
        "the filter leaves it alone (a pure delay). The magnitude is the minimum-phase "
        "design's."
    )
    if "view_gd_s" in ch:
        view = {k[len("view_") :]: v for k, v in ch.items() if k.startswith("view_")}
        sec.figures.append(
            Figure(
                f"{name}-phase",
                f"Direct sound before and after, and pre-ringing, {name}",
                png(
                    fg.plot_mixed_phase(
                        view,
                        float(mixed["latency_ms"]),
                        PRE_RING_LIMIT_DB,
                        1000 * PRE_RING_S,
                        f"Mixed phase: {name}",
                    )
                ),
            )
        )
    else:
        sec.paragraphs.append(
            "No filter was designed at the measurement's sample rate, so the direct sound "
            "could not be shown before and after."
        )
    sec.paragraphs.append(LATENCY_CAUTION)
    return sec


def _design_caps(settings: dict[str, Any] | None) -> dict[str, Any]:
    d = (settings or {}).get("design", {}) if isinstance(settings, dict) else {}
    return {
        "max_boost_db": d.get("max_boost_db"),
        "max_cut_db": d.get("max_cut_db"),
        "ceiling_db": d.get("ceiling_db", 0.0),
        "allow_gain": d.get("allow_gain", False),
    }


def build_report(
    curves: dict[str, Any],
    settings: dict[str, Any] | None = None,
    quality: list[dict[str, Any]] | None = None,
    iir: dict[str, list[dict[str, Any]]] | None = None,
    title: str = "Room correction report",
    dpi: int = 90,
    comparison: dict[str, Any] | None = None,
) -> Report:
    """Compute every section and figure of the report.

    Parameters
    ----------
    curves : dict
        Layout of :func:`roomcorr.export.load_design_curves`. A measurement
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
        :func:`roomcorr.room.compare_measurements` result (``with_curves=True``)
        against an earlier measurement; adds the comparison section after the
        overview. Left out when None.

    Returns
    -------
    Report
    """
    from roomcorr.analysis.decay import low_frequency_decay_map, octave_band_decay, ringing_modes
    from roomcorr.report import figures as fg

    def png(fig: Any) -> bytes:
        return fg.png_bytes(fig, dpi=dpi)

    freq = np.asarray(curves["freq_hz"], dtype=float)
    fs = int(curves["fs_in"])
    irs = curves.get("irs")
    caps = _design_caps(settings)
    max_boost = caps["max_boost_db"]
    pre_gain = float(curves.get("pre_gain_db", 0.0))
    designed = bool(curves.get("firs")) and all(
        "correction_db" in ch for ch in curves["channels"]
    )

    overview = Section("overview", SECTION_TITLES["overview"])
    if designed:
        overview.paragraphs.extend(summary_sentences(curves, max_boost))
    else:
        overview.paragraphs.append(
            "This folder holds measurements only; run the design step to see a correction."
        )
    sections = [overview]
    if comparison is not None:
        sections.append(comparison_section(comparison))
        overview.paragraphs.append(_comparison_sentence(comparison))
    ringing_notes: list[str] = []
    safety_rows = [["channel", "rate (Hz)", "taps", "peak gain (dB)", "worst-case gain (dB)"]]

    for ch in curves["channels"]:
        c = int(ch["index"])
        name = str(ch["name"])
        tag = f"{name} ({len(ch['measured_db'])} positions)"
        band = tuple(ch["band_hz"]) if "band_hz" in ch else None
        room = Section(f"room-{name}", f"{SECTION_TITLES['room']}: {name}")
        room.paragraphs.append(
            "Thin lines are the individual microphone positions, the thick line is their power "
            "average. Grey areas lie outside the correction band."
        )
        room.figures.append(
            Figure(
                f"{name}-room",
                f"Measured response, {name}",
                png(
                    fg.plot_responses(
                        freq, ch["measured_db"], ch["average_db"], ch.get("target_db"), band,
                        max_boost, f"Measured: {tag}",
                    )
                ),
            )
        )
        sections.append(room)

        fir, rate = _fir_for(curves, c) if designed else (None, None)
        corrected = None
        if fir is not None and irs is not None:
            pos_irs = np.asarray(irs)[:, c]
            if rate == fs:
                predicted, corrected = predicted_responses(
                    pos_irs, fs, fir, freq, ch["measured_db"]
                )
                how = "each measured response convolved with the exported filter"
            else:  # no filter at the measurement rate: apply the filter's response
                from roomcorr.design.fir import fir_response_db

                predicted = ch["measured_db"] + fir_response_db(fir, rate, freq)[None, :]
                how = f"the {rate} Hz filter's response added to each measured response"
            res = Section(f"result-{name}", f"{SECTION_TITLES['result']}: {name}")
            res.paragraphs.append(
                f"Predicted from {how}, analysed with the same window and smoothing as the "
                "measurement. The filters include the pre-gain, so the target is drawn lowered "
                "by it. Lines close to the target at every position mean the correction holds "
                "across the listening area."
            )
            res.figures.append(
                Figure(
                    f"{name}-result",
                    f"Predicted result, {name}",
                    png(fg.plot_predicted(freq, predicted, ch["average_db"],
                                          np.asarray(ch["target_db"]) + pre_gain, band,
                                          f"Corrected: {tag}", pre_gain)),
                )
            )
            sections.append(res)

            gain, phase, gd = filter_response(fir, rate, freq)
            flt = Section(f"filter-{name}", f"{SECTION_TITLES['filter']}: {name}")
            flt.paragraphs.append(
                f"Minimum-phase FIR at {rate} Hz, {len(fir)} taps, pre-gain {pre_gain:.1f} dB "
                "included. Pink areas mark frequencies where boost was wanted but refused."
            )
            regions = withheld_regions(freq, ch, max_boost)
            if regions:
                reasons = {
                    "cancellation": "the dip is a cancellation that moves with the listener, "
                    "so boost would burn headroom for nothing",
                    "spread": "the positions disagree too much there",
                    "cap": "the boost cap was reached",
                }
                for r in regions[:4]:
                    flt.paragraphs.append(
                        f"Boost refused around {fmt_hz(r['freq_hz'])} "
                        f"({fmt_hz(r['lo_hz'])} to {fmt_hz(r['hi_hz'])}, "
                        f"{r['withheld_db']:.1f} dB withheld): {reasons[r['reason']]}."
                    )
            else:
                flt.paragraphs.append("No boost was refused.")
            flt.figures.append(
                Figure(
                    f"{name}-filter",
                    f"Filter magnitude, phase and group delay, {name}",
                    png(fg.plot_filter(freq, gain, phase, gd, ch["correction_db"],
                                       ch["boost_withheld_db"], band, pre_gain, rate,
                                       f"Filter: {name}")),
                )
            )
            sections.append(flt)

            if corrected is not None:
                tm = Section(f"time-{name}", f"{SECTION_TITLES['time']}: {name}")
                tm.paragraphs.append(
                    "Top: the filter alone. Bottom: the first position before and after "
                    "correction. Anything left of 0 ms is pre-ringing; a minimum-phase filter "
                    "has none."
                )
                tm.figures.append(
                    Figure(
                        f"{name}-time",
                        f"Impulse and step response, {name}",
                        png(fg.plot_time(fs, fir, pos_irs[0], corrected[0],
                                         f"Time response: {name}")),
                    )
                )
                sections.append(tm)

        mixed = mixed_phase_section(curves.get("mixed_phase"), c, name, png)
        if mixed is not None:
            sections.append(mixed)

        if iir and iir.get(name) and "correction_db" in ch:
            sections.append(_iir_section(freq, ch, iir[name], fir, rate, pre_gain, band, png))

        per_pos: list[list[Any]] = []
        if irs is not None:
            pos_irs = np.asarray(irs)[:, c]
            try:
                per_pos = [octave_band_decay(pos_irs[p], fs) for p in range(len(pos_irs))]
            except ValueError:  # too short or silent: no decay analysis possible
                per_pos = []
        if per_pos and per_pos[0]:
            bands = _mean_band_decay(per_pos)
            dec = Section(f"decay-{name}", f"{SECTION_TITLES['decay']}: {name}")
            dec.paragraphs.append(
                "Schroeder backward integration per octave band with the noise floor "
                "subtracted and the tail truncated where the decay meets the noise. EDT from "
                "0 to -10 dB, T20 from -5 to -25 dB, T30 from -5 to -35 dB, each extrapolated "
                "to 60 dB (ISO 3382-1), averaged over positions; curves show the first "
                "position. * marks a value whose range comes within 10 dB of the noise floor."
            )
            dec.table = _decay_table(bands)
            dec.figures.append(
                Figure(f"{name}-decay", f"Decay curves and times, {name}",
                       png(fg.plot_decay(bands, f"Decay: {name}")))
            )
            sections.append(dec)

            before_map = low_frequency_decay_map(pos_irs[0], fs)
            modes = ringing_modes(before_map)
            maps = [("as measured", before_map)]
            if corrected is not None:
                maps.append(("corrected", low_frequency_decay_map(corrected[0], fs)))
            rng = Section(f"ringing-{name}", f"{SECTION_TITLES['ringing']}: {name}")
            rng.paragraphs.append(
                "Sliding-window spectra of the first position from 20 to 300 Hz: each row "
                "starts 10 ms later than the one below. A bright ridge reaching high up is a "
                "room mode that keeps ringing after the sound stops."
            )
            if modes:
                txt = ", ".join(f"{f0:.0f} Hz ({t0:.2f} s)" for f0, t0 in modes)
                rng.paragraphs.append(
                    f"Peaks still loudest 200 ms after the sound stops (60 dB decay time): {txt}."
                )
                ringing_notes.append(
                    f"{name} around {fmt_hz(modes[0][0])} ({modes[0][1]:.2f} s to decay 60 dB)"
                )
            rng.figures.append(
                Figure(f"{name}-ringing", f"Low-frequency decay map, {name}",
                       png(fg.plot_decay_map(maps, modes, f"Low-frequency decay: {name}")))
            )
            sections.append(rng)

        if fir is not None:
            from roomcorr.design.fir import peak_gain_db, worst_case_gain_db

            for r in sorted(curves["firs"]):
                h = np.asarray(curves["firs"][r][c], dtype=float)
                safety_rows.append(
                    [name, str(r), str(h.size), f"{peak_gain_db(h, r):.2f}",
                     f"{worst_case_gain_db(h):.2f}"]
                )

    if ringing_notes and designed:
        overview.paragraphs.append(
            "Loudest ringing after the sound stops: " + "; ".join(ringing_notes)
            + " (see the low-frequency decay maps)."
        )
    if quality:
        sections.append(_quality_section(quality, png))

    if designed:
        from roomcorr.design.safety import CAUTIONS

        saf = Section("safety", SECTION_TITLES["safety"])
        mb = "n/a" if max_boost is None else f"{max_boost:g} dB"
        mc = "n/a" if caps["max_cut_db"] is None else f"{caps['max_cut_db']:g} dB"
        saf.paragraphs.append(
            f"Pre-gain {pre_gain:.2f} dB (common to all channels and rates). Caps in force: "
            f"boost at most {mb}, cut at most {mc}, peak gain ceiling "
            f"{caps['ceiling_db']:g} dB" + (" (gain allowed)." if caps["allow_gain"] else ".")
        )
        saf.paragraphs.append(
            "Peak gain is the filter's largest gain between 20 Hz and 20 kHz; worst-case gain "
            "(20 log10 of the sum of |taps|) is the most any input waveform could grow."
        )
        saf.paragraphs.extend(CAUTIONS)
        saf.table = safety_rows
        sections.append(saf)
    return Report(title=title, subtitle=f"measured at {fs} Hz", sections=sections)


_CSS = """
body{margin:0;font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#24313f;
background:#f6f7f9;line-height:1.45}
header{background:#155e6b;color:#fff;padding:18px 28px}
header h1{margin:0;font-size:1.5em}header p{margin:4px 0 0;opacity:.85}
nav{background:#e3eaef;padding:8px 28px;font-size:.9em}
nav a{color:#155e6b;margin-right:14px;text-decoration:none}
main{max-width:1100px;margin:0 auto;padding:10px 20px 40px}
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
"""


def render_html(report: Report) -> str:
    """The page as one string: inline CSS, figures as base64 data URIs, no external links."""
    esc = html.escape
    nav = " ".join(f'<a href="#{esc(s.id)}">{esc(s.title)}</a>' for s in report.sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(report.title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{esc(report.title)}</h1><p>{esc(report.subtitle)}</p></header>",
        f"<nav>{nav}</nav><main>",
    ]
    for s in report.sections:
        parts.append(f'<section id="{esc(s.id)}"><h2>{esc(s.title)}</h2>')
        if s.id == "overview" and s.paragraphs:
            parts.append("<ul>" + "".join(f"<li>{esc(p)}</li>" for p in s.paragraphs) + "</ul>")
        else:
            parts.extend(f"<p>{esc(p)}</p>" for p in s.paragraphs)
        if s.table:
            head = "".join(f"<th>{esc(h)}</th>" for h in s.table[0])
            body = "".join(
                "<tr>" + "".join(f"<td>{esc(v)}</td>" for v in row) + "</tr>"
                for row in s.table[1:]
            )
            parts.append(f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")
        for f in s.figures:
            b64 = base64.b64encode(f.png).decode("ascii")
            parts.append(
                f'<figure data-figure="{esc(f.key)}"><img alt="{esc(f.caption)}" '
                f'src="data:image/png;base64,{b64}"><figcaption>{esc(f.caption)}</figcaption>'
                "</figure>"
            )
        parts.append("</section>")
    parts.append("</main></body></html>")
    return "\n".join(parts)


def _read_quality(folder: Path) -> list[dict[str, Any]] | None:
    p = folder / "measurement.json"
    if not p.is_file():
        return None
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None
    return quality_from_record(data) if isinstance(data, dict) else None


def _read_iir(folder: Path) -> dict[str, list[dict[str, Any]]] | None:
    """The biquad documents ``iir/<rate>/<name>.json`` of a design folder, by channel name."""
    out: dict[str, list[dict[str, Any]]] = {}
    for p in sorted(folder.glob("iir/*/*.json")):
        try:
            doc = json.loads(p.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            continue
        if isinstance(doc, dict) and doc.get("format") == "roomcorr-iir":
            out.setdefault(str(doc.get("channel_name", p.stem)), []).append(doc)
    return out or None


def _session_curves(folder: Path) -> dict[str, Any]:
    """Curves of a measurement session folder (IR WAVs, no design)."""
    from roomcorr.analysis.average import power_average
    from roomcorr.audio_io import read_ir_set
    from roomcorr.errors import InputFileError
    from roomcorr.grid import log_grid
    from roomcorr.pipeline import analyse_positions, default_channel_names

    wavs: list[Path] = []
    record = folder / "measurement.json"
    if record.is_file():  # the session's own list of impulse responses, in order
        try:
            data = json.loads(record.read_text(encoding="utf-8"))
            wavs = [folder / p["file"] for p in data.get("positions", []) if p.get("file")]
        except (OSError, json.JSONDecodeError, AttributeError, TypeError):
            wavs = []
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


def _complete(run_dir: Path) -> bool:
    from roomcorr.room import COMPLETE_MARKER

    try:
        data = json.loads((run_dir / COMPLETE_MARKER).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return False
    return isinstance(data, dict) and data.get("complete") is True


def _source_measurement(d: Path, room: Any) -> tuple[Any, Any]:
    """(room, the measurement behind folder ``d``) or (room, None).

    The measurement is a folder (a measurement run, or ``d`` itself when it is
    a measurement folder) or, for a design outside a room, the list of IR files
    in its manifest.
    """
    from roomcorr import room as rooms

    if not ((d / "manifest.json").is_file() and (d / "design.npz").is_file()):
        return room, d
    try:
        manifest = json.loads((d / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        manifest = {}
    if room is not None and d.parent == room.designs_dir.resolve():
        run = next((r for r in rooms.list_runs(room, "design") if r.path.resolve() == d), None)
        ref = (run.marker.get("info", {}).get("measurement") if run else None) or manifest.get(
            "measurement"
        )
        if not ref and run is not None:
            ref = rooms.design_source(run)
        if ref:
            cand = room.measurements_dir / Path(str(ref)).name
            if cand.is_dir():
                return room, cand
    files = manifest.get("measurements")
    if isinstance(files, list) and files:
        paths = [Path(str(f)) if Path(str(f)).is_absolute() else Path.cwd() / str(f)
                 for f in files]
        parents = {q.parent.resolve() for q in paths}
        if len(parents) == 1:  # all from one measurement run of a room: use that room
            parent = parents.pop()
            other = rooms.find_room(parent)
            if other is not None and parent.parent == other.measurements_dir.resolve():
                return other, parent
        if all(q.is_file() for q in paths):
            return room, [str(q) for q in paths]
    return room, None


def _earlier_measurement(room: Any, after: Any) -> Path | None:
    """The newest complete measurement run of ``room`` older than run folder ``after``."""
    from roomcorr import room as rooms

    if room is None or not isinstance(after, Path):
        return None
    after = after.resolve()
    if after.parent != room.measurements_dir.resolve():
        return None
    runs = rooms.list_runs(room, "measurement")
    idx = next((i for i, r in enumerate(runs) if r.path.resolve() == after), None)
    if idx is None:
        return None
    earlier = [r for r in runs[:idx] if r.complete]
    return earlier[-1].path if earlier else None


def _label(ref: Any, room: Any) -> str:
    if isinstance(ref, list):
        return ", ".join(Path(x).name for x in ref)
    p = Path(ref).resolve()
    if room is not None:
        try:
            return p.relative_to(room.root.resolve()).as_posix()
        except ValueError:
            pass
    return str(p)


def report_comparison(
    folder: str | Path, compare_with: str | Path | None = None
) -> dict[str, Any] | None:
    """The comparison for the report of ``folder``, or None when none is meaningful.

    Parameters
    ----------
    folder : path
        A run folder of a room (a design whose source measurement is recorded
        in its ``complete.json`` info or manifest, or a measurement), or any
        design or measurement folder when ``compare_with`` is given.
    compare_with : path or str, optional
        The earlier measurement: a run id of the room, a measurement folder or a
        WAV file. Default: the newest complete measurement of the room older
        than the one behind ``folder``.

    Returns
    -------
    dict or None
        :func:`roomcorr.room.compare_measurements` result with curves, with
        ``before`` and ``after`` shortened to paths inside the room. None
        without an earlier measurement (or when the automatic comparison is not
        possible, e.g. a different number of loudspeakers).

    Raises
    ------
    InputFileError
        Only when ``compare_with`` is given and cannot be used.
    """
    from roomcorr import room as rooms
    from roomcorr.errors import InputFileError, RoomcorrError

    d = Path(folder).resolve()
    room, after = _source_measurement(d, rooms.find_room(d))
    if compare_with is None:
        before: Any = _earlier_measurement(room, after)
        if before is None:
            return None
        try:
            res = rooms.compare_measurements(before, after, room=room, with_curves=True)
        except RoomcorrError:
            return None
    else:
        if after is None:
            raise InputFileError(
                f"--compare-with: {d} records no measurement it was made from; "
                "report a measurement folder, or a design that names its measurement"
            )
        before = rooms.resolve_run(room or rooms.find_room(), compare_with)
        res = rooms.compare_measurements(before, after, room=room, with_curves=True)
    res["before"] = _label(before, room)
    res["after"] = _label(after, room)
    return res


def write_report(
    folder: str | Path, dpi: int = 90, compare_with: str | Path | None = None
) -> Path:
    """Write ``report.html`` and ``report/*.png`` into a design or measurement folder.

    Parameters
    ----------
    folder : path
        A design output folder (``manifest.json`` + ``design.npz``) or a
        measurement session folder (impulse-response WAVs, optional
        ``measurement.json``).
    dpi : int
    compare_with : path or str, optional
        Earlier measurement for the comparison section (see
        :func:`report_comparison`); by default a run folder of a room is
        compared with the room's previous complete measurement, if any.

    Returns
    -------
    Path of ``report.html``.
    """
    from roomcorr.atomic import atomic_write_bytes, atomic_write_text
    from roomcorr.errors import InputFileError, OutputError

    d = Path(folder)
    if not d.is_dir():
        raise InputFileError(f"{d}: no such folder; give a design or measurement folder")
    is_design = (d / "manifest.json").is_file() and (d / "design.npz").is_file()
    settings = None
    if is_design:
        from roomcorr.export import load_design_curves, read_manifest

        curves = load_design_curves(d)
        manifest = read_manifest(d)
        settings = manifest.get("settings")
        quality = None
        for src in manifest.get("measurements") or []:  # the folder the IRs came from
            parent = Path(str(src)).parent
            if not parent.is_absolute():
                parent = Path.cwd() / parent
            if (parent / "measurement.json").is_file():
                quality = _read_quality(parent)
                break
    else:
        curves = _session_curves(d)
        quality = _read_quality(d)
    iir = _read_iir(d) if is_design else None
    comparison = report_comparison(d, compare_with)
    report = build_report(curves, settings, quality, iir=iir, dpi=dpi, comparison=comparison)
    fig_dir = d / FIG_DIR
    try:
        fig_dir.mkdir(exist_ok=True)
        written = []
        for s in report.sections:
            for f in s.figures:
                rel = f"{FIG_DIR}/{f.key}.png"
                atomic_write_bytes(d / rel, f.png)
                written.append(rel)
        out = atomic_write_text(d / REPORT_HTML, render_html(report))
    except OSError as exc:
        raise OutputError(f"{d}: cannot write the report ({exc})") from None
    # A finished room run is sealed by its complete.json (SHA-256 of every file,
    # manifest included): the report is added beside it, never into its manifest.
    if is_design and not (d / "complete.json").is_file():
        from roomcorr.export import add_manifest_entries, read_manifest, sha256_of, write_manifest

        manifest = read_manifest(d)
        known = {e.get("path") for e in manifest.get("files", [])}
        if known & {*written, REPORT_HTML}:  # a report written before: refresh its digests
            for e in manifest["files"]:
                if e.get("path") in {*written, REPORT_HTML}:
                    e["sha256"] = sha256_of(d / e["path"])
            write_manifest(d, manifest)
        entries = [{"path": p, "kind": "report-figure"} for p in written if p not in known]
        if REPORT_HTML not in known:
            entries.append({"path": REPORT_HTML, "kind": "report"})
        if entries:
            add_manifest_entries(d, entries)
    return out
