"""The report's section on safety and levels (the manifest's figures, never
recomputed here).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.deliver.figures import fmt_db
from roomcorr.design.realise.fir import worst_case_gain_db
from roomcorr.design.realise.safety import CAUTIONS, PEAK_BAND, full_band_peak_gain_db
from roomcorr.report.context import ReportChannel, ReportContext
from roomcorr.report.parts import SECTION_TITLES, Section


def safety_section(
    chans: list[ReportChannel], curves: dict[str, Any], ctx: ReportContext
) -> Section:
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
