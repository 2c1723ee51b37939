"""A configuration for PipeWire's filter-chain module that plays music through a design.

The module (``libpipewire-module-filter-chain``) builds a graph of built-in
nodes; we use ``copy`` (one per program input, so an input can feed several
outputs), ``mixer`` (where several routes meet, with their gains), and the
built-in ``convolver`` (one per loudspeaker output: the design's WAV, the
output's trim gain and polarity as its ``gain`` and the trim delay as its
``delay`` in samples). The names and keys are those of PipeWire's own
documentation of the module and of the Debian 12 build of it (0.3.65):
``mixer`` ports ``In 1`` .. ``In 8`` and controls ``Gain 1`` .. ``Gain 8``,
``convolver`` config ``filename``, ``channel``, ``gain``, ``delay``.

The file is a drop-in fragment (``context.modules = [ ... ]``): put it in
``~/.config/pipewire/pipewire.conf.d/`` and restart PipeWire, and a sink
called "roomcorr correction" appears; send music to it and connect its
output to the loudspeakers' device. The filters are read once, when
PipeWire starts; they must stay where the file says (absolute paths).

The configuration is in SPA-JSON (PipeWire's relaxed JSON). Strings are
written with JSON quoting; :func:`check_with_spa_json_dump` has PipeWire's
own parser (``spa-json-dump``) read it back.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.deliver.plan import RoutePlan
from roomcorr.errors import DeviceError, OutputError

#: The mixer's inputs (``In 1`` to ``In 8`` in PipeWire's built-in mixer).
MIXER_INPUTS = 8
#: Speaker positions given to the main outputs in order, and to subwoofers.
_MAIN_POSITIONS = ("FL", "FR", "FC", "RL", "RR", "SL", "SR")
_SUB_POSITION = "LFE"
#: Name of the sink the configuration creates.
SINK_NAME = "roomcorr_correction"


def _positions(names: list[str], subs: set[int]) -> list[str]:
    out, k, aux = [], 0, 0
    for o in range(len(names)):
        if o in subs:
            out.append(_SUB_POSITION if _SUB_POSITION not in out else f"AUX{aux}")
            aux += o in subs and out[-1].startswith("AUX")
        elif k < len(_MAIN_POSITIONS):
            out.append(_MAIN_POSITIONS[k])
            k += 1
        else:
            out.append(f"AUX{aux}")
            aux += 1
    return out


def _num(x: float) -> str:
    return f"{x:.9g}"


def filter_chain_config(
    plan: RoutePlan, design_dir: str | Path, sub_outputs: set[int] | None = None
) -> str:
    """The filter-chain drop-in configuration (SPA-JSON text) for ``plan``.

    Parameters
    ----------
    plan : RoutePlan
        Routes at the rate PipeWire runs at (usually 48000 Hz; PipeWire
        resamples a filter at another rate, but the design's own file for the
        rate is exact).
    design_dir : path-like
        The design folder; filter paths are written absolute.
    sub_outputs : set of int, optional
        Outputs that are subwoofers (given the LFE position).
    """
    base = Path(design_dir).resolve()
    subs = sub_outputs or set()
    q = json.dumps
    nodes: list[str] = []
    links: list[str] = []
    for i, name in enumerate(plan.input_names):
        nodes.append(f"{{ type = builtin label = copy name = {q(f'in{i}')} }}  # {name}")
    for o, name in enumerate(plan.output_names):
        feeds = [(i, float(plan.mix[o, i])) for i in range(plan.n_inputs) if plan.mix[o, i]]
        conv = f"out{o}"
        config = (
            f"filename = {q(str(base / plan.paths[o]))} channel = 0 "
            f"gain = {_num(float(plan.trim[o]))} delay = {int(plan.delay_samples[o])}"
        )
        if len(feeds) == 1 and feeds[0][1] == 1.0:
            links.append(f"{{ output = {q(f'in{feeds[0][0]}:Out')} input = {q(f'{conv}:In')} }}")
        else:
            if len(feeds) > MIXER_INPUTS:
                raise OutputError(
                    f"output {name}: {len(feeds)} routes meet; PipeWire's mixer takes at most "
                    f"{MIXER_INPUTS}"
                )
            mix = f"mix{o}"
            gains = " ".join(f'"Gain {k + 1}" = {_num(g)}' for k, (_, g) in enumerate(feeds))
            nodes.append(
                f"{{ type = builtin label = mixer name = {q(mix)} control = {{ {gains} }} }}"
            )
            for k, (i, _) in enumerate(feeds):
                links.append(
                    f"{{ output = {q(f'in{i}:Out')} input = {q(f'{mix}:In {k + 1}')} }}"
                )
            links.append(f"{{ output = {q(f'{mix}:Out')} input = {q(f'{conv}:In')} }}")
        nodes.append(
            f"{{ type = builtin label = convolver name = {q(conv)} config = {{ {config} }} }}"
            f"  # {name}"
        )
    in_pos = _positions(plan.input_names, set())
    out_pos = _positions(plan.output_names, subs)
    ind = "                "
    text = [
        "# PipeWire filter-chain configuration written by roomcorr",
        f"# design: {base}",
        f"# sample rate of the filters: {plan.fs} Hz; inputs: {', '.join(plan.input_names)}; "
        f"outputs: {', '.join(plan.output_names)}",
        "# Put this file in ~/.config/pipewire/pipewire.conf.d/ and restart PipeWire",
        "# (systemctl --user restart pipewire). Start playback quietly and raise the level",
        "# slowly; protect your hearing and respect the loudspeakers' excursion limits.",
        "context.modules = [",
        "    { name = libpipewire-module-filter-chain",
        "        args = {",
        '            node.description = "roomcorr correction"',
        '            media.name = "roomcorr correction"',
        "            filter.graph = {",
        f"{ind}nodes = [",
        *[f"{ind}    {n}" for n in nodes],
        f"{ind}]",
        f"{ind}links = [",
        *[f"{ind}    {ln}" for ln in links],
        f"{ind}]",
        f"{ind}inputs = [ {' '.join(q(f'in{i}:In') for i in range(plan.n_inputs))} ]",
        f"{ind}outputs = [ {' '.join(q(f'out{o}:Out') for o in range(plan.n_outputs))} ]",
        "            }",
        "            capture.props = {",
        f"                node.name = {q(SINK_NAME)}",
        '                media.class = "Audio/Sink"',
        f"                audio.rate = {plan.fs}",
        f"                audio.channels = {plan.n_inputs}",
        f"                audio.position = [ {' '.join(in_pos)} ]",
        "            }",
        "            playback.props = {",
        f"                node.name = {q(SINK_NAME + '_output')}",
        "                node.passive = true",
        f"                audio.rate = {plan.fs}",
        f"                audio.channels = {plan.n_outputs}",
        f"                audio.position = [ {' '.join(out_pos)} ]",
        "            }",
        "        }",
        "    }",
        "]",
    ]
    return "\n".join(text) + "\n"


def write_filter_chain_config(path: str | Path, text: str) -> Path:
    """Write the configuration atomically (refusing a folder or a missing parent)."""
    p = Path(path)
    if p.is_dir():
        raise OutputError(f"--pipewire {p}: is a folder; name a .conf file")
    if not p.parent.is_dir():
        raise OutputError(f"--pipewire {p}: {p.parent} is not an existing folder")
    if p.suffix != ".conf":
        raise OutputError(f"--pipewire {p}: PipeWire reads only files ending in .conf")
    return atomic_write_text(p, text)


def check_with_spa_json_dump(path: str | Path) -> str:
    """Have PipeWire's own SPA-JSON parser (``spa-json-dump``) read the file; its JSON output.

    Raises
    ------
    DeviceError
        If ``spa-json-dump`` (Debian package pipewire-bin) is missing or rejects the file.
    """
    exe = shutil.which("spa-json-dump")
    if exe is None:
        raise DeviceError("spa-json-dump not found (install the pipewire-bin package)")
    r = subprocess.run([exe, str(path)], capture_output=True, text=True, timeout=30)
    if r.returncode != 0:
        raise DeviceError(f"{path}: spa-json-dump refused it ({r.stderr.strip()})")
    return r.stdout
