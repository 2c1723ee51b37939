"""Command line: parse, call, print. No signal processing here.

Every :class:`~roomcorr.errors.RoomcorrError` becomes one line on standard
error and exit status 2. Subcommands are listed in ``_COMMANDS`` as
``(name, add_parser_function, run_function)``.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, NoReturn

from roomcorr.errors import RoomcorrError, SettingsError

PROG = "roomcorr"


class _Parser(argparse.ArgumentParser):
    """ArgumentParser whose usage errors are one line and exit status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: error: {message} (see --help)\n")


def _print_cautions() -> None:
    from roomcorr.design.realise.safety import CAUTIONS

    for line in CAUTIONS:
        print(line, file=sys.stderr)


def _finite(text: str, integer: bool = False) -> Any:
    """Option type: one finite number (``nan``, ``inf`` and ``1e999`` are refused).

    Ranges are checked later, with the settings key named
    (:func:`roomcorr.settings.validate_design`); here only what cannot be a
    number at all is refused, by the same checked-number helper.
    """
    from roomcorr.checked import checked_number

    try:
        return checked_number(text, "", integer=integer)
    except RoomcorrError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _whole(text: str) -> int:
    """Option type: one finite whole number."""
    return _finite(text, integer=True)


def _number_list(text: str, integer: bool) -> list[Any]:
    parts = [x for x in text.split(",") if x.strip()]
    if not parts:
        raise argparse.ArgumentTypeError(f"expected comma-separated numbers, got {text!r}")
    return [_finite(x, integer=integer) for x in parts]


def _float_list(text: str) -> list[float]:
    """Option type: comma-separated finite numbers."""
    return [float(x) for x in _number_list(text, integer=False)]


def _int_list(text: str) -> list[int]:
    """Option type: comma-separated finite whole numbers."""
    return _number_list(text, integer=True)


# --------------------------------------------------------------------------- design


def _add_design_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("design options (override the settings file)")
    g.add_argument("--settings", metavar="FILE", help="TOML settings file or design preset name")
    g.add_argument(
        "--target", metavar="NAME|FILE", help="target preset (flat, gentle-tilt, ...) or text file"
    )
    g.add_argument("--band-lo", type=_finite, metavar="HZ", help="lowest corrected frequency")
    g.add_argument("--band-hi", type=_finite, metavar="HZ", help="highest corrected frequency")
    g.add_argument("--max-boost", type=_finite, metavar="DB", help="boost cap (default 4 dB)")
    g.add_argument(
        "--speaker-low-hz",
        type=_finite,
        metavar="HZ",
        help="your loudspeakers' own low limit (e.g. their -3 dB corner): the filters never "
        "raise the bass below it (default: the measured roll-off or 80 Hz, the higher)",
    )
    g.add_argument("--max-cut", type=_finite, metavar="DB", help="cut cap (default 15 dB)")
    g.add_argument(
        "--taps", type=_whole, metavar="N", help="FIR taps at 48 kHz (other rates: same duration)"
    )
    g.add_argument(
        "--rates", type=_int_list, metavar="R,R", help="output sample rates (44100,48000,96000)"
    )
    g.add_argument("--ceiling", type=_finite, metavar="DB", help="peak-gain ceiling (default 0 dB)")
    g.add_argument(
        "--allow-gain", action="store_true", help="permit a ceiling above 0 dB (risk of clipping)"
    )
    g.add_argument("--calibration", metavar="FILE", help="microphone calibration text file")
    g.add_argument("--weights", type=_float_list, metavar="W,W", help="weight per position")
    g.add_argument("--iir", action="store_true", help="also write biquad sets")
    g.add_argument("--iir-sections", type=_whole, metavar="N", help="most biquads per channel (10)")
    _add_phase_options(g)
    p.add_argument("--replace", action="store_true", help="write over an earlier design in --out")


def _name_list(text: str) -> list[str]:
    names = [x.strip() for x in text.split(",")]
    if not all(names):
        raise argparse.ArgumentTypeError(f"expected comma-separated names, got {text!r}")
    return names


def _add_system_options(p: argparse.ArgumentParser) -> None:
    """Options for several loudspeakers: names, subwoofer, alignment, crossover, formats."""
    from roomcorr.settings import CROSSOVER_SLOPES_DB_OCT, FILTER_FORMATS

    g = p.add_argument_group("several loudspeakers and filter files")
    g.add_argument(
        "--names",
        type=_name_list,
        metavar="A,B",
        help="channel names in file order (e.g. left,right,sub); default left,right for two "
        "channels",
    )
    g.add_argument(
        "--subwoofer",
        metavar="NAME[,NAME...]",
        help="the channel (or comma-separated channels) that are subwoofers; several are "
        "given their own delay, level and polarity for even bass over the listening area",
    )
    g.add_argument(
        "--align",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="put delays and level trims into the filters (default with more than one "
        "channel); --no-align lists them as trims in manifest.json instead",
    )
    g.add_argument(
        "--crossover-range",
        type=_float_list,
        metavar="LO,HI",
        help="frequencies the subwoofer crossover may be chosen from (default 50,150 Hz)",
    )
    g.add_argument(
        "--crossover-slope",
        type=int,
        choices=CROSSOVER_SLOPES_DB_OCT,
        metavar="DB",
        help="Linkwitz-Riley slope in dB/octave: 12, 24 (default) or 48",
    )
    g.add_argument(
        "--formats",
        type=_name_list,
        metavar="F,F",
        help="filter files besides the WAV per channel: "
        + ", ".join(FILTER_FORMATS[1:])
        + " (or all)",
    )


def _system_overrides(args: argparse.Namespace) -> dict[str, Any]:
    from roomcorr.settings import FILTER_FORMATS

    over: dict[str, Any] = {}
    for opt, key in (
        ("names", "channel_names"),
        ("subwoofer", "subwoofer"),
        ("align", "align"),
        ("crossover_slope", "crossover_slope_db_oct"),
    ):
        if getattr(args, opt, None) is not None:
            over[key] = getattr(args, opt)
    rng = getattr(args, "crossover_range", None)
    if rng is not None:
        if len(rng) == 1:
            rng = [rng[0], rng[0]]
        if len(rng) != 2:
            raise SettingsError("--crossover-range needs LO,HI in Hz (or one frequency)")
        over["crossover_range_hz"] = rng
    fmts = getattr(args, "formats", None)
    if fmts is not None:
        over["formats"] = list(FILTER_FORMATS) if fmts == ["all"] else fmts
    return over


def _add_phase_options(g: Any) -> None:
    g.add_argument(
        "--phase",
        choices=("minimum", "mixed"),
        help="minimum (default, no delay) or mixed: also undo the loudspeakers' crossover phase "
        "where it is the same at every position, at the cost of a delay (--latency-ms)",
    )
    g.add_argument(
        "--latency-ms",
        type=_finite,
        metavar="MS",
        help="delay allowed for --phase mixed, and how early several subwoofers' shaped feeds "
        "may act (default 20 ms; 5-250): video then needs the picture delayed as much "
        "(lip-sync); keep minimum phase and one subwoofer for live monitoring",
    )


_OPTION_KEYS = {
    "target": "target",
    "band_lo": "band_lo_hz",
    "band_hi": "band_hi_hz",
    "max_boost": "max_boost_db",
    "speaker_low_hz": "speaker_low_hz",
    "max_cut": "max_cut_db",
    "taps": "taps",
    "rates": "sample_rates",
    "ceiling": "ceiling_db",
    "calibration": "calibration",
    "weights": "position_weights",
    "iir_sections": "iir_sections",
    "phase": "phase",
    "latency_ms": "latency_ms",
}


def settings_from_args(args: argparse.Namespace, base: Any = None) -> Any:
    """Settings: defaults (or a room's settings), then --settings FILE, then options."""
    from roomcorr.settings import Settings, design_from_dict, load_settings

    file = getattr(args, "settings", None)
    settings = load_settings(file) if file else (base if base is not None else Settings())
    overrides: dict[str, Any] = {}
    for opt, key in _OPTION_KEYS.items():
        value = getattr(args, opt, None)
        if value is not None:
            overrides[key] = value
    if getattr(args, "allow_gain", False):
        overrides["allow_gain"] = True
    if getattr(args, "iir", False):
        overrides["iir"] = True
    overrides.update(_system_overrides(args))
    try:
        settings.design = design_from_dict(overrides, base=settings.design)
    except SettingsError as exc:
        raise SettingsError(f"{exc} (from the command line)") from None
    return settings


def _print_area_lines(ch: Any) -> None:
    """Bass limit and the leave-one-position-out prediction of one channel.

    See design/curve/area.py.
    """
    from roomcorr.design.curve.area import area_fields_of
    from roomcorr.report.summary import area_sentences

    for line in area_sentences(area_fields_of(ch), ch.name):
        print(f"          {line.split(': ', 1)[1]}")


def _print_design_summary(result: Any, out: Path, entries: list[dict]) -> None:
    import numpy as np

    from roomcorr.deliver.export import read_manifest
    from roomcorr.deliver.figures import figures_of_manifest, fmt_db
    from roomcorr.design.realise.safety import PEAK_BAND

    # every figure from the manifest's figures block (one place per figure)
    manifest = read_manifest(out)
    figs = figures_of_manifest(manifest)
    per_channel = {c["name"]: c for c in figs["channels"]}
    print(f"Design written to {out}  ({len(entries) + 1} files, manifest.json lists them)")
    _print_files_written(out)
    print(f"Common pre-gain: {fmt_db(figs['pre_gain_db'], 2, True)} (same for every channel)")
    print(f"Largest boost and peak gain below are the filters' largest gain from {PEAK_BAND}, "
          "boost before and peak gain after the pre-gain")
    for ch in result.channels:
        lo, hi = ch.band_hz
        inband = (result.freq_hz >= lo) & (result.freq_hz <= hi)
        corr = ch.correction_db[inband]
        withheld = ch.boost_withheld_db[inband]
        f = per_channel[ch.name]
        cut = min(float(corr.min()), 0.0)
        print(
            f"  {ch.name:>6}: band {lo:6.0f} Hz - {hi:6.0f} Hz | largest boost "
            f"{fmt_db(f['largest_boost_db'])}, largest cut {fmt_db(cut)} | peak gain "
            f"{fmt_db(f['peak_gain_db'], 2, True)}, worst-case gain "
            f"{fmt_db(f['worst_case_gain_db'], 2, True)}"
        )
        _print_area_lines(ch)
        if withheld.size and withheld.max() > 1.0:
            i = int(np.argmax(withheld))
            f0 = result.freq_hz[inband][i]
            print(
                f"          boost withheld: up to {withheld.max():.1f} dB (at {f0:.0f} Hz), "
                "a dip that boosting cannot fix safely"
            )
    for e in entries:
        if e.get("kind") == "iir" and e.get("format") == "json":
            print(
                f"  {e['channel_name']:>6}: {e['sections']} biquads at {e['sample_rate']} Hz, "
                f"fit error {e['fit_rms_error_db']:.1f} dB RMS ({e['fit_max_error_db']:.1f} dB "
                f"max), pre-gain {fmt_db(e['pre_gain_db'], 2, True)}, peak gain "
                f"{fmt_db(e['peak_gain_db'], 2, True)}"
            )
    _print_causes(out)
    _print_system_summary(result)
    if result.mixed_phase is not None:
        from roomcorr.design.phase.mixedphase import latency_sentence

        mp = result.mixed_phase
        print(latency_sentence(mp.latency_ms, mp.latency_samples))
    if result.settings.design.ceiling_db > 0:
        print(
            f"WARNING: ceiling {result.settings.design.ceiling_db:+g} dB allows filter gain; "
            "lower the player's volume to avoid clipping.",
            file=sys.stderr,
        )
    basis = manifest.get("timing_basis")  # the manifest's words, as the report's
    if isinstance(basis, dict) and basis.get("label"):
        print(f"Timing basis of the measurement: {basis['label']}")
    _print_next_steps(out)


def _print_files_written(out: Path) -> None:
    """The filter files per rate and format, relative to ``out`` (deliver/loading.py)."""
    from roomcorr.app.playback import design_files

    for line in design_files(str(out))["lines"]:
        print(line)


def _print_next_steps(out: Path) -> None:
    from roomcorr.deliver.loading import next_steps

    for line in next_steps(str(out)):
        print(line)


def _print_causes(out: Path) -> None:
    """The causes of peaks and withheld dips, as stored in the manifest."""
    from roomcorr.app.placement import format_causes
    from roomcorr.deliver.export import read_manifest

    lines = format_causes(read_manifest(out).get("causes") or [])
    if lines:
        print("Causes (peaks and dips in the correction band):")
        print("\n".join(lines))


def _print_system_summary(result: Any) -> None:
    from roomcorr.deliver.routes import route_diagram
    from roomcorr.deliver.system import manifest_fields, system_sentences

    for line in system_sentences(manifest_fields(result)):
        print(line)
    if result.system is not None and result.system.sub_index is not None:
        names = [c.name for c in result.channels]
        print("Routes (RATE = each sample rate):")
        print(route_diagram(names, result.system), end="")


def _add_design(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "design",
        help="design correction filters from impulse-response WAV files",
        description="Design minimum-phase FIR correction filters (one WAV per channel and "
        "sample rate) from impulse responses: one WAV per microphone position, one channel "
        "per loudspeaker.",
    )
    p.add_argument(
        "irs",
        nargs="*",
        metavar="IR",
        help="impulse-response WAV files or folders (in a room folder: default the latest "
        "measurement)",
    )
    p.add_argument(
        "--out", metavar="DIR", help="output folder (in a room folder: a new designs/ run)"
    )
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    p.add_argument(
        "--layout", metavar="FILE.toml",
        help="room layout, to name the cause of each peak and dip (default: the room's)",
    )
    p.add_argument(
        "--force",
        action="store_true",
        help="design even from files that do not look like impulse responses (no clear "
        "arrival, no decay)",
    )
    _add_design_options(p)
    _add_system_options(p)
    return p


def _run_design(args: argparse.Namespace) -> int:
    from roomcorr.app.design import design_command

    out, result, entries = design_command(
        args.irs,
        lambda base: settings_from_args(args, base),
        out=args.out,
        room_dir=args.room,
        replace=args.replace,
        force=args.force,
        on_start=_print_cautions,
        on_source=lambda meas: print(f"Using the latest measurement: {meas}"),
        layout_file=args.layout,
    )
    _print_design_summary(result, out, entries)
    return 0


# --------------------------------------------------------------------------- demo


def _add_demo(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "demo",
        help="design filters for the bundled demo room and print a summary",
        description="Run the whole design on the invented demo room's measurements.",
    )
    p.add_argument(
        "--out", default="roomcorr-demo", metavar="DIR", help="output folder (roomcorr-demo)"
    )
    _add_design_options(p)
    return p


def _run_demo(args: argparse.Namespace) -> int:
    from roomcorr.app.demo import run_demo

    settings = settings_from_args(args)
    out = Path(args.out)
    report = run_demo(
        out,
        settings,
        args.replace,
        on_source=lambda where: print(f"Demo: an invented living room, {where}"),
        on_start=_print_cautions,
        on_design=lambda result, entries: _print_design_summary(result, out, entries),
    )
    print(f"Report (open in any browser): {report}")
    return 0


# --------------------------------------------------------------------------- report


def _add_report(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "report",
        help="write report.html (and PNG figures) for a design or measurement folder",
        description="Write one self-contained report.html (figures embedded, opens from disk "
        "without network access) plus the figures as PNG files in report/. DIR is a design "
        "output folder or a measurement session folder. The report goes into DIR when "
        "roomcorr wrote DIR (in a room folder: beside the run), else into a new folder "
        "DIR-report in the working folder; --out chooses another.",
    )
    p.add_argument("dir", metavar="DIR", help="design output folder or measurement folder")
    p.add_argument(
        "--out",
        metavar="OUT_DIR",
        help="folder for report.html and report/ (new, empty or holding an earlier report)",
    )
    p.add_argument(
        "--compare-with",
        metavar="RUN_OR_FOLDER",
        help="earlier measurement (run id of the room, folder or WAV file) for the section "
        "comparing both responses (default: in a room folder, the previous measurement)",
    )
    return p


def _run_report(args: argparse.Namespace) -> int:
    from roomcorr.app.report import report_folder
    from roomcorr.deliver.atomic import holds_working_folder

    swapped = Path(args.dir).is_dir() and holds_working_folder(Path(args.dir)) and not args.out
    path, lines = report_folder(args.dir, compare_with=args.compare_with, out_dir=args.out)
    for line in lines:
        print(line)
    print(f"report: {path}")
    if swapped:  # the folder was replaced as a whole (all or nothing): the shell's is the old
        print("the folder was replaced as a whole; in a shell standing in it, 'cd .' shows it")
    return 0


# --------------------------------------------------------------------------- measurement


def _add_devices(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "devices",
        help="list audio devices: which can play, which can record, which were used last",
        description="List the audio devices PortAudio sees, marking which can play (for "
        "--output-device) and which can record (for --input-device), the system defaults "
        "and, inside a room folder, the pair used by its latest measurement.",
    )
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    return p


def _room_quietly(room_arg: str | None) -> Any:
    """The room named or around us, or None (also when it cannot be opened)."""
    from roomcorr import rooms

    try:
        return rooms.open_room(room_arg) if room_arg else rooms.find_room()
    except RoomcorrError:
        return None


def _run_devices(args: argparse.Namespace) -> int:
    from roomcorr.app.measure import devices_view

    view = devices_view(_room_quietly(getattr(args, "room", None)))
    last = view["last"]
    for d in view["devices"]:
        can = [w for w, n in (("play", d["max_output_channels"]),
                              ("record", d["max_input_channels"])) if n > 0]
        marks = []
        if d.get("default_input"):
            marks.append("default input")
        if d.get("default_output"):
            marks.append("default output")
        if last.get("input") == d["name"]:
            marks.append("last used input here")
        if last.get("output") == d["name"]:
            marks.append("last used output here")
        note = f"  <- {', '.join(marks)}" if marks else ""
        print(f"{d['index']:3d}  {d['name']}  [{d['hostapi']}]  {'+'.join(can) or '-':11s} "
              f"in {d['max_input_channels']}, out {d['max_output_channels']}, "
              f"default {d['default_samplerate']:g} Hz{note}")
    print("use the number or part of the name: --input-device for the microphone, "
          "--output-device for the loudspeakers (--device for both)")
    return 0


def _pair(text: str) -> tuple[int, int]:
    vals = _int_list(text)
    if len(vals) != 2:
        raise argparse.ArgumentTypeError(f"expected OUT,IN (two channel numbers), got {text!r}")
    return vals[0], vals[1]


def _add_measure(sub: Any) -> argparse.ArgumentParser:
    from roomcorr.measure.settings import DEFAULT_LEVEL_DBFS, LEVEL_CAP_DBFS

    p = sub.add_parser(
        "measure",
        help="play sweeps, record the microphone and write impulse responses",
        description="Measure the room: for each microphone position and loudspeaker, play "
        "synchronised sweeps and record them; write one impulse-response WAV per position "
        "(channels = loudspeakers), the raw recordings in raw/ and measurement.json with "
        "every setting and quality figure. The folder is a valid input to 'roomcorr design'. "
        f"Sweeps start at {DEFAULT_LEVEL_DBFS:g} dBFS and are capped at {LEVEL_CAP_DBFS:g} "
        "dBFS: turn the amplifier down first.",
    )
    p.add_argument(
        "--out", metavar="DIR", help="new (or empty) session folder (in a room folder: a new run)"
    )
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    p.add_argument("--settings", metavar="FILE", help="settings TOML; its [measure] table")
    p.add_argument("--device", help="device for both playing and recording: name part or "
                   "number from 'roomcorr devices'")
    p.add_argument("--input-device", metavar="DEVICE",
                   help="the microphone's device (e.g. a USB microphone), if not --device")
    p.add_argument("--output-device", metavar="DEVICE",
                   help="the loudspeakers' device (headphone/HDMI output, USB DAC), if not "
                   "--device")
    p.add_argument("--two-streams", action="store_true", default=None,
                   help="play and record with separate streams even on one device")
    p.add_argument("--outputs", type=_int_list, metavar="1,2",
                   help="output channel of each loudspeaker (default 1,2)")
    p.add_argument("--names", type=_name_list, metavar="A,B",
                   help="loudspeaker names, one per --outputs channel (e.g. left,right,sub)")
    p.add_argument("--input", type=_whole, metavar="N", help="microphone input channel (default 1)")
    p.add_argument("--loopback", type=_pair, metavar="OUT,IN",
                   help="spare output cabled back to an input: timing reference that removes "
                   "the system latency")
    p.add_argument("--positions", type=_whole, metavar="N", help="microphone positions (default 1)")
    p.add_argument("--repeats", type=_whole, metavar="N", help="sweeps averaged per loudspeaker")
    p.add_argument("--sweep-seconds", type=_finite, metavar="S", help="sweep length (default 5)")
    p.add_argument("--band", type=_float_list, metavar="LO,HI", help="sweep band in Hz")
    p.add_argument("--rate", type=_whole, metavar="HZ", help="sample rate (default 48000)")
    p.add_argument("--level", type=_finite, metavar="DBFS",
                   help=f"sweep peak level (default {DEFAULT_LEVEL_DBFS:g} dBFS)")
    p.add_argument("--allow-loud", action="store_true",
                   help=f"allow a sweep level above {LEVEL_CAP_DBFS:g} dBFS (prints a warning)")
    p.add_argument("--ir-seconds", type=_finite, metavar="S", help="impulse response length")
    p.add_argument("--reference", type=_whole, metavar="N",
                   help="output of the timing-reference loudspeaker: its short markers before "
                   "and after every sweep fix the timing and the clock drift (default: the "
                   "first of --outputs)")
    p.add_argument("--no-markers", action="store_true",
                   help="no timing markers (arrival times then include the system latency)")
    p.add_argument("--mic-sensitivity", type=_finite, metavar="DBFS",
                   help="microphone sensitivity: dBFS read for 94 dB SPL (from 'roomcorr "
                   "calibrate-mic'); levels are then shown in dB SPL")
    p.add_argument("--mic-calibration", metavar="FILE",
                   help="microphone calibration file whose header holds "
                   "'# sensitivity_dbfs = X'")
    p.add_argument("--blocksize", type=_whole, metavar="FRAMES",
                   help="frames per audio buffer (default: the audio system's choice); "
                   "raise it (e.g. 2048) when buffers are dropped")
    p.add_argument("--yes", action="store_true",
                   help="do not wait for Enter between positions; a position failing a check "
                   "is skipped")
    p.add_argument("--force", action="store_true",
                   help="keep recordings that fail a gate (also a clock drift above the limit)")
    p.add_argument("--replace", action="store_true", help="allow a non-empty --out folder")
    p.add_argument("--resume", action="store_true",
                   help="continue an unfinished measurement (in --out, or the room's latest)")
    p.add_argument("--plain", action="store_true",
                   help="plain progress lines instead of the live meter")
    p.add_argument("--through", metavar="DESIGN_DIR",
                   help="play the sweeps through this design's filters (pre-gain included) "
                   "to check the correction before loading it anywhere")
    return p


def measure_settings_from_args(
    args: argparse.Namespace, room_measure: dict[str, Any] | None = None
) -> Any:
    """MeasureSettings from the room's or --settings' [measure] table, then options."""
    from roomcorr.measure.settings import MeasureSettings

    base: dict[str, Any] = dict(room_measure or {})
    if args.settings:
        from roomcorr.settings import load_settings

        base = dict(load_settings(args.settings).measure)
    over = {
        "device": args.device, "input_device": args.input_device,
        "output_device": args.output_device, "two_streams": args.two_streams,
        "reference": args.reference, "blocksize": args.blocksize,
        "mic_sensitivity_dbfs": args.mic_sensitivity,
        "outputs": args.outputs, "input": args.input,
        "loopback": args.loopback, "positions": args.positions, "repeats": args.repeats,
        "sweep_s": args.sweep_seconds, "sample_rate": args.rate, "level_dbfs": args.level,
        "ir_s": args.ir_seconds, "names": args.names,
    }
    base.update({k: v for k, v in over.items() if v is not None})
    if args.allow_loud:
        base["allow_loud"] = True
    if args.no_markers:
        base["markers"] = False
    if args.mic_calibration and args.mic_sensitivity is None:
        from roomcorr.measure.levels import sensitivity_from_file

        base["mic_sensitivity_dbfs"] = sensitivity_from_file(args.mic_calibration)
    if args.band is not None:
        if len(args.band) != 2:
            raise SettingsError("--band needs LO,HI in Hz")
        base["f_start_hz"], base["f_end_hz"] = args.band
    return MeasureSettings.from_dict(base, args.settings or "options")


def _print_positions_advice(args: argparse.Namespace, room: Any) -> None:
    """With several subwoofers named in the design settings, advise a wide spread of positions."""
    from roomcorr import rooms
    from roomcorr.measure.guidance import positions_advice
    from roomcorr.settings import load_settings, subwoofer_names

    if args.settings:
        design = load_settings(args.settings).design
    elif room is not None:
        design = rooms.load_room_settings(room).design
    else:
        return
    advice = positions_advice(len(subwoofer_names(design.subwoofer)), args.positions or 1)
    if advice:
        print(advice)


def _run_measure(args: argparse.Namespace) -> int:
    from roomcorr import rooms
    from roomcorr.app.measure import measure_in_room, measure_into
    from roomcorr.measure.live import make_view

    room = rooms.open_room(args.room) if args.room else None
    if room is None and not args.out:
        room = rooms.find_room()
    view = make_view(plain=args.plain)
    kw = {"yes": args.yes, "force": args.force, "say": view.say, "view": view,
          "through": args.through}
    _print_positions_advice(args, room)
    if args.out:
        ms = measure_settings_from_args(args)
        with view:
            record = measure_into(ms, args.out, replace=args.replace, resume=args.resume,
                                  **kw)
        n = sum(1 for p in record["positions"] if p["file"])
        print(f"measured {n} position(s) into {args.out}; next: roomcorr design {args.out}")
        return 0
    if room is None:
        raise SettingsError(
            "measure: give --out DIR, or run it inside a room folder (see roomcorr init)"
        )
    ms = measure_settings_from_args(args, rooms.load_room_settings(room).measure)
    with view:
        res = measure_in_room(room, ms, resume=args.resume, **kw)
    print(
        f"measured {res['positions_saved']} position(s) into "
        f"{res['run_dir'].relative_to(room.root)}; next: roomcorr design"
    )
    return 0


def _add_calibrate_mic(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "calibrate-mic",
        help="find the microphone's sensitivity with an acoustic calibrator (94 dB SPL)",
        description="Fit the acoustic calibrator (IEC 60942, 1 kHz) snugly over the "
        "microphone, switch it on, then run this: it records a few seconds (nothing is "
        "played) and prints the sensitivity in dBFS for 94 dB SPL, for 'roomcorr measure "
        "--mic-sensitivity'. Keep the input gain as it will be for the measurement.",
    )
    p.add_argument("--device", help="the microphone's device (name part or number)")
    p.add_argument("--input", type=_whole, default=1, metavar="N", help="input channel (1)")
    p.add_argument("--rate", type=_whole, default=48000, metavar="HZ", help="sample rate")
    p.add_argument("--seconds", type=_finite, default=4.0, metavar="S",
                   help="recording length (default 4)")
    p.add_argument("--calibrator-level", type=_finite, default=94.0, metavar="DB",
                   help="the calibrator's level in dB SPL (94 or 114)")
    p.add_argument("--plain", action="store_true", help="no live meter")
    return p


def _run_calibrate_mic(args: argparse.Namespace) -> int:
    from roomcorr.app.measure import calibrate_microphone
    from roomcorr.measure.live import make_view

    view = make_view(plain=args.plain)
    with view:
        res = calibrate_microphone(args.rate, args.input, args.seconds, args.device,
                                   args.calibrator_level, view=view)
    sens, frac = res["sensitivity_dbfs"], res["fraction_at_1k"]
    print(f"microphone sensitivity: {sens:.2f} dBFS for 94 dB SPL "
          f"({args.calibrator_level:g} dB SPL calibrator, {frac:.1%} of the level at 1 kHz)")
    print(f"use it: roomcorr measure --mic-sensitivity {sens:.2f} (same input gain), or "
          f"mic_sensitivity_dbfs = {sens:.2f} in [measure] of the room settings")
    return 0


def _add_deconvolve(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "deconvolve",
        help="turn a sweep recorded elsewhere into an impulse response",
        description="Deconvolve RECORDING (channel 1 = microphone) with the sweep described "
        "by --sweep-settings (a measurement.json, or its 'sweep_settings' part). Writes the "
        "impulse response WAV and a JSON file of quality figures beside it.",
    )
    p.add_argument("recording", metavar="RECORDING.wav")
    p.add_argument("--sweep-settings", required=True, metavar="FILE.json")
    p.add_argument("--out", metavar="IR.wav", help="default: RECORDING_ir.wav")
    p.add_argument("--loopback-channel", type=_whole, metavar="N",
                   help="channel of the loopback reference (default from the sweep settings)")
    p.add_argument("--align", action="store_true",
                   help="the recording did not start together with the playback (another "
                   "program recorded it): find the first sweep")
    p.add_argument("--force", action="store_true", help="write even if a gate fails")
    p.add_argument("--replace", action="store_true", help="overwrite --out")
    return p


def _run_deconvolve(args: argparse.Namespace) -> int:
    from roomcorr.measure.session import deconvolve_file, gate_lines

    dest, figures, gates = deconvolve_file(
        args.recording, args.sweep_settings, args.out, force=args.force, replace=args.replace,
        loopback_channel=args.loopback_channel, align=args.align,
    )
    for line in gate_lines(gates):
        print(line)
    print(f"arrival {figures['arrival_s'] * 1000:.2f} ms ({figures['latency_note']})")
    if "drift_ppm" in figures:
        print(f"clock drift {figures['drift_ppm']:+.1f} ppm (corrected)")
    print(f"impulse response: {dest}")
    return 0


# --------------------------------------------------------------------------- room folders


def _add_init(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "init",
        help="create a room folder with a commented settings file",
        description="Create a room folder: roomcorr-room.toml (design and measurement settings, "
        "commented) and folders for measurements and designs. Commands run inside the folder "
        "read its settings; command-line options override them for that run.",
    )
    p.add_argument("room_dir", metavar="ROOM_DIR", help="folder to create (may already exist)")
    p.add_argument("--name", help="name of the room (default: the folder's name)")
    return p


def _run_init(args: argparse.Namespace) -> int:
    from roomcorr.rooms import init_room

    room = init_room(args.room_dir, args.name)
    print(f"Room folder ready: {room.root}")
    print(f"  settings: {room.settings_path} (edit it; command-line options override it)")
    print("  next: 'roomcorr measure' inside it (start at a low volume), then 'roomcorr design'")
    return 0


def _add_history(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "history",
        help="list the measurements and designs of a room folder",
        description="List every measurement and design of a room folder, oldest first, with "
        "key figures. Interrupted runs are shown as incomplete.",
    )
    p.add_argument(
        "room_dir", nargs="?", default=".", metavar="ROOM_DIR",
        help="room folder (default: the one you are in)",
    )
    p.add_argument("--json", action="store_true", help="machine-readable output")
    return p


def _run_history(args: argparse.Namespace) -> int:
    import json

    from roomcorr.app.history import format_history, room_history

    doc = room_history(args.room_dir)
    if args.json:
        print(json.dumps(doc, indent=2))
    else:
        print("\n".join(format_history(doc["runs"], doc["name"])))
    return 0


def _add_compare(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "compare",
        help="what changed between two measurements (arrival, distance, level, bass, filters)",
        description="Compare two measurements per loudspeaker channel: change in arrival time "
        "and distance, level, low-frequency response per 1/3 octave, peaks and dips, and "
        "whether the existing filters still fit. Default: the room's last two measurements.",
    )
    p.add_argument(
        "a", nargs="?", metavar="A",
        help="earlier measurement: run id, measurement folder, or IR WAV file(s) "
        "separated by commas (one per position)",
    )
    p.add_argument("b", nargs="?", metavar="B", help="later measurement (same forms as A)")
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    p.add_argument(
        "--temperature", type=_finite, metavar="C",
        help="air temperature in °C for the speed of sound (default: design.temperature_c "
        "of the room settings, else 20)",
    )
    p.add_argument(
        "--no-filter-check", action="store_true", help="skip the check of the existing filters"
    )
    p.add_argument(
        "--design", metavar="RUN",
        help="design run to check (default: the one made from measurement A)",
    )
    p.add_argument(
        "--layout-before", metavar="FILE.toml",
        help="layout A was measured with (default: the copy its run keeps); after a move, "
        "compare sets the change the room model predicted beside the measured one",
    )
    p.add_argument("--layout-after", metavar="FILE.toml",
                   help="layout B was measured with (default: the copy its run keeps)")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.add_argument("--plot", metavar="FILE.png", help="also draw both responses overlaid")
    return p


def _run_compare(args: argparse.Namespace) -> int:
    import json

    from roomcorr.app.compare import compare_command
    from roomcorr.report.compare import format_comparison

    if (args.a is None) != (args.b is None):
        raise SettingsError("compare: give both A and B, or neither (the last two measurements)")
    if args.temperature is not None and not -30.0 <= args.temperature <= 60.0:
        raise SettingsError(f"--temperature {args.temperature:g}: expected -30 to 60 °C")
    res = compare_command(
        args.a, args.b, room_dir=args.room, temperature_c=args.temperature,
        fit_check=not args.no_filter_check, plot=args.plot, design=args.design,
        layout_before=args.layout_before, layout_after=args.layout_after,
    )
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print("\n".join(format_comparison(res)))
    if args.plot:
        print(f"plot written to {args.plot}", file=sys.stderr if args.json else sys.stdout)
    return 0


def _add_import(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "import",
        help="make a measurement run of the room from existing impulse-response WAVs",
        description="Inside a room folder: check impulse-response WAVs (one per microphone "
        "position, one channel per loudspeaker) as design checks them, copy and hash them "
        "into a new measurement run, so history, design, compare and the app work on them. "
        "Nothing is written when a file is refused.",
    )
    p.add_argument("files", nargs="+", metavar="FILE", help="WAV files (or folders of them)")
    p.add_argument("--names", metavar="A,B,...", help="channel names, one per channel")
    p.add_argument(
        "--timing-basis", metavar="BASIS", default="unknown",
        help="what the responses' time origin is: unknown (default), loopback, single-device, "
        "or reference:CHANNEL (one loudspeaker's arrival, as with the acoustic reference)",
    )
    p.add_argument("--note", metavar="TEXT", help="a note shown by history")
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    return p


def _run_import(args: argparse.Namespace) -> int:
    from roomcorr import rooms
    from roomcorr.app.imports import import_measurement

    room = rooms.open_room(args.room) if args.room else rooms.find_room()
    if room is None:
        room = rooms.open_room(".")  # raises with the message on how to make a room folder
    res = import_measurement(room, args.files, args.names, args.timing_basis, args.note)
    print(
        f"imported {res['positions']} position(s) x {res['channels']} channel(s) "
        f"({', '.join(res['names'])}), {res['sample_rate']} Hz, as measurement {res['run_id']}"
    )
    print(f"  timing basis: {res['timing_basis']['label']}")
    print("  next: 'roomcorr design' or 'roomcorr compare' in the room folder")
    return 0


# --------------------------------------------------------------------------- placement


def _triple(text: str) -> tuple[float, float, float]:
    """Option type: three comma-separated finite numbers (metres)."""
    vals = _float_list(text)
    if len(vals) != 3:
        raise argparse.ArgumentTypeError(f"expected x,y,z in metres, got {text!r}")
    return (vals[0], vals[1], vals[2])


def _named_triple(text: str) -> tuple[str, tuple[float, float, float]]:
    """Option type: NAME=x,y,z."""
    name, sep, rest = text.partition("=")
    if not sep or not name.strip():
        raise argparse.ArgumentTypeError(f"expected NAME=x,y,z, got {text!r}")
    return name.strip(), _triple(rest)


def _add_layout(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "layout",
        help="enter or show the room's layout (size, loudspeakers, seat, measured positions)",
        description="The room layout in metres: x across the room from the left wall (as seen "
        "from the seat facing the loudspeakers), y from the front wall behind the loudspeakers, "
        "z up from the floor. Kept as layout.toml in the room folder, or in --file.",
    )
    p.add_argument("action", choices=("show", "set"), help="show it, or set values in it")
    p.add_argument("--file", metavar="FILE.toml", help="a layout file outside a room folder")
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")
    p.add_argument("--size", type=_triple, metavar="W,L,H", help="room width, length, height")
    p.add_argument(
        "--speaker", type=_named_triple, action="append", metavar="NAME=x,y,z",
        help="a loudspeaker's acoustic centre (repeat; names as the design's channels)",
    )
    p.add_argument("--seat", type=_triple, metavar="x,y,z", help="the listener's head")
    p.add_argument(
        "--measured", type=_triple, action="append", metavar="x,y,z",
        help="a measurement position (repeat, in the order of the measured files)",
    )
    p.add_argument("--json", action="store_true", help="machine-readable output")
    return p


def _run_layout(args: argparse.Namespace) -> int:
    import json

    from roomcorr.app.placement import need_layout, set_layout
    from roomcorr.placement.layout import layout_text

    if args.action == "set":
        path, layout = set_layout(
            args.size, args.speaker, args.seat, args.measured, args.file, args.room
        )
        if not args.json:
            print(f"layout written to {path}")
    else:
        layout = need_layout(args.file, args.room)
    print(json.dumps(layout.to_dict(), indent=2) if args.json else layout_text(layout), end="")
    if args.json:
        print()
    return 0


def _add_placement_inputs(p: argparse.ArgumentParser) -> None:
    """The measured positions, the layout and the room: what predict and advise start from."""
    p.add_argument("irs", nargs="*", metavar="POS.wav",
                   help="measured positions (default: the room's latest measurement)")
    p.add_argument("--layout", metavar="FILE.toml", help="layout (default: the room's)")
    p.add_argument("--room", metavar="ROOM_DIR", help="room folder (default: the one you are in)")


def _add_predict(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "predict",
        help="predict the bass at a seat after moving loudspeakers or the seat",
        description="Fit a model of the room to the measured positions (the layout gives the "
        "room's size and where everything stood), then predict the impulse response of every "
        "loudspeaker at the seat after the moves given. Written at 48 kHz, one channel per "
        "loudspeaker in the layout's order, valid at low frequencies only (stated).",
    )
    _add_placement_inputs(p)
    p.add_argument("--move", type=_named_triple, action="append", metavar="NAME=x,y,z",
                   help="move a loudspeaker there (repeat)")
    p.add_argument("--seat", type=_triple, metavar="x,y,z", help="predict at this seat")
    p.add_argument("--out", metavar="FILE.wav",
                   help="output WAV (default: predicted.wav in the room folder)")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    return p


def _run_predict(args: argparse.Namespace) -> int:
    import json

    from roomcorr.app.placement import format_prediction, predict_command

    res = predict_command(
        args.irs or None, args.out, args.layout, dict(args.move or []), args.seat, args.room
    )
    print(json.dumps(res, indent=2) if args.json else "\n".join(format_prediction(res)))
    return 0


def _add_advise(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "advise",
        help="suggest where to put the loudspeakers and the seat for smoother bass",
        description="Search loudspeaker positions (pairs kept symmetric unless --asymmetric) "
        "and seat positions along the room's length within the limits given, design the "
        "correction for each through the same design code, and rank them by the predicted "
        "bass over the listening area after correction.",
    )
    _add_placement_inputs(p)
    p.add_argument("--max-move", type=_finite, default=0.5, metavar="M",
                   help="how far a loudspeaker may move from where it is, m (default 0.5)")
    p.add_argument("--seat-range", type=_finite, default=0.5, metavar="M",
                   help="how far the seat may move along the length, m (default 0.5; 0: fixed)")
    p.add_argument("--wall-min", type=_finite, default=0.2, metavar="M",
                   help="closest a loudspeaker may come to a wall, m (default 0.2)")
    p.add_argument("--asymmetric", action="store_true",
                   help="move each loudspeaker on its own (default: mirror pairs)")
    p.add_argument("--top", type=_whole, default=3, metavar="N",
                   help="how many suggestions to print (default 3)")
    p.add_argument("--plot", metavar="FILE.png",
                   help="also draw the plan: current and suggested positions, bass map")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    return p


def _run_advise(args: argparse.Namespace) -> int:
    import json

    from roomcorr.app.placement import advise_command, format_advice

    res = advise_command(
        args.irs or None, args.layout, args.room, max_move_m=args.max_move,
        seat_range_m=args.seat_range, wall_min_m=args.wall_min,
        symmetric=not args.asymmetric, top=args.top,
    )
    print(json.dumps(res, indent=2) if args.json else "\n".join(format_advice(res)))
    if args.plot:
        from roomcorr.app.placement import write_plan

        write_plan(res, args.plot)
        print(f"plan written to {args.plot}", file=sys.stderr if args.json else sys.stdout)
    return 0


# --------------------------------------------------------------------------- main

# --------------------------------------------------------------------------- browser app


def _add_ui(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "ui",
        help="open the room in a local browser app (measure, design, explore runs and files)",
        description="Start a local server on 127.0.0.1 (a free port) for a room folder and open "
        "it in the browser. The printed address holds a one-time key; only this machine can "
        "reach it. Ctrl-C stops it.",
    )
    p.add_argument("room", nargs="?", metavar="ROOM_DIR", help="room folder (default: this one)")
    p.add_argument("--port", type=int, default=0, help="port (default: a free one)")
    p.add_argument("--no-browser", action="store_true", help="only print the address")
    return p


def _run_ui(args: argparse.Namespace) -> int:
    from roomcorr import rooms

    room = rooms.open_room(args.room or ".")
    if not 0 <= args.port <= 65535:
        raise SettingsError(f"--port {args.port}: give a port from 1 to 65535 (0: a free one)")
    try:
        from roomcorr.ui.server import serve
    except ImportError as exc:
        raise RoomcorrError(
            f"the browser app needs its server packages ({exc.name} is missing); install them "
            "with pip install \".[ui]\" from the roomcorr folder"
        ) from None
    try:
        serve(room, port=args.port, open_browser=not args.no_browser)
    except OSError as exc:
        raise RoomcorrError(f"cannot start the app on port {args.port}: {exc.strerror}") from None
    return 0


# --------------------------------------------------------------------------- playback


def _add_apply(sub: Any) -> argparse.ArgumentParser:
    from roomcorr.playback.limits import LOWERED_PEAK_DBFS, SUBTYPES

    p = sub.add_parser(
        "apply",
        help="render an audio file through a design's filters (offline, streamed)",
        description="Convolve INPUT through the design's routes (every input into every "
        "output it feeds, with the design's delays and gains) at the file's sample rate, "
        "block by block. The output has one channel per loudspeaker output and keeps the "
        "filters' tail. Nothing is clipped: if the result would exceed full scale it is "
        f"lowered to {LOWERED_PEAK_DBFS:g} dBFS peak and the amount printed (--no-lower "
        "refuses instead).",
    )
    p.add_argument("input", metavar="INPUT", help="audio file (WAV, FLAC, ...)")
    p.add_argument(
        "--design", metavar="DIR", help="design folder (in a room folder: its latest design)"
    )
    p.add_argument("--out", required=True, metavar="OUTPUT.wav", help="file to write")
    p.add_argument(
        "--subtype", default="FLOAT", choices=SUBTYPES, help="output sample format (FLOAT)"
    )
    p.add_argument(
        "--no-lower",
        action="store_true",
        help="refuse (write nothing) rather than lower a result that would clip",
    )
    return p


def _run_apply(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from roomcorr.app.playback import apply_command, default_design

    args.design = default_design(args.design)
    console = Console(stderr=True)
    with Progress(
        TextColumn("rendering"),
        BarColumn(),
        TextColumn("{task.percentage:>3.0f} %"),
        TimeRemainingColumn(),
        console=console,
        transient=True,
    ) as bar:
        task = bar.add_task("apply", total=1)
        res = apply_command(
            args.input,
            args.design,
            args.out,
            subtype=args.subtype,
            lower=not args.no_lower,
            on_progress=lambda done, total: bar.update(task, completed=done, total=total),
        )
    print(
        f"Wrote {res['out']}: {res['seconds']:.1f} s at {res['sample_rate']} Hz, "
        f"{res['inputs']} input(s) -> {res['outputs']} output(s), {res['subtype']}"
    )
    peak = "silent" if res["peak_dbfs"] is None else f"{res['peak_dbfs']:+.2f} dBFS"
    print(f"Output peak (sample): {peak}")
    if res["lowered_db"] > 0:
        print(
            f"LOWERED by {res['lowered_db']:.2f} dB: the result would have exceeded full "
            f"scale; its peak is now {res['lowered_to_dbfs']:g} dBFS (nothing clipped)"
        )
    if res["latency_ms"] > 0:
        print(f"Mixed-phase latency: the output is {res['latency_ms']:.2f} ms late")
    _print_cautions()
    return 0


def _add_commands(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "commands",
        help="print where a design's files are and ffmpeg/sox command lines that apply it",
        description="Print the design's filter files and, per sample rate, an ffmpeg "
        "command (afir) and sox commands (fir) that render a file through the design's "
        "routes, delays and gains exactly as 'roomcorr apply' does.",
    )
    p.add_argument("design", metavar="DIR", help="design folder")
    p.add_argument("--rate", type=_whole, metavar="HZ", help="only this sample rate")
    p.add_argument("--input", default="music.wav", metavar="FILE", help="input file name")
    p.add_argument("--output", default="corrected.wav", metavar="FILE", help="output file name")
    p.add_argument(
        "--pipewire",
        metavar="FILE.conf",
        help="also write a PipeWire filter-chain configuration (a sink that plays through "
        "the design; filters at --rate, default 48000 Hz)",
    )
    return p


def _run_commands(args: argparse.Namespace) -> int:
    from roomcorr.app.playback import design_commands, design_files

    files = design_files(args.design)
    print(f"Filters in {files['folder']}:")
    for line in files["lines"]:
        print(line)
    doc = design_commands(args.design, args.rate, args.input, args.output)
    ver = doc["ffmpeg_version"]
    for r in doc["rates"]:
        print(f"\n# {r['sample_rate']} Hz input: ffmpeg"
              + (f" {ver[0]}.{ver[1]}" if ver else " 6.1 or later"))
        print(r["ffmpeg"])
        if r["sox"] is None:
            print(f"# sox: {r['sox_note']}")
        else:
            print(f"# {r['sample_rate']} Hz input: sox (one command per output, then join)")
            for line in r["sox"]:
                print(line)
    print("\n# sox clips samples beyond full scale; check the peak with 'roomcorr apply' first.")
    if args.pipewire:
        from roomcorr.app.playback import pipewire_config

        pw = pipewire_config(args.design, args.pipewire, args.rate)
        print(
            f"\nPipeWire configuration ({pw['sample_rate']} Hz filters): {pw['path']}\n"
            f"  put it in {pw['where']};\n"
            f"  a sink called '{pw['sink']}' appears: play music to it and connect its output "
            "to the loudspeakers' device."
        )
        _print_cautions()
    return 0


def _add_listen(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "listen",
        help="play music through a design, switching corrected/uncorrected at equal loudness",
        description="Play MUSIC through the design in real time (the same routes as 'apply') "
        "and switch between corrected and uncorrected with a short cross-fade. The "
        "uncorrected path is lowered to the corrected one's integrated loudness (ITU-R "
        "BS.1770), so neither wins just by being louder. Keys: space or Enter switches, "
        "+ and - change the level by 3 dB (never above the file's own level), q stops. "
        "Starts quietly.",
    )
    p.add_argument("music", metavar="MUSIC", help="audio file at one of the design's rates")
    p.add_argument(
        "--design", metavar="DIR", help="design folder (in a room folder: its latest design)"
    )
    p.add_argument("--output-device", "--device", dest="device", metavar="DEV",
                   help="output device (name part or number from 'roomcorr devices')")
    p.add_argument("--level", type=_finite, default=-20.0, metavar="DB",
                   help="starting level in dB below the file's own level (default -20; "
                   "at most 0)")
    p.add_argument("--block", type=_whole, default=256, metavar="N",
                   help="samples per audio block (default 256)")
    return p


def _run_listen(args: argparse.Namespace) -> int:
    import threading

    from roomcorr.app.playback import default_design, prepare_listening
    from roomcorr.playback.device import play

    args.design = default_design(args.design)
    if args.block < 32 or args.block > 16384:
        raise SettingsError(f"--block {args.block}: choose 32 to 16384 samples")
    _print_cautions()
    paths, music, fig = prepare_listening(args.music, args.design, args.level, args.block)
    print(
        f"Playing {args.music} through {args.design}: {fig['seconds']:.0f} s at "
        f"{fig['sample_rate']} Hz, "
        f"{', '.join(fig['inputs'])} -> {', '.join(fig['outputs'])}, block "
        f"{fig['block']} ({fig['block_ms']:.1f} ms)"
    )
    print(
        f"Equal loudness: the uncorrected path is set {fig['uncorrected_gain_db']:+.2f} dB "
        f"(design pre-gain {fig['pre_gain_db']:+.2f} dB; BS.1770 integrated loudness of the "
        f"first {fig['loudness_seconds']:.0f} s: corrected {fig['loudness_corrected_lufs']:.1f} "
        f"LUFS, uncorrected {fig['loudness_uncorrected_lufs']:.1f} LUFS before matching)"
    )
    if fig["latency_ms"] > 0:
        print(f"Latency of this mixed-phase design: {fig['latency_ms']:.2f} ms (both paths wait "
              "as long, so the switch does not jump in time)")
    print(f"Level {fig['level_db']:+.0f} dB. Keys: space/Enter switch, + louder, - quieter, "
          "q stop.")
    stop = threading.Event()
    level = [fig["level_db"]]

    def on_key(key: str) -> None:
        if key in (" ", "\n", "\r"):
            now = paths.toggle()
            print("corrected" if now else "uncorrected (loudness-matched)", flush=True)
        elif key in ("+", "="):
            level[0] = min(0.0, level[0] + 3.0)
            paths.set_level_db(level[0])
            print(f"level {level[0]:+.0f} dB" + (" (the file's own level: the cap)"
                  if level[0] == 0.0 else ""), flush=True)
        elif key == "-":
            level[0] -= 3.0
            paths.set_level_db(level[0])
            print(f"level {level[0]:+.0f} dB", flush=True)
        elif key in ("q", "Q"):
            stop.set()

    reader = threading.Thread(target=_read_keys, args=(on_key, stop), daemon=True)
    reader.start()
    status = play(paths, music, args.device, stop)
    print(f"Stopped after {status.blocks} blocks; buffers lost: {status.underflows}")
    return 0


def _read_keys(on_key: Callable[[str], None], stop: Any) -> None:
    """Single keys from a terminal (cbreak mode), else whole lines; until ``stop`` is set."""
    import os
    import select

    fd = sys.stdin.fileno() if sys.stdin is not None else -1
    if fd < 0:
        return
    tty_state = None
    if os.isatty(fd):
        import termios
        import tty

        tty_state = termios.tcgetattr(fd)
        tty.setcbreak(fd)
    try:
        while not stop.is_set():
            ready, _, _ = select.select([fd], [], [], 0.1)
            if not ready:
                continue
            ch = os.read(fd, 1).decode(errors="ignore")
            if not ch:
                return
            on_key(ch)
    finally:
        if tty_state is not None:
            import termios

            termios.tcsetattr(fd, termios.TCSADRAIN, tty_state)


_COMMANDS: list[tuple[str, Callable[[Any], argparse.ArgumentParser], Callable[..., int]]] = [
    ("demo", _add_demo, _run_demo),
    ("design", _add_design, _run_design),
    ("report", _add_report, _run_report),
    ("devices", _add_devices, _run_devices),
    ("measure", _add_measure, _run_measure),
    ("calibrate-mic", _add_calibrate_mic, _run_calibrate_mic),
    ("deconvolve", _add_deconvolve, _run_deconvolve),
    ("init", _add_init, _run_init),
    ("history", _add_history, _run_history),
    ("compare", _add_compare, _run_compare),
    ("import", _add_import, _run_import),
    ("ui", _add_ui, _run_ui),
    ("apply", _add_apply, _run_apply),
    ("commands", _add_commands, _run_commands),
    ("listen", _add_listen, _run_listen),
    ("layout", _add_layout, _run_layout),
    ("predict", _add_predict, _run_predict),
    ("advise", _add_advise, _run_advise),
]


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (all subcommands)."""
    from roomcorr import __version__

    parser = _Parser(
        prog=PROG,
        description="Measure a listening room and design safe correction filters. "
        "Start playback quietly: filters are capped at 0 dB peak gain by default.",
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for _name, add, _run in _COMMANDS:
        add(sub)
    return parser


def _os_error_line(exc: OSError) -> str:
    """One line for an operating-system error: the file it concerns and why."""
    from roomcorr.deliver.atomic import disk_error_text

    where = exc.filename if exc.filename is not None else ""
    text = f"{where}: {disk_error_text(exc)}" if where else disk_error_text(exc)
    return " ".join(text.split())


def _quiet_broken_pipe() -> int:
    """The reader of our output went away (``roomcorr compare --json | head``): stop
    quietly, and keep Python from complaining when it flushes standard output at exit."""
    import os

    with contextlib.suppress(OSError, ValueError):
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    return 141  # 128 + SIGPIPE, as a shell reports a command ended by a closed pipe


def _take_over_interrupts() -> None:
    """Restore Python's Ctrl-C handler, raising now for a Ctrl-C noted while starting."""
    import signal

    import roomcorr

    if signal.getsignal(signal.SIGINT) is roomcorr._note_early_interrupt:
        signal.signal(signal.SIGINT, signal.default_int_handler)
    if roomcorr._EARLY_INTERRUPTS:
        roomcorr._EARLY_INTERRUPTS.clear()
        raise KeyboardInterrupt


def _interrupt_again(unraisable: Any) -> None:
    """``sys.unraisablehook`` while a command runs: a Ctrl-C that arrived inside a
    finaliser or weak-reference callback (where Python prints "Exception ignored" with a
    traceback and carries on) is delivered again, so that it stops the command in one
    line; anything else goes to Python's own hook."""
    import _thread
    import threading

    if isinstance(unraisable.exc_value, KeyboardInterrupt):
        # from another thread, a moment later: raised here, it would be lost again
        threading.Timer(0.01, _thread.interrupt_main).start()
        return
    sys.__unraisablehook__(unraisable)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``roomcorr`` command; returns the exit status.

    Every way a command can fail that a user can cause ends in one line on standard
    error: exit 2 for an error, 130 for Ctrl-C (128 + SIGINT, the POSIX shell
    convention), at any moment from the first line on.
    """
    hook = sys.unraisablehook
    sys.unraisablehook = _interrupt_again
    try:
        return _main(argv)
    finally:
        sys.unraisablehook = hook


def _main(argv: list[str] | None) -> int:
    try:
        _take_over_interrupts()
        parser = build_parser()
        args = parser.parse_args(argv)
        runners = {name: run for name, _add, run in _COMMANDS}
        status = runners[args.command](args)
        sys.stdout.flush()  # a closed pipe shows here, inside the handlers below
        return status
    except RoomcorrError as exc:
        msg = " ".join(str(exc).split())
        print(f"{PROG}: error: {msg}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return _quiet_broken_pipe()
    except OSError as exc:  # disk full, read-only folder, name too long, ...
        print(f"{PROG}: error: {_os_error_line(exc)}", file=sys.stderr)
        return 2
    except RuntimeError as exc:
        if "Libsndfile" not in type(exc).__name__ and "SoundFile" not in type(exc).__name__:
            raise
        msg = " ".join(str(exc).split())
        print(f"{PROG}: error: cannot read or write a sound file ({msg})", file=sys.stderr)
        return 2
    except RecursionError:  # a reader without a depth limit met a deeply nested file
        print(f"{PROG}: error: an input file is nested too deeply to read", file=sys.stderr)
        return 2
    except ImportError as exc:
        # Ctrl-C while a compiled module initialises: it is turned into an ImportError
        # ("initialization failed") caused by the KeyboardInterrupt
        if not isinstance(exc.__cause__ or exc.__context__, KeyboardInterrupt):
            raise
        with contextlib.suppress(KeyboardInterrupt, OSError):
            print(f"{PROG}: interrupted; files already complete were kept", file=sys.stderr)
        return 130
    except KeyboardInterrupt:
        with contextlib.suppress(KeyboardInterrupt, OSError):
            print(f"{PROG}: interrupted; files already complete were kept", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
