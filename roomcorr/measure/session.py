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
from collections.abc import Callable
from pathlib import Path

import numpy as np

from roomcorr.atomic import atomic_path, atomic_write_text
from roomcorr.errors import InputFileError, OutputError
from roomcorr.measure import deconvolve as dc
from roomcorr.measure import quality as q
from roomcorr.measure.settings import LEVEL_CAP_DBFS, MeasureSettings
from roomcorr.measure.sweep import Sweep, playback_signal, sweep_starts, synchronized_sweep
from roomcorr.room import refuse_finished_run

RECORD_NAME = "measurement.json"
PLAYBACK_NAME = "playback.wav"  # the exact signal played per loudspeaker (in raw/)
RECORD_VERSION = 1

CAUTIONS = (
    "Caution: sweeps are loud tones across the whole audio band. Start with a low "
    "volume on the amplifier and raise it slowly; protect your hearing (and that of "
    "others, and pets); keep well inside the loudspeakers' excursion and power limits, "
    "especially in the bass; follow local regulations on noise exposure and at night."
)

NO_LOOPBACK_NOTE = (
    "no loopback channel: arrival times include the unknown latency of the audio "
    "system and are not comparable across sessions or devices"
)


def sweep_layout(ms: MeasureSettings) -> dict:
    """The sweep settings a recording needs for deconvolution (stored in the record)."""
    sw = make_sweep(ms)
    return {
        "sweep": sw.to_dict(),
        "noise_s": ms.noise_s,
        "tail_s": ms.tail_s,
        "repeats": ms.repeats,
        "ir_s": ms.ir_s,
        "harmonics": ms.harmonics,
        "method": ms.method,
        "loopback_channel": 2 if ms.loopback else None,
        "limits": gate_limits(ms),
    }


def make_sweep(ms: MeasureSettings) -> Sweep:
    """Build the synchronised sweep described by the settings."""
    return synchronized_sweep(
        ms.sample_rate, ms.f_start_hz, ms.f_end_hz, ms.sweep_s, ms.level_dbfs,
        ms.fade_in_s, ms.fade_out_s,
    )


def gate_limits(ms: MeasureSettings) -> dict:
    return {
        "clip_dbfs": ms.clip_dbfs,
        "min_peak_dbfs": ms.min_peak_dbfs,
        "min_snr_db": ms.min_snr_db,
        "max_dc_offset": ms.max_dc_offset,
        "min_arrival_db": ms.min_arrival_db,
        "max_repeat_disagreement_db": ms.max_repeat_disagreement_db,
    }


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
        Microphone recording; sample 0 aligned with the first played sample.
    loopback : ndarray, shape (n_samples,) or None
        Loopback recording (timing reference) if a loopback cable was used.
    layout : dict
        :func:`sweep_layout` output.
    stream_problems : int
        Dropped/repeated buffer count from the capture.

    Returns
    -------
    ir : ndarray, shape (n_ir,)
        Repeats averaged; lag 0 = sound leaving the output (with loopback) or the
        sweep start as sent to the audio system (without).
    figures : dict
        JSON-ready quality figures.
    gates : list[Gate]
    """
    sweep = Sweep.from_dict(layout["sweep"])
    fs = sweep.fs
    repeats = int(layout["repeats"])
    starts = sweep_starts(sweep, layout["noise_s"], layout["tail_s"], repeats)
    n_tail = int(round(layout["tail_s"] * fs))
    period = sweep.n_samples + n_tail
    n_ir = int(round(layout["ir_s"] * fs))
    need = starts[-1] + period
    if mic.shape[-1] < need:
        raise InputFileError(
            f"recording has {mic.shape[-1]} samples but the sweep settings need {need}; "
            "is it the right recording for these sweep settings?"
        )
    noise = mic[: starts[0]]
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
    else:
        h_mic = h[:, 0]
    irs = h_mic[:, :n_ir]
    disagreement = q.repeat_disagreement_db(irs)
    h_mean = h_mic.mean(axis=0)
    ir = h_mean[:n_ir].copy()
    split = dc.split_harmonics(h_mean, sweep, n_ir, int(layout["harmonics"]))
    hd_f, hd_db = dc.harmonic_distortion(split, fs, sweep.f_start_hz, sweep.f_end_hz)
    snr = q.band_snr_db(sig, noise, fs, sweep.f_start_hz, sweep.f_end_hz,
                        sweep_s=sweep.n_samples / fs)
    arrival_db = q.arrival_snr_db(h_mean, n_ir, slice(n_ir, n_tail))
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
        "latency_note": "removed with the loopback channel" if latency is not None
        else NO_LOOPBACK_NOTE,
        "repeat_disagreement_db": disagreement,
        "harmonic_distortion": {
            "fundamental_hz": [round(float(f), 2) for f in hd_f],
            "orders": {str(k): [_num(v) for v in row]
                       for k, row in zip(split.orders[1:], hd_db, strict=True)},
            "unit": "dB relative to the fundamental (|H_k(k f)| / |H_1(f)|)",
        },
    }
    gates = q.evaluate_gates(figures, layout["limits"])
    return ir, figures, gates


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
    import soundfile as sf

    with atomic_path(path) as tmp:
        sf.write(str(tmp), np.asarray(data, dtype=np.float32).T, fs, subtype="FLOAT",
                 format="WAV")


def gate_lines(gates: list[q.Gate]) -> list[str]:
    """One printable line per gate: ok/FAIL, name, figure and limit."""
    lines = []
    for g in gates:
        value = "single sweep" if g.value == -999.0 else f"{g.value:.4g} {g.unit}"
        lines.append(f"  {'ok  ' if g.passed else 'FAIL'} {g.name}: {value} (limit {g.limit:g})")
    return lines


def level_check(ms: MeasureSettings, capture_fn: Callable) -> dict:
    """Play a short quiet sweep and predict the input peak at the sweep level.

    Returns ``{test_level_dbfs, test_peak_dbfs, predicted_peak_dbfs, advice}``.
    """
    test = synchronized_sweep(ms.sample_rate, ms.f_start_hz, ms.f_end_hz, ms.test_s,
                              ms.test_level_dbfs, ms.fade_in_s, ms.fade_out_s)
    sig = np.concatenate([np.zeros(int(0.1 * ms.sample_rate)), test.signal(),
                          np.zeros(int(0.3 * ms.sample_rate))])
    cap = capture_fn(sig[None, :], [ms.outputs[0]], [ms.input])
    peak = q.peak_dbfs(cap.recording[0])
    predicted = peak + (ms.level_dbfs - ms.test_level_dbfs)
    if peak < -100.0:
        advice = ("no signal at the input: check the microphone, its cable, its power "
                  "(phantom) and the chosen --input channel")
    elif predicted > -3.0:
        advice = (f"input would peak at {predicted:.1f} dBFS: lower the input gain or the "
                  f"sweep level by about {predicted + 12:.0f} dB")
    elif predicted < -40.0:
        advice = (f"input would peak only at {predicted:.1f} dBFS: raise the microphone gain by "
                  f"about {-12 - predicted:.0f} dB (or the amplifier, carefully)")
    else:
        advice = f"input level fine (predicted peak {predicted:.1f} dBFS)"
    return {"test_level_dbfs": ms.test_level_dbfs, "test_peak_dbfs": peak,
            "predicted_peak_dbfs": predicted, "advice": advice}


def run_measurement(
    ms: MeasureSettings,
    out_dir: str | Path,
    *,
    yes: bool = False,
    force: bool = False,
    replace: bool = False,
    say: Callable[[str], None] = print,
    ask: Callable[[str], str] = input,
) -> dict:
    """Run a whole session and write the output folder (module docstring).

    Parameters
    ----------
    ms : MeasureSettings
    out_dir : path
        Output folder; must be empty or new unless ``replace``.
    yes : bool
        Do not wait for Enter between positions.
    force : bool
        Keep recordings that fail a quality gate (the gate is still recorded).
    say, ask : callables
        Printing and prompting (the CLI passes print/input).

    Returns
    -------
    dict
        The record written to ``measurement.json``.
    """
    from roomcorr.measure import capture

    ms.validate()
    out = Path(out_dir)
    refuse_finished_run(out)
    if out.exists() and any(out.iterdir()):
        if not replace:
            raise OutputError(f"{out} is not empty; choose a new folder or pass --replace")
        # an earlier session's files would otherwise mix with this one's
        stale = [*out.glob("pos*.wav"), *out.glob("raw/pos*_out*.wav"),
                 out / "raw" / PLAYBACK_NAME, out / RECORD_NAME]
        for f in stale:
            f.unlink(missing_ok=True)
    (out / "raw").mkdir(parents=True, exist_ok=True)
    if ms.level_dbfs > LEVEL_CAP_DBFS:
        say(f"WARNING: sweep level {ms.level_dbfs} dBFS is above the {LEVEL_CAP_DBFS} dBFS cap "
            "(--allow-loud). Turn the amplifier down before continuing.")
    say(CAUTIONS)
    layout = sweep_layout(ms)
    sweep = Sweep.from_dict(layout["sweep"])
    play = playback_signal(sweep, ms.noise_s, ms.tail_s, ms.repeats)

    def capture_fn(sig, outs, ins):
        return capture.play_record(sig, ms.sample_rate, outs, ins, ms.device, ms.blocksize)

    record: dict = {
        "roomcorr_measurement": RECORD_VERSION,
        "settings": ms.to_dict(),
        "sweep_settings": layout,
        "loopback": ms.loopback is not None,
        "latency_note": "removed with the loopback channel" if ms.loopback else NO_LOOPBACK_NOTE,
        "positions": [],
    }
    record_path = out / RECORD_NAME
    say(f"sweep {sweep.f_start_hz:g}-{sweep.f_end_hz:g} Hz, {sweep.duration_s:.2f} s, "
        f"peak {sweep.level_dbfs:g} dBFS, {ms.repeats} repeat(s)")
    if not ms.loopback:
        say("note: " + NO_LOOPBACK_NOTE)
    write_ir_wav(out / "raw" / PLAYBACK_NAME, play[None, :], ms.sample_rate)
    record["playback_file"] = f"raw/{PLAYBACK_NAME}"
    record["level_check"] = level_check(ms, capture_fn)
    say("level check: " + record["level_check"]["advice"])
    write_record(record_path, record)
    for pos in range(1, ms.positions + 1):
        if not yes:
            ask(f"Place the microphone at position {pos} of {ms.positions} and press Enter "
                "(Ctrl-C stops at once) ")
        pos_rec = {"position": pos, "file": None, "channels": []}
        record["positions"].append(pos_rec)
        irs = []
        for spk in ms.outputs:
            outs, ins = [spk], [ms.input]
            sig = play[None, :]
            if ms.loopback:
                outs.append(ms.loopback[0])
                ins.append(ms.loopback[1])
                sig = np.vstack([play, play])
            say(f"position {pos}, output {spk}: playing sweep...")
            cap = capture_fn(sig, outs, ins)
            raw_name = f"raw/pos{pos}_out{spk}.wav"
            write_ir_wav(out / raw_name, cap.recording, ms.sample_rate)
            lb = cap.recording[1] if ms.loopback else None
            ir, figures, gates = analyse_recording(cap.recording[0], lb, layout,
                                                   cap.stream_problems)
            figures["status_flags"] = cap.status_flags
            pos_rec["channels"].append({"output": spk, "raw_file": raw_name,
                                        "figures": figures,
                                        "gates": [g.to_dict() for g in gates]})
            write_record(record_path, record)
            for line in gate_lines(gates):
                say(line)
            if not force:
                q.raise_on_failure(gates, f"position {pos}, output {spk}")
            irs.append(ir)
        name = f"pos{pos}.wav"
        write_ir_wav(out / name, np.array(irs), ms.sample_rate)
        pos_rec["file"] = name
        write_record(record_path, record)
        say(f"saved {out / name}")
    return record


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
    sweep = Sweep.from_dict(layout["sweep"])
    fs = sweep.fs
    h = np.abs(dc.deconvolve(data[:, ref_channel], sweep))[: data.shape[0]]
    first = int(np.argmax(h >= 0.5 * h.max()))
    n_noise = int(round(layout["noise_s"] * fs))
    start = first - int(round(0.010 * fs)) - n_noise
    if start >= 0:
        out = data[start:]
    else:
        out = np.vstack([np.zeros((-start, data.shape[1])), data])
    need = n_noise + int(layout["repeats"]) * (
        sweep.n_samples + int(round(layout["tail_s"] * fs)))
    if out.shape[0] < need:
        out = np.vstack([out, np.zeros((need - out.shape[0], out.shape[1]))])
    return out


def deconvolve_file(
    recording: str | Path, sweep_settings: str | Path, out_path: str | Path | None = None,
    *, force: bool = False, replace: bool = False, loopback_channel: int | None = None,
    align: bool = False,
) -> tuple[Path, dict, list[q.Gate]]:
    """Deconvolve a sweep recorded elsewhere; write the IR WAV and a JSON of its figures.

    Channel 1 of the recording is the microphone; ``loopback_channel`` (1-based,
    default from the sweep settings) is the timing reference. With ``align``
    the recording need not start with the playback: see :func:`align_recording`.
    """
    import soundfile as sf

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
    if align:
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
    write_record(dest.with_suffix(".json"),
                 {"recording": str(rec_path), "ir_file": dest.name, "figures": figures,
                  "gates": [g.to_dict() for g in gates], "sweep_settings": layout})
    return dest, figures, gates
