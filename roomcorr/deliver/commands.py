"""Exact ffmpeg and sox command lines that apply a design's routes and filters to a file.

Both tools are general-purpose and the project already checks its filters
against them (tests/test_formats.py). The commands reproduce
:func:`roomcorr.playback.render.apply_file`'s output (before any lowering):
every input mixed into every output it feeds (route gains), each output's
trim gain, polarity and delay when the design leaves them to the playback
chain (``--no-align``), the output's filter, and the whole tail of the
convolution. The tests run the printed commands and compare (−100 dB).

ffmpeg (``afir``): ``pan`` maps the input channels to each output with the
route gains, ``adelay`` adds a trim delay in samples, ``apad`` keeps the
filter's tail, ``afir`` convolves with the output's one-channel WAV and
``amerge`` joins the outputs in output order. ``afir`` normalises its filter
unless told not to: ``gtype=none`` up to ffmpeg 6.0, ``irnorm=-1`` from 6.1
(ffmpeg's own documentation; only 5.1 was run here). ffmpeg 5.1 scales the
unnormalised output by 2 (measured, tests/test_formats.py), which ``wet=0.5``
takes out.

sox (``fir``): one command per output reads the design's text coefficients
(``--formats wav,txt``) and ``remix`` mixes the inputs with the route gains.
sox treats a FIR as linear phase and advances its output by ``(N - 1) // 2``
samples (measured, tests/test_formats.py); a ``delay`` of as many samples in
front of ``fir`` cancels it. ``sox -M`` then joins the outputs.
"""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
from pathlib import Path

from roomcorr.deliver.plan import RoutePlan
from roomcorr.errors import SettingsError

#: ffmpeg's channel names in the order of its channel mask, which is the order of
#: the channels in a WAV file: output ``o`` of the design is joined as the
#: ``o``-th name, so the file keeps the design's output order.
_CHANNEL_NAMES = (
    "FL", "FR", "FC", "LFE", "BL", "BR", "FLC", "FRC", "BC", "SL", "SR",
    "TC", "TFL", "TFC", "TFR", "TBL", "TBC", "TBR",
)  # fmt: skip
#: ``afir``'s largest partition (its ``maxp`` default): it stops at a whole partition
#: after the end of its input, so this much more silence lets the whole tail out.
AFIR_PARTITION = 8192
#: At most this many outputs in one ffmpeg command.
MAX_FFMPEG_OUTPUTS = len(_CHANNEL_NAMES)

#: ffmpeg version from which ``afir`` takes ``irnorm`` (and ignores ``gtype``).
IRNORM_FROM = (6, 1)


def ffmpeg_version() -> tuple[int, int] | None:
    """Major and minor version of the ``ffmpeg`` on the PATH (None when absent or unknown)."""
    exe = shutil.which("ffmpeg")
    if exe is None:
        return None
    try:
        text = subprocess.run(
            [exe, "-hide_banner", "-version"], capture_output=True, text=True, timeout=10
        ).stdout
    except (OSError, subprocess.SubprocessError):
        return None
    m = re.search(r"version\s+n?(\d+)\.(\d+)", text)
    return (int(m.group(1)), int(m.group(2))) if m else None


def _num(x: float) -> str:
    """A gain as text that reads back as the same double (17 significant digits)."""
    return f"{x:.17g}"


def _route_gains(plan: RoutePlan, o: int) -> list[tuple[int, float]]:
    """(input, linear gain) of every route into output ``o``, trim gain and polarity included."""
    return [
        (i, float(plan.mix[o, i] * plan.trim[o])) for i in range(plan.n_inputs) if plan.mix[o, i]
    ]


def _tail(plan: RoutePlan) -> int:
    """Samples the output is longer than the input: the longest filter plus delay, less one."""
    return (
        int(max(plan.delay_samples[o] + plan.filters.shape[1] for o in range(plan.n_outputs))) - 1
    )


def ffmpeg_command(
    plan: RoutePlan,
    design_dir: str | Path,
    in_path: str,
    out_path: str,
    version: tuple[int, int] | None = None,
) -> list[str]:
    """The ffmpeg command (argument list) rendering ``in_path`` through the design.

    The output ends with up to :data:`AFIR_PARTITION` samples of silence more
    than ``apply``'s. The outputs are put together with ``join`` and a layout of channel names
    in mask order (``amerge`` refuses unnamed one-channel streams in 5.1).

    Parameters
    ----------
    plan : RoutePlan
        The design's routes at the input's sample rate.
    design_dir : path-like
        The design folder (filter paths are made absolute).
    in_path, out_path : str
        Input and output file names as they should appear in the command.
    version : (int, int), optional
        ffmpeg's version (:func:`ffmpeg_version`); the options of ``afir``
        changed in 6.1. Without it, the options for 6.1 and later.
    """
    if plan.n_outputs > MAX_FFMPEG_OUTPUTS:
        raise SettingsError(
            f"the design has {plan.n_outputs} outputs; one ffmpeg command joins at most "
            f"{MAX_FFMPEG_OUTPUTS}"
        )
    base = Path(design_dir).resolve()
    old = version is not None and version < IRNORM_FROM
    afir = "afir=irfmt=mono:precision=double:" + ("gtype=none:wet=0.5" if old else "irnorm=-1")
    total_tail = _tail(plan)
    argv = ["ffmpeg", "-hide_banner", "-v", "error", "-y", "-i", in_path]
    for rel in plan.paths:
        argv += ["-i", str(base / rel)]
    parts = [f"[0:a]asplit={plan.n_outputs}" + "".join(f"[s{o}]" for o in range(plan.n_outputs))]
    for o in range(plan.n_outputs):
        terms = "".join(
            f"{'+' if k and g >= 0 else ''}{_num(g)}*c{i}"
            for k, (i, g) in enumerate(_route_gains(plan, o))
        )
        chain = [f"pan=1c|c0={terms}"]
        d = int(plan.delay_samples[o])
        if d > 0:
            chain.append(f"adelay=delays={d}S:all=1")
        chain.append(f"apad=pad_len={total_tail - d + AFIR_PARTITION}")
        parts.append(f"[s{o}]" + ",".join(chain) + f"[m{o}]")
        parts.append(f"[m{o}][{o + 1}:a]{afir}[y{o}]")
    if plan.n_outputs > 1:
        ys = "".join(f"[y{o}]" for o in range(plan.n_outputs))
        names = _CHANNEL_NAMES[: plan.n_outputs]
        mapping = "|".join(f"{o}.0-{n}" for o, n in enumerate(names))
        layout = "+".join(names)
        parts.append(f"{ys}join=inputs={plan.n_outputs}:channel_layout={layout}:map={mapping}[out]")
        last = "[out]"
    else:
        last = "[y0]"
    argv += ["-filter_complex", ";".join(parts), "-map", last]
    argv += ["-c:a", "pcm_f32le", "-rf64", "auto", out_path]
    return argv


def sox_commands(
    plan: RoutePlan, design_dir: str | Path, in_path: str, out_path: str
) -> list[list[str]] | None:
    """The sox commands (argument lists, run in order) rendering ``in_path`` through the design.

    One command per output writes ``OUT.<name>.wav`` (the filter's text file
    ``fir/<rate>/<name>.txt``), a last one joins them into ``out_path``. None
    when the design has no text coefficient files (design with
    ``--formats wav,txt``).
    """
    base = Path(design_dir).resolve()
    txts = [base / Path(rel).with_suffix(".txt") for rel in plan.paths]
    if not all(t.is_file() for t in txts):
        return None
    total_tail = _tail(plan)
    n_taps = plan.filters.shape[1]
    advance = (n_taps - 1) // 2  # sox's linear-phase compensation (measured)
    out = Path(out_path)
    cmds: list[list[str]] = []
    parts: list[str] = []
    for o, name in enumerate(plan.output_names):
        spec = ",".join(f"{i + 1}v{_num(g)}" for i, g in _route_gains(plan, o))
        part = out_path if plan.n_outputs == 1 else str(out.with_name(f"{out.stem}.{name}.wav"))
        parts.append(part)
        d = int(plan.delay_samples[o])
        pad = total_tail - d - advance
        argv = ["sox", "-V1", in_path, "-e", "floating-point", "-b", "32", part]
        argv += ["remix", spec, "delay", f"{d + advance}s"]
        if pad > 0:
            argv += ["pad", "0", f"{pad}s"]
        argv += ["fir", str(txts[o])]
        cmds.append(argv)
    if plan.n_outputs > 1:
        cmds.append(["sox", "-V1", "-M", *parts, "-e", "floating-point", "-b", "32", out_path])
    return cmds


def command_text(argv: list[str]) -> str:
    """One shell line (POSIX quoting) for an argument list."""
    return shlex.join(argv)
