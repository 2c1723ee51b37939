"""Routes of a design: which input feeds which output through which filter.

``manifest.json`` gets two lists:

``routes``
    One object per input, output and sample rate: ``input`` (index of the
    program channel), ``input_name``, ``output`` (index of the loudspeaker
    output), ``output_name``, ``sample_rate``, ``path`` (the filter file,
    relative to the design folder) and ``gain_db`` (the mix gain of that
    route; the routes into one output are summed before its filter).
``outputs``
    One object per output: its role (``main`` or ``sub``), ``delay_ms``,
    ``delay_samples`` per rate, the ``distance_m`` the delay stands for,
    ``gain_db``, ``polarity`` and ``in_filters``: ``true`` when delay and
    gain are already inside the filters (``--align``, the default), ``false``
    when the playback device must apply them as trims (``--no-align``).

Without a subwoofer every input feeds its own output. With one, each main
input also feeds the subwoofer output with gain ``1 / n_mains``; with several,
each main input feeds every subwoofer output with that gain (each subwoofer's
own level, delay and polarity are inside its filter).
"""

from __future__ import annotations

from typing import Any

from roomcorr.design.system.align import SUB, SystemPlan


def build_routes(
    names: list[str], rates: list[int], plan: SystemPlan | None
) -> list[dict[str, Any]]:
    """The ``routes`` list of the manifest (see the module docstring)."""
    roles = plan.roles if plan is not None else ["main"] * len(names)
    mains = [c for c, r in enumerate(roles) if r != SUB]
    subs = plan.sub_indices if plan is not None else []
    route_gain = round(plan.sub_route_gain_db, 3) if plan is not None else 0.0
    routes: list[dict[str, Any]] = []
    for fs in rates:
        for i, c in enumerate(mains):
            pairs = [(c, 0.0)] + [(sub, route_gain) for sub in subs]
            for out, gain in pairs:
                routes.append(
                    {
                        "input": i,
                        "input_name": names[c],
                        "output": out,
                        "output_name": names[out],
                        "sample_rate": fs,
                        "path": f"fir/{fs}/{names[out]}.wav",
                        "gain_db": gain,
                    }
                )
    return routes


def output_trims(plan: SystemPlan) -> list[dict[str, Any]]:
    """The ``outputs`` list of the manifest: delay, gain and polarity per output."""
    return [
        {
            "output": c,
            "name": name,
            "role": plan.roles[c],
            "delay_ms": round(float(plan.delay_s[c]) * 1000.0, 4),
            "delay_samples": {str(fs): n[c] for fs, n in plan.delay_samples.items()},
            "distance_m": round(float(plan.distance_m[c]), 3),
            "gain_db": round(float(plan.trim_db[c]), 2),
            "polarity": plan.polarity[c],
            "in_filters": plan.baked,
        }
        for c, name in enumerate(plan.names)
    ]


def route_diagram(names: list[str], plan: SystemPlan | None) -> str:
    """A plain-text picture of the routes (inputs, mix, filters, outputs).

    Example for ``left,right,sub`` with ``sub`` as the subwoofer::

        input      filter                     output
        left  ──┬────► fir/RATE/left.wav  ────►  0 left
                └─ -6.02 dB ─┐
        right ──┬────► fir/RATE/right.wav ────►  1 right
                └─ -6.02 dB ─┤
                             └─ sum ─► fir/RATE/sub.wav ────►  2 sub
    """
    roles = plan.roles if plan is not None else ["main"] * len(names)
    sub = plan.sub_index if plan is not None else None
    mains = [c for c, r in enumerate(roles) if r != SUB]
    w = max(len(n) for n in names)
    fw = max(len(f"fir/RATE/{n}.wav") for n in names)
    lines = [f"{'input':<{w + 3}}   {'filter':<{fw + 9}}output"]
    for k, c in enumerate(mains):
        branch = "┬" if sub is not None else "─"
        path = f"fir/RATE/{names[c]}.wav"
        lines.append(f"{names[c]:<{w}} ──{branch}────► {path:<{fw}} ────►  {c} {names[c]}")
        if sub is not None:
            gain = f"{plan.sub_route_gain_db:+.2f} dB" if plan is not None else ""
            join = "┐" if k == 0 else "┤"
            lines.append(f"{'':<{w}}   └─ {gain} ─{join}")
    if sub is not None:
        assert plan is not None
        gain = f"{plan.sub_route_gain_db:+.2f} dB"
        for k, s in enumerate(plan.sub_indices):
            path = f"fir/RATE/{names[s]}.wav"
            lead = "└─ sum ─►" if k == 0 else "   sum ─►"
            lines.append(f"{'':<{w + 8 + len(gain)}}{lead} {path} ────►  {s} {names[s]}")
    return "\n".join(lines) + "\n"
