"""Report section for several loudspeakers: alignment trims and the subwoofer's integration.

Built from the ``sys_*`` entries of ``design.npz`` (see
:func:`roomcorr.deliver.system.system_curves`): the manifest fields as JSON
and, with a subwoofer, the summed responses around the crossover at every
position (as measured without filters, with the filters but no delay and
normal polarity, and as designed).
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from roomcorr.deliver.figures import fmt_db
from roomcorr.deliver.system import subwoofer_sentences, system_sentences
from roomcorr.report.figures import AFTER, INK, MEAN, SEAT, new_figure
from roomcorr.report.parts import Figure, Section

SECTION_ID = "system"
SECTION_TITLE = "Loudspeakers together"


def system_fields(curves: dict[str, Any]) -> dict[str, Any]:
    """The manifest's ``outputs`` and ``system`` stored with the curves (empty if none)."""
    raw = (curves.get("system") or {}).get("fields_json")
    return json.loads(str(raw)) if raw is not None else {}


def trims_table(fields: dict[str, Any]) -> list[list[str]]:
    """One row per output: delay (ms, samples per rate, m), level trim, polarity."""
    rows = [
        [
            "output",
            "role",
            "delay (ms)",
            "samples",
            "distance (m)",
            "trim (dB)",
            "polarity",
            "in the filters",
        ]
    ]
    for o in fields.get("outputs", []):
        samples = ", ".join(f"{n} @ {int(fs) / 1000:g}k" for fs, n in o["delay_samples"].items())
        rows.append(
            [
                o["name"],
                o["role"],
                f"{o['delay_ms']:.3f}",
                samples,
                f"{o['distance_m']:.3f}",
                fmt_db(o["gain_db"], 2, True, unit=False),
                "normal" if o["polarity"] > 0 else "inverted",
                "yes" if o["in_filters"] else "no: set on the device",
            ]
        )
    return rows


def plot_summed(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    baseline_db: np.ndarray,
    after_db: np.ndarray,
    crossover_hz: float,
    title: str,
) -> Any:
    """Summed main + subwoofer at every position: as measured, no delay, as designed.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db, baseline_db, after_db : ndarray, shape (n_positions, n_freqs)
    """
    fig = new_figure(height_in=3.8)
    ax = fig.add_subplot()
    ax.axvspan(crossover_hz / 2, crossover_hz * 2, color="#eef4f1", zorder=0, lw=0)
    ax.axvline(crossover_hz, color=INK, lw=0.8, ls=":")
    ref = float(np.median(after_db))
    for k in range(after_db.shape[0]):
        first = k == 0
        ax.plot(
            freq_hz,
            measured_db[k] - np.median(measured_db) + ref,
            color=SEAT,
            lw=0.8,
            label="as measured (no filters)" if first else None,
        )
        ax.plot(
            freq_hz,
            baseline_db[k],
            color="#c8553d",
            lw=0.8,
            ls="--",
            label="filters, no delay, normal polarity" if first else None,
        )
        ax.plot(
            freq_hz,
            after_db[k],
            color=AFTER if k else MEAN,
            lw=1.8 if first else 1.0,
            label="as designed (first position bold)" if first else None,
        )
    ax.set_xscale("log")
    ax.set_xlim(freq_hz[0], freq_hz[-1])
    ticks = [t for t in (20, 30, 50, 70, 100, 150, 200, 300, 500) if freq_hz[0] <= t <= freq_hz[-1]]
    ax.set_xticks(ticks, [str(t) for t in ticks])
    ax.minorticks_off()
    ax.grid(True, color="#dde3ea", linewidth=0.7)
    ax.set_ylim(ref - 24, ref + 12)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("level (dB, 1/6 octave)")
    ax.set_title(title, loc="left", color=INK)
    ax.legend(loc="lower center", ncols=3, fontsize=8, frameon=False)
    return fig


def system_sections(curves: dict[str, Any], png: Any) -> list[Any]:
    """The section (empty list for a single loudspeaker)."""
    fields = system_fields(curves)
    if not fields.get("outputs"):
        return []
    sec = Section(SECTION_ID, SECTION_TITLE)
    # the per-output lines of the summary are the table here
    sec.paragraphs.extend(line for line in system_sentences(fields) if not line.startswith("  "))
    sw = (fields.get("system") or {}).get("subwoofers")
    if sw:  # several subwoofers: each one's own delay, level, polarity and figures
        sub_lines = subwoofer_sentences(sw, fields["system"].get("sub_route_gain_db", 0))
        sec.paragraphs.extend(line.strip() for line in sub_lines if line.startswith("  "))
    sec.table = trims_table(fields)
    sys_curves = curves.get("system") or {}
    if "summed_after_db" in sys_curves:
        f = np.asarray(sys_curves["freq_hz"], dtype=float)
        fc = float(sys_curves["crossover_hz"])
        names = [o["name"] for o in fields["outputs"] if o["role"] != "sub"]
        for i, name in enumerate(names):
            fig = plot_summed(
                f,
                sys_curves["summed_measured_db"][i],
                sys_curves["summed_baseline_db"][i],
                sys_curves["summed_after_db"][i],
                fc,
                f"{name} + subwoofer at every position",
            )
            sec.figures.append(
                Figure(
                    f"system-{name}",
                    f"{name} plus subwoofer, every position, before and after; shaded: half to "
                    "twice the crossover frequency, where the choice was judged.",
                    png(fig),
                )
            )
    return [sec]
