"""A measurement session: level check, sweeps per position and loudspeaker, files, record.

Output folder layout::

    pos1.wav, pos2.wav ...   impulse responses (channels = loudspeakers), float32
    raw/pos1_out1.wav ...    raw recordings (channel 1 microphone, channel 2 loopback)
    raw/playback.wav         the signal played (silence, then sweep + tail per repeat)
    measurement.json         settings, sweep, quality figures and gates

Every file is written atomically; ``measurement.json`` is rewritten after
each loudspeaker, so an interrupted session keeps everything saved so far.
"""

from __future__ import annotations

import json
import math
import shutil
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from roomcorr.deliver.atomic import atomic_path, atomic_write_text
from roomcorr.errors import InputFileError, OutputError, SettingsError
from roomcorr.measure import capture
from roomcorr.measure import deconvolve as dc
from roomcorr.measure import levels as lv
from roomcorr.measure import quality as q
from roomcorr.measure import timing as tm
from roomcorr.measure.settings import LEVEL_CAP_DBFS, MeasureSettings
from roomcorr.measure.sweep import Sweep, synchronized_sweep
from roomcorr.measure.through import filter_rows
from roomcorr.rooms import refuse_finished_run

RECORD_NAME = "measurement.json"
PLAYBACK_NAME = "playback.wav"  # the exact signal played per loudspeaker (in raw/)
RECORD_VERSION = 1

CAUTIONS = (
    "Caution: sweeps are loud tones across the whole audio band. Start with a low "
    "volume on the amplifier and raise it slowly; protect your hearing (and that of "
    "others, and pets); keep well inside the loudspeakers' excursion and power limits, "
    "especially in the bass; follow local regulations on noise exposure and at night."
)

TIMING_NOTE = (
    "time origin from the acoustic timing reference: the reference loudspeaker arrives "
    "lead_s after it in every capture of a position, so arrival differences between "
    "loudspeakers are true; absolute arrival times are not sound travel times"
)

NO_LOOPBACK_NOTE = (
    "no loopback channel: arrival times include the unknown latency of the audio "
    "system and are not comparable across sessions or devices"
)


def sweep_layout(ms: MeasureSettings) -> dict:
    """The sweep settings a recording needs for deconvolution (stored in the record)."""
    sw = make_sweep(ms)
    marker = tm.Marker(ms.sample_rate, level_dbfs=ms.level_dbfs) if ms.markers else None
    return {
        "sweep": sw.to_dict(),
        "noise_s": ms.noise_s,
        "tail_s": ms.tail_s,
        "repeats": ms.repeats,
        "ir_s": ms.ir_s,
        "harmonics": ms.harmonics,
        "method": ms.method,
        "loopback_channel": 2 if ms.loopback else None,
        "marker": None if marker is None else marker.to_dict(),
        "reference_output": ms.reference_output if marker is not None else None,
        "lead_s": tm.LEAD_S,
        "mic_sensitivity_dbfs": ms.mic_sensitivity_dbfs,
        "limits": gate_limits(ms),
    }


def run_timing_basis(ms: MeasureSettings, devices: dict) -> dict:
    """What this session's arrival times are measured from (stored as ``timing_basis``).

    The same decision :func:`analyse_recording` makes per capture: a loopback channel
    gives an absolute origin; otherwise the timing markers put the reference
    loudspeaker's arrival ``lead_s`` after the origin; without both, the origin is
    the sweep start as sent to one full-duplex device. Read back with
    :func:`roomcorr.measure.timing.timing_basis`.
    """
    if ms.loopback is not None:
        return {"kind": "loopback"}
    if ms.markers:
        return {"kind": "acoustic reference", "reference_output": ms.reference_output}
    return {
        "kind": "single device",
        "device": f"{devices.get('input')}|{devices.get('output')}",
    }


def make_sweep(ms: MeasureSettings) -> Sweep:
    """Build the synchronised sweep described by the settings."""
    return synchronized_sweep(
        ms.sample_rate,
        ms.f_start_hz,
        ms.f_end_hz,
        ms.sweep_s,
        ms.level_dbfs,
        ms.fade_in_s,
        ms.fade_out_s,
    )


def gate_limits(ms: MeasureSettings) -> dict:
    return {
        "clip_dbfs": ms.clip_dbfs,
        "min_peak_dbfs": ms.min_peak_dbfs,
        "min_snr_db": ms.min_snr_db,
        "max_dc_offset": ms.max_dc_offset,
        "min_arrival_db": ms.min_arrival_db,
        "max_repeat_disagreement_db": ms.max_repeat_disagreement_db,
        "max_drift_ppm": ms.max_drift_ppm,
    }


def _plan(layout: dict) -> tuple[Sweep, tm.Marker | None, tm.Plan]:
    sweep = Sweep.from_dict(layout["sweep"])
    marker = tm.Marker.from_dict(layout["marker"]) if layout.get("marker") else None
    plan = tm.capture_plan(
        sweep, layout["noise_s"], layout["tail_s"], int(layout["repeats"]), marker
    )
    return sweep, marker, plan


def capture_signal(layout: dict, output: int) -> tuple[np.ndarray, list[int]]:
    """What to play for one loudspeaker: rows and the output channel of each row.

    The loudspeaker on ``output`` gets the sweeps; the reference loudspeaker gets the
    timing markers (the same row when it is the one measured).
    """
    sweep, marker, _ = _plan(layout)
    sw, mk = tm.capture_tracks(
        sweep, layout["noise_s"], layout["tail_s"], int(layout["repeats"]), marker
    )
    ref = layout.get("reference_output")
    if mk is None:
        return sw[None, :], [output]
    if ref == output:
        return (sw + mk)[None, :], [output]
    return np.vstack([sw, mk]), [output, int(ref)]


def analyse_recording(
    mic: np.ndarray,
    loopback: np.ndarray | None,
    layout: dict,
    stream_problems: int = 0,
) -> tuple[np.ndarray, dict, list[q.Gate]]:
    """Deconvolve one recording (all repeats) into an impulse response with figures.

    Parameters
    ----------
    mic : ndarray, shape (n_samples,)
        Microphone recording. With timing markers in ``layout`` it may start
        anywhere before the playback (two streams); without them sample 0 must be
        aligned with the first played sample.
    loopback : ndarray, shape (n_samples,) or None
        Loopback recording (timing reference) if a loopback cable was used
        (one stream: aligned with the playback).
    layout : dict
        :func:`sweep_layout` output.
    stream_problems : int
        Dropped/repeated buffer count from the capture.

    Returns
    -------
    ir : ndarray, shape (n_ir,)
        Repeats averaged. Lag 0: the sound leaving the output (with loopback); with
        timing markers, ``lead_s`` before the reference loudspeaker's arrival (the
        common time origin of one position); otherwise the sweep start as sent to the
        audio system.
    figures : dict
        JSON-ready quality figures.
    gates : list[Gate]
    """
    sweep, marker, plan = _plan(layout)
    fs = sweep.fs
    repeats = int(layout["repeats"])
    mic = np.asarray(mic, dtype=float)
    n_tail = int(round(layout["tail_s"] * fs))
    period = sweep.n_samples + n_tail
    n_ir = int(round(layout["ir_s"] * fs))
    frac, n_pad = 0.0, 0
    timing_fig = None
    if marker is not None:
        tmg = tm.locate_markers(mic, plan, marker)
        drift = tmg.drift_ppm if tmg.found else 0.0
        mic = tm.correct_drift(mic, drift)
        if loopback is not None:
            loopback = tm.correct_drift(np.asarray(loopback, dtype=float), drift)
        elif tmg.found:
            tmg.offset_samples = tm.marker_offset(mic, plan, marker, tmg.offset_samples)
            origin = tmg.offset_samples - layout.get("lead_s", tm.LEAD_S) * fs
            start = int(np.floor(origin))
            frac = origin - start
            mic, n_pad = tm.shift_to_origin(mic, start)
        timing_fig = {
            "found": tmg.found,
            "marker_snr_db": tmg.marker_snr_db,
            "drift_ppm": drift,
            "reference_output": layout.get("reference_output"),
            "path_s": tmg.offset_samples / fs if tmg.found else None,
        }
    starts = plan.sweep_starts
    need = starts[-1] + period
    if mic.shape[-1] < need:
        if marker is None:
            raise InputFileError(
                f"recording has {mic.shape[-1]} samples but the sweep settings need {need}; "
                "is it the right recording for these sweep settings?"
            )
        if loopback is not None:
            loopback = np.concatenate([loopback, np.zeros(need - len(loopback))])
        mic = np.concatenate([mic, np.zeros(need - mic.shape[-1])])
    noise = mic[n_pad : plan.n_noise] if plan.n_noise - n_pad >= int(0.05 * fs) else mic[:0]
    if noise.size == 0:
        noise = np.zeros(int(0.05 * fs))
    # the sweep as recorded, plus up to 0.1 s for the system latency and direct sound
    n_extra = min(n_tail, int(0.1 * fs))
    sig = mic[starts[0] : starts[0] + sweep.n_samples + n_extra]
    chans = [mic] if loopback is None else [mic, loopback]
    segs = np.array([[c[s : s + period] for c in chans] for s in starts])  # (rep, ch, period)
    h = dc.deconvolve(segs, sweep, method=layout.get("method", "division"))
    latency = None
    if loopback is not None:
        lat = [dc.peak_lag(h[r, 1, :n_tail]) for r in range(repeats)]
        latency = float(np.mean(lat))
        h_mic = dc.fractional_shift(h[:, 0], -latency)
    elif frac:
        h_mic = dc.fractional_shift(h[:, 0], -frac)
    else:
        h_mic = h[:, 0]
    irs = h_mic[:, :n_ir]
    disagreement = q.repeat_disagreement_db(irs)
    h_mean = h_mic.mean(axis=0)
    ir = h_mean[:n_ir].copy()
    split = dc.split_harmonics(h_mean, sweep, n_ir, int(layout["harmonics"]))
    hd_f, hd_db = dc.harmonic_distortion(split, fs, sweep.f_start_hz, sweep.f_end_hz)
    snr = q.band_snr_db(
        sig, noise, fs, sweep.f_start_hz, sweep.f_end_hz, sweep_s=sweep.n_samples / fs
    )
    arrival_db = q.arrival_snr_db(h_mean, n_ir, slice(n_ir, n_tail))
    if loopback is not None:
        note = "removed with the loopback channel"
    elif timing_fig is not None and timing_fig["found"]:
        note = TIMING_NOTE
    else:
        note = NO_LOOPBACK_NOTE
    figures = {
        "peak_dbfs": q.peak_dbfs(mic),
        "clipped_samples": q.clipped_samples(mic, layout["limits"]["clip_dbfs"]),
        "dc_offset": float(np.mean(noise)),
        "noise_rms_dbfs": float(10 * np.log10(max(float(np.mean(noise**2)), 1e-30))),
        "snr_db_per_octave": {str(k): v for k, v in snr.items()},
        "min_snr_db": float(min(snr.values())) if snr else float("nan"),
        "stream_problems": int(stream_problems),
        "arrival_snr_db": arrival_db,
        "arrival_s": split.arrival_samples / fs,
        "latency_s": None if latency is None else latency / fs,
        "latency_note": note,
        "repeat_disagreement_db": disagreement,
        "harmonic_distortion": {
            "fundamental_hz": [round(float(f), 2) for f in hd_f],
            "orders": {
                str(k): [_num(v) for v in row]
                for k, row in zip(split.orders[1:], hd_db, strict=True)
            },
            "unit": "dB relative to the fundamental (|H_k(k f)| / |H_1(f)|)",
        },
    }
    figures.update(level_figures(sig, noise, fs, layout.get("mic_sensitivity_dbfs")))
    if timing_fig is not None:
        figures["timing_reference"] = timing_fig
        figures["drift_ppm"] = timing_fig["drift_ppm"]
    gates = q.evaluate_gates(figures, layout["limits"])
    return ir, figures, gates


def level_figures(
    sweep_part: np.ndarray, noise: np.ndarray, fs: int, sensitivity_dbfs: float | None
) -> dict:
    """Sweep level at the seat and background noise per octave (dBFS, and dB SPL if known)."""
    centres = q.octave_centres_hz(31.5, 16000.0)
    centres = centres[centres < 0.45 * fs]
    noise_oct = lv.octave_levels_dbfs(noise, fs, centres)
    out = {
        "level_unit": "dB SPL" if sensitivity_dbfs is not None else "dBFS",
        "sweep_rms_dbfs": lv.rms_dbfs(sweep_part),
        "sweep_max_dbfs": lv.short_term_max_dbfs(sweep_part, fs),
        "noise_dbfs_per_octave": {lv.nominal_label(k): round(v, 2) for k, v in noise_oct.items()},
    }
    if sensitivity_dbfs is not None:
        out["sweep_max_spl_db"] = lv.to_spl(out["sweep_max_dbfs"], sensitivity_dbfs)
        out["sweep_rms_spl_db"] = lv.to_spl(out["sweep_rms_dbfs"], sensitivity_dbfs)
        out["noise_spl_db_per_octave"] = {
            lv.nominal_label(k): round(lv.to_spl(v, sensitivity_dbfs), 2)
            for k, v in noise_oct.items()
        }
    return out


def _num(v: float) -> float | None:
    return None if not math.isfinite(v) else round(float(v), 2)


def _clean(obj):
    """Replace non-finite floats by None so the record is strict JSON."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    return obj


def write_record(path: Path, record: dict) -> None:
    atomic_write_text(path, json.dumps(_clean(record), indent=2, allow_nan=False) + "\n")


def write_ir_wav(path: Path, data: np.ndarray, fs: int) -> None:
    """Write (n_channels, n_samples) as a float32 WAV atomically."""

    with atomic_path(path) as tmp:
        sf.write(str(tmp), np.asarray(data, dtype=np.float32).T, fs, subtype="FLOAT", format="WAV")


def gate_lines(gates: list[q.Gate]) -> list[str]:
    """One printable line per gate: ok/FAIL, name, figure and limit."""
    lines = []
    for g in gates:
        value = "single sweep" if g.value == -999.0 else f"{g.value:.4g} {g.unit}"
        word = "ok  " if g.passed else ("WARN" if g.severity == "warning" else "FAIL")
        lines.append(f"  {word} {g.name}: {value} (limit {g.limit:g})")
    return lines


#: Below this (dB of the test sweep's deconvolved peak over its noise) nothing was
#: heard: Gaussian noise alone reaches about 13 dB (extreme value of 10^4 samples).
HEARD_DB = 20.0


def level_check(ms: MeasureSettings, capture_fn: Callable, output: int | None = None) -> dict:
    """Play a short quiet sweep and predict the input level at the sweep level.

    Returns ``{test_level_dbfs, test_peak_dbfs, predicted_peak_dbfs, heard_db, heard,
    advice}`` and, with a microphone sensitivity, ``predicted_spl_db`` (highest
    125 ms level of the sweep at the seat).
    """
    test = synchronized_sweep(
        ms.sample_rate,
        ms.f_start_hz,
        ms.f_end_hz,
        ms.test_s,
        ms.test_level_dbfs,
        ms.fade_in_s,
        ms.fade_out_s,
    )
    sig = np.concatenate(
        [np.zeros(int(0.1 * ms.sample_rate)), test.signal(), np.zeros(int(0.3 * ms.sample_rate))]
    )
    out = ms.reference_output if output is None else output
    cap = capture_fn(sig[None, :], [out], [ms.input])
    rec = cap.recording[0]
    peak = q.peak_dbfs(rec)
    gain = ms.level_dbfs - ms.test_level_dbfs
    predicted = peak + gain
    h = np.abs(dc.deconvolve(rec, test))
    heard_db = float(20 * np.log10(max(h.max(), 1e-30) / max(1.4826 * float(np.median(h)), 1e-30)))
    heard = bool(peak > -100.0 and heard_db >= HEARD_DB)
    res = {
        "test_level_dbfs": ms.test_level_dbfs,
        "test_peak_dbfs": peak,
        "predicted_peak_dbfs": predicted,
        "heard_db": heard_db,
        "heard": heard,
        "output": out,
    }
    if ms.mic_sensitivity_dbfs is not None:
        res["predicted_spl_db"] = lv.to_spl(
            lv.short_term_max_dbfs(rec, ms.sample_rate) + gain, ms.mic_sensitivity_dbfs
        )
    if not heard:
        advice = (
            f"no test sweep heard at input {ms.input} (output {out}): check the "
            "microphone (cable, phantom power), --input, the amplifier and its volume"
        )
    elif predicted > -3.0:
        advice = (
            f"input would peak at {predicted:.1f} dBFS: lower the input gain or the "
            f"sweep level by about {predicted + 12:.0f} dB"
        )
    elif predicted < -40.0:
        advice = (
            f"input would peak only at {predicted:.1f} dBFS: raise the microphone gain by "
            f"about {-12 - predicted:.0f} dB (or the amplifier, carefully)"
        )
    else:
        advice = f"input level fine (predicted peak {predicted:.1f} dBFS)"
    res["advice"] = advice
    return res


def _stale_files(out: Path) -> list[Path]:
    return [
        *out.glob("pos*.wav"),
        *out.glob("raw/pos*_out*.wav"),
        out / "raw" / PLAYBACK_NAME,
        out / RECORD_NAME,
    ]


def _load_for_resume(out: Path, ms: MeasureSettings, layout: dict) -> dict:
    """The unfinished record in ``out``, checked against the settings of this run."""
    path = out / RECORD_NAME
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputFileError(
            f"{path}: no unfinished measurement to resume here ({exc}); start a new one "
            "without --resume"
        ) from exc
    old = json.loads(json.dumps(_clean(record.get("sweep_settings", {}))))
    if old != json.loads(json.dumps(_clean(layout))):
        raise SettingsError(
            f"{path}: --resume needs the same sweep settings as the unfinished run; give the "
            "same options (or start again with --replace)"
        )
    keep = []
    for p in record.get("positions", []):
        if p.get("file") and (out / p["file"]).is_file():
            keep.append(p)
        elif p.get("skipped"):
            keep.append(p)
        else:
            break  # a position cut short: measured again
    record["positions"] = keep
    record["settings"] = ms.to_dict()
    return record


def run_measurement(
    ms: MeasureSettings,
    out_dir: str | Path,
    *,
    yes: bool = False,
    force: bool = False,
    replace: bool = False,
    resume: bool = False,
    say: Callable[[str], None] = print,
    ask: Callable[[str], str] = input,
    view: Any = None,
    through: dict | None = None,
    stop: threading.Event | None = None,
    notify: Callable[[dict], None] | None = None,
) -> dict:
    """Run a whole session and write the output folder (module docstring).

    Parameters
    ----------
    ms : MeasureSettings
    out_dir : path
        Output folder; must be empty or new unless ``replace`` or ``resume``.
    yes : bool
        Do not wait for Enter between positions; a recording that fails a quality
        gate skips its position instead of offering to repeat it.
    force : bool
        Keep recordings that fail a quality gate (the gate is still recorded).
    replace : bool
        Start afresh in a folder holding an earlier session.
    resume : bool
        Continue the unfinished session in ``out_dir``: finished positions are kept.
    say, ask : callables
        Printing and prompting (the CLI passes print/input).
    view : LiveView, optional
        Live level meter and progress (:mod:`roomcorr.measure.live`); None = plain.
    through : dict, optional
        A design's filters (``roomcorr.app.through.load_through``): the sweeps are
        played through them (:func:`.through.filter_rows`). The comparison with the
        design's prediction is the caller's (``roomcorr.app.measure``).
    stop : threading.Event, optional
        Set from another thread to silence the output at once and end the run
        (:class:`roomcorr.measure.capture.Stopped` is raised; files already
        complete are kept, as with Ctrl-C).
    notify : callable, optional
        Called with a small dict at each step (``{"type": "position", ...}``,
        ``"speaker"``, ``"gates"``, ``"saved"``, ``"skipped"``, ``"level_check"``)
        so an app can draw the progress.

    Returns
    -------
    dict
        The record written to ``measurement.json``.
    """

    ms.validate()
    out = Path(out_dir)
    refuse_finished_run(out)
    layout = sweep_layout(ms)
    unfinished = (out / RECORD_NAME).is_file()
    if out.exists() and any(out.iterdir()) and not (replace or resume):
        hint = (
            (
                "holds an unfinished measurement; pass --resume to continue it or --replace "
                "to start again"
            )
            if unfinished
            else "is not empty; choose a new folder or pass --replace"
        )
        raise OutputError(f"{out} {hint}")
    record = _load_for_resume(out, ms, layout) if resume else None
    thru = through
    tell = notify if notify is not None else (lambda event: None)
    # devices first: a wrong device or rate stops here, before anything is written
    n_out = max([*ms.outputs, ms.reference_output, *([ms.loopback[0]] if ms.loopback else [])])
    n_in = max([ms.input, *([ms.loopback[1]] if ms.loopback else [])])
    devices = capture.open_devices(
        ms.sample_rate, n_in, n_out, ms.device, ms.input_device, ms.output_device, ms.two_streams
    )
    if devices.two_streams and not ms.markers and ms.loopback is None:
        raise SettingsError(
            "--no-markers: with two streams (two devices) the timing markers are what finds "
            "the sweep in the recording; leave --no-markers out"
        )
    if ms.loopback is not None and devices.two_streams:
        raise SettingsError(
            "--loopback needs one device for input and output; with two devices leave it out "
            "(the acoustic timing reference takes its place)"
        )
    if ms.level_dbfs > LEVEL_CAP_DBFS:
        say(
            f"WARNING: sweep level {ms.level_dbfs} dBFS is above the {LEVEL_CAP_DBFS} dBFS cap "
            "(--allow-loud). Turn the amplifier down before continuing."
        )
    say(CAUTIONS)
    dev_text = f"input {devices.input_name!r}, output {devices.output_name!r}" + (
        " (two streams)" if devices.two_streams else ""
    )
    say(f"devices: {dev_text}")
    sweep = Sweep.from_dict(layout["sweep"])

    def capture_fn(sig, outs, ins, label="level check"):
        if view is not None:
            view.start(label, sig.shape[1] / ms.sample_rate)
        try:
            return capture.play_record(
                sig,
                ms.sample_rate,
                outs,
                ins,
                blocksize=ms.blocksize,
                devices=devices,
                progress=None if view is None else view.update,
                stop=stop,
            )
        finally:
            if view is not None:
                view.stop()

    created = not out.exists()
    raw_created = not (out / "raw").exists()
    written: list[Path] = []
    if record is None:
        if replace and out.exists():
            for f in _stale_files(out):  # an earlier session's files would mix with ours
                f.unlink(missing_ok=True)
        record = {
            "roomcorr_measurement": RECORD_VERSION,
            "settings": ms.to_dict(),
            "sweep_settings": layout,
            "loopback": ms.loopback is not None,
            "latency_note": "removed with the loopback channel"
            if ms.loopback
            else (TIMING_NOTE if ms.markers else NO_LOOPBACK_NOTE),
            "positions": [],
        }
    record["devices"] = devices.to_dict()
    record["timing_basis"] = run_timing_basis(ms, record["devices"])
    record["timing_reference"] = (
        None
        if not ms.markers
        else {
            "output": ms.reference_output,
            "lead_s": layout["lead_s"],
            "marker": layout["marker"],
            "note": "arrival_s per position share one time origin: the reference loudspeaker "
            "arrives lead_s after it",
        }
    )
    if thru is not None:
        record["through"] = {
            "design": thru["dir"],
            "pre_gain_db": thru["pre_gain_db"],
            "note": "sweeps played through the design's filters (pre-gain "
            "included); impulse responses are room times filter",
        }
        say(
            f"measuring through the filters of {thru['dir']} (pre-gain "
            f"{thru['pre_gain_db']:+.2f} dB included)"
        )
    record["level_unit"] = "dB SPL" if ms.mic_sensitivity_dbfs is not None else "dBFS"
    record["mic_sensitivity_dbfs"] = ms.mic_sensitivity_dbfs
    record_path = out / RECORD_NAME
    if view is not None:
        view.sensitivity_dbfs = ms.mic_sensitivity_dbfs
    say(
        f"sweep {sweep.f_start_hz:g}-{sweep.f_end_hz:g} Hz, {sweep.duration_s:.2f} s, "
        f"peak {sweep.level_dbfs:g} dBFS, {ms.repeats} repeat(s)"
    )
    if ms.markers and not ms.loopback:
        say(
            f"timing reference: markers through output {ms.reference_output} before and after "
            "every sweep (arrival differences and clock drift come from them)"
        )
    elif not ms.loopback:
        say("note: " + NO_LOOPBACK_NOTE)
    if ms.mic_sensitivity_dbfs is None:
        say(
            "levels in dBFS (no microphone sensitivity: give --mic-sensitivity or run "
            "'roomcorr calibrate-mic' for dB SPL)"
        )
    try:
        (out / "raw").mkdir(parents=True, exist_ok=True)
        marker = tm.Marker.from_dict(layout["marker"]) if layout["marker"] else None
        sw, mk = tm.capture_tracks(sweep, ms.noise_s, ms.tail_s, ms.repeats, marker)
        tracks = sw[None, :] if mk is None else np.vstack([sw, mk])
        write_ir_wav(out / "raw" / PLAYBACK_NAME, tracks, ms.sample_rate)
        written.append(out / "raw" / PLAYBACK_NAME)
        record["playback_file"] = f"raw/{PLAYBACK_NAME}"
        record["playback_note"] = (
            "channel 1: the sweeps (each loudspeaker in turn); "
            "channel 2: the timing markers (reference loudspeaker)"
        )
        check = level_check(ms, capture_fn)
        record["level_check"] = check
        say("level check: " + check["advice"])
        tell({"type": "level_check", **check})
        if "predicted_spl_db" in check:
            say(
                f"predicted sweep level at the microphone: {check['predicted_spl_db']:.0f} "
                "dB SPL (highest 125 ms)"
            )
            if check["predicted_spl_db"] > ms.max_spl_db:
                say(
                    f"WARNING: that is above {ms.max_spl_db:g} dB SPL; 75 to 85 dB SPL is "
                    "plenty for a room measurement: turn the amplifier down (protect your "
                    "hearing)"
                )
        if not check["heard"]:
            raise q.QualityGateError(check["advice"] + "; nothing was measured")
        write_record(record_path, record)
        written.append(record_path)
    except BaseException:
        if not record["positions"]:  # a failed start leaves nothing that blocks a retry
            for f in written:
                f.unlink(missing_ok=True)
            if created or raw_created:  # a room's new run folder exists already
                _remove_empty(out / "raw")
            if created:
                _remove_empty(out)
        raise
    done = {p["position"] for p in record["positions"]}
    if done:
        say(f"resuming: position(s) {sorted(done)} kept")
    for p in record["positions"]:
        if p.get("file"):
            tell({"type": "saved", "position": p["position"], "file": p["file"]})
        elif p.get("skipped"):
            tell({"type": "skipped", "position": p["position"], "reason": p["skipped"]})
    for pos in range(1, ms.positions + 1):
        if pos in done:
            continue
        tell({"type": "position", "position": pos, "positions": ms.positions})
        if not yes:
            ask(
                f"Place the microphone at position {pos} of {ms.positions} and press Enter "
                "(Ctrl-C stops at once) "
            )
        pos_rec = {"position": pos, "file": None, "channels": []}
        record["positions"].append(pos_rec)
        irs = []
        arrivals = {}
        skipped = None
        for spk in ms.outputs:
            while True:
                tell({"type": "speaker", "position": pos, "output": spk})
                ir, ch, gates = _measure_one(
                    ms,
                    layout,
                    out,
                    pos,
                    spk,
                    capture_fn,
                    say,
                    f"position {pos} of {ms.positions}, output {spk}",
                    thru,
                )
                pos_rec["channels"] = [c for c in pos_rec["channels"] if c["output"] != spk]
                pos_rec["channels"].append(ch)
                write_record(record_path, record)
                tell(
                    {
                        "type": "gates",
                        "position": pos,
                        "output": spk,
                        "gates": [g.to_dict() for g in gates],
                    }
                )
                if force or not q.blocking(gates):
                    break
                where = f"position {pos}, output {spk}"
                try:
                    q.raise_on_failure(gates, where)
                except q.QualityGateError as exc:
                    if yes:
                        skipped = str(exc)
                        break
                    answer = (
                        ask(f"{exc}\n[r]epeat this loudspeaker, [s]kip position {pos}, or [q]uit? ")
                        .strip()
                        .lower()[:1]
                    )
                    if answer == "r":
                        continue
                    if answer == "s":
                        skipped = str(exc)
                        break
                    raise
            if skipped:
                break
            irs.append(ir)
            arrivals[str(spk)] = ch["figures"]["arrival_s"]
        if skipped:
            pos_rec["skipped"] = skipped
            write_record(record_path, record)
            say(f"skipped position {pos}: {skipped}")
            tell({"type": "skipped", "position": pos, "reason": skipped})
            continue
        name = f"pos{pos}.wav"
        write_ir_wav(out / name, np.array(irs), ms.sample_rate)
        pos_rec["file"] = name
        pos_rec["arrival_s"] = arrivals
        pos_rec["time_origin"] = (
            "loopback" if ms.loopback else ("reference" if ms.markers else "stream")
        )
        write_record(record_path, record)
        say(f"saved {out / name}")
        tell({"type": "saved", "position": pos, "file": name})
    if not any(p["file"] for p in record["positions"]):
        reasons = [p.get("skipped") for p in record["positions"] if p.get("skipped")]
        raise q.QualityGateError(reasons[-1] if reasons else "no position was measured")
    return record


def copy_unfinished(src: str | Path, dst: str | Path) -> None:
    """Copy an unfinished session's record, impulse responses and raw files into ``dst``.

    For ``measure --resume`` in a room folder: the unfinished run is left as it
    is; the new run starts from its finished positions.
    """
    src, dst = Path(src), Path(dst)
    if not (src / RECORD_NAME).is_file():
        raise InputFileError(f"{src}: no {RECORD_NAME}; nothing to resume")
    files = [src / RECORD_NAME, *src.glob("pos*.wav"), *src.glob("raw/*.wav")]
    for f in files:
        dest = dst / f.relative_to(src)
        dest.parent.mkdir(parents=True, exist_ok=True)
        with atomic_path(dest) as tmp:
            shutil.copyfile(f, tmp)


def _remove_empty(d: Path) -> None:
    try:
        d.rmdir()
    except OSError:
        pass


def _measure_one(
    ms: MeasureSettings,
    layout: dict,
    out: Path,
    pos: int,
    spk: int,
    capture_fn: Callable,
    say: Callable,
    label: str,
    thru: dict | None = None,
):
    """Play and record one loudspeaker at one position; write its raw file; analyse it."""
    sig, outs = capture_signal(layout, spk)
    scale = 1.0
    if thru is not None:
        sig, scale = filter_rows(sig, outs, tuple(ms.outputs), thru["firs"], ms.level_dbfs)
    ins = [ms.input]
    if ms.loopback:
        outs = [*outs, ms.loopback[0]]
        ins.append(ms.loopback[1])
        sig = np.vstack([sig, sig[0]])
    say(f"{label}: playing sweep...")
    cap = capture_fn(sig, outs, ins, label)
    raw_name = f"raw/pos{pos}_out{spk}.wav"
    write_ir_wav(out / raw_name, cap.recording, ms.sample_rate)
    lb = cap.recording[1] if ms.loopback else None
    ir, figures, gates = analyse_recording(cap.recording[0], lb, layout, cap.stream_problems)
    figures["status_flags"] = cap.status_flags
    if thru is not None:
        ir = ir / scale
        figures["through_scale_db"] = float(20 * np.log10(scale))
    for line in gate_lines(gates):
        say(line)
    if "drift_ppm" in figures:
        say(f"  clock drift {figures['drift_ppm']:+.1f} ppm (corrected)")
    if "sweep_max_spl_db" in figures:
        say(
            f"  sweep at the microphone: {figures['sweep_max_spl_db']:.0f} dB SPL (highest "
            "125 ms); background noise per octave in dB SPL is in measurement.json"
        )
        if figures["sweep_max_spl_db"] > ms.max_spl_db:
            say(
                f"WARNING: above {ms.max_spl_db:g} dB SPL; turn the amplifier down (protect "
                "your hearing)"
            )
    ch = {
        "output": spk,
        "raw_file": raw_name,
        "figures": figures,
        "gates": [g.to_dict() for g in gates],
    }
    return ir, ch, gates


def load_layout(path: str | Path) -> dict:
    """Read sweep settings from a ``measurement.json`` or a bare sweep-settings JSON file."""
    p = Path(path)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputFileError(f"{p}: cannot read sweep settings ({exc})") from exc
    layout = data.get("sweep_settings", data) if isinstance(data, dict) else None
    keys = {"sweep", "noise_s", "tail_s", "repeats", "ir_s", "harmonics"}
    if not isinstance(layout, dict) or not keys <= set(layout):
        raise InputFileError(
            f"{p}: not sweep settings; expected the 'sweep_settings' of a measurement.json "
            f"with keys {sorted(keys)}"
        )
    layout = dict(layout)
    layout.setdefault("limits", gate_limits(MeasureSettings()))
    layout.setdefault("method", "division")
    layout.setdefault("loopback_channel", None)
    return layout


ALIGN_NOTE = (
    "recording aligned on its first sweep: the reference channel's first arrival was "
    "placed 10 ms after the sweep start, so without a loopback arrival times are relative"
)


def align_recording(data: np.ndarray, layout: dict, ref_channel: int) -> np.ndarray:
    """Shift a recording so that sample 0 is where the playback would have started.

    The first arrival of the first sweep on ``ref_channel`` (the earliest lag
    whose deconvolved magnitude reaches half the maximum) is placed 10 ms after
    the nominal sweep start; the recording is zero-padded or cut at the front.

    Parameters
    ----------
    data : ndarray, shape (n_samples, n_channels)
    layout : dict
        :func:`sweep_layout` output.
    ref_channel : int
        0-based channel used to find the sweep.

    Returns
    -------
    ndarray, shape (n, n_channels)
    """
    sweep, _, plan = _plan(layout)
    fs = sweep.fs
    h = np.abs(dc.deconvolve(data[:, ref_channel], sweep))[: data.shape[0]]
    first = int(np.argmax(h >= 0.5 * h.max()))
    start = first - int(round(0.010 * fs)) - plan.sweep_starts[0]
    if start >= 0:
        out = data[start:]
    else:
        out = np.vstack([np.zeros((-start, data.shape[1])), data])
    need = plan.n_total
    if out.shape[0] < need:
        out = np.vstack([out, np.zeros((need - out.shape[0], out.shape[1]))])
    return out


def deconvolve_file(
    recording: str | Path,
    sweep_settings: str | Path,
    out_path: str | Path | None = None,
    *,
    force: bool = False,
    replace: bool = False,
    loopback_channel: int | None = None,
    align: bool = False,
) -> tuple[Path, dict, list[q.Gate]]:
    """Deconvolve a sweep recorded elsewhere; write the IR WAV and a JSON of its figures.

    Channel 1 of the recording is the microphone; ``loopback_channel`` (1-based,
    default from the sweep settings) is the timing reference. With ``align``
    the recording need not start with the playback: see :func:`align_recording`.
    """

    rec_path = Path(recording)
    layout = load_layout(sweep_settings)
    try:
        data, fs = sf.read(str(rec_path), always_2d=True, dtype="float64")
    except (OSError, RuntimeError) as exc:
        raise InputFileError(f"{rec_path}: cannot read the recording ({exc})") from exc
    if fs != layout["sweep"]["fs"]:
        raise InputFileError(
            f"{rec_path}: sample rate {fs} Hz differs from the sweep's {layout['sweep']['fs']} Hz"
        )
    lb_ch = loopback_channel if loopback_channel is not None else layout.get("loopback_channel")
    if lb_ch is not None and not 1 <= lb_ch <= data.shape[1]:
        raise InputFileError(f"{rec_path}: has no channel {lb_ch} for the loopback")
    if align and not (layout.get("marker") and lb_ch is None):  # markers align by themselves
        data = align_recording(data, layout, (lb_ch or 1) - 1)
    lb = data[:, lb_ch - 1] if lb_ch else None
    ir, figures, gates = analyse_recording(data[:, 0], lb, layout)
    if align:
        figures["aligned"] = ALIGN_NOTE
    dest = Path(out_path) if out_path else rec_path.with_name(rec_path.stem + "_ir.wav")
    refuse_finished_run(dest)
    if dest.exists() and not replace:
        raise OutputError(f"{dest} exists; choose another --out or pass --replace")
    if not force:
        q.raise_on_failure(gates, str(rec_path))
    write_ir_wav(dest, ir[None, :], fs)
    write_record(
        dest.with_suffix(".json"),
        {
            "recording": str(rec_path),
            "ir_file": dest.name,
            "figures": figures,
            "gates": [g.to_dict() for g in gates],
            "sweep_settings": layout,
        },
    )
    return dest, figures, gates
