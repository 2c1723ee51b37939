"""The report's section on what changed since the earlier measurement.

The comparison itself is worked out in :mod:`roomcorr.app.report`; this module
only draws what it is given.
"""

from __future__ import annotations

import re
from typing import Any

from roomcorr.report.compare import comparison_png, format_comparison
from roomcorr.report.parts import SECTION_TITLES, Figure, Section


def _channel_sentences(block: list[str]) -> str:
    """One channel's lines of :func:`roomcorr.report.compare.format_comparison` as plain sentences.

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
        :func:`roomcorr.app.compare.compare_measurements` result with ``with_curves=True``
        (``before`` and ``after`` are shown as given).

    Returns
    -------
    Section
        Id ``compare``; one figure (key ``compare``, from
        :func:`roomcorr.report.compare.comparison_png`); table rows ``channel, arrival
        change (ms), distance change (m), level change (dB), what changed``, the
        last column holding that channel's sentences of
        :func:`roomcorr.report.compare.format_comparison`.
    """

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
        dist = ch["distance_change_m"]
        rows.append([str(ch["name"]), f"{ch['arrival_change_ms']:+.3f}",
                     "unsure" if dist is None else f"{dist:+.3f}",
                     f"{ch['level_change_db']:+.2f}", text])
    sec.table = rows
    sec.figures.append(
        Figure("compare", "Before and after, both responses overlaid per channel",
               comparison_png(res))
    )
    return sec


def comparison_sentence(res: dict[str, Any]) -> str:
    parts = [
        f"{ch['name']} "
        + ("distance unsure" if ch["distance_change_m"] is None
           else f"{ch['distance_change_m']:+.3f} m")
        + f", {ch['level_change_db']:+.1f} dB"
        for ch in res["channels"]
    ]
    move = res.get("move")
    return (
        f"Since the earlier measurement ({res['before']}): " + "; ".join(parts)
        + " (distance and level changes; see the comparison section)."
        + (f" Who moved: {move['sentence']}." if move else "")
    )
