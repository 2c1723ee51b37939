"""The report's section on why the peaks and dips are there."""

from __future__ import annotations

from typing import Any

from roomcorr.report.parts import SECTION_TITLES, Section


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
