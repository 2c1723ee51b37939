"""Where a design's files are and what to do with them: lines for the summary, report and app.

One place for this text (the design summary, the report's files section and
the app's Files page all read it), computed from the manifest alone.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Any

#: What each kind of file is for, by (kind, format) (format None: the per-channel WAV).
_WHAT = {
    ("fir", None): "one 32-bit float WAV per output: for convolution plug-ins and ffmpeg",
    ("fir", "multiwav"): "every output in one WAV, channels in output order",
    ("fir", "txt"): "coefficients as text, one per line: for sox and DSPs that read text",
    ("fir", "f32"): "raw 32-bit float coefficients (little-endian, no header)",
    ("fir", "f64"): "raw 64-bit float coefficients (little-endian, no header)",
}

#: The documentation page on loading the filters (relative to the project).
LOADING_DOC = "docs/tutorials/load-the-filters.md"


def file_groups(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    """The design's filter files grouped by rate and format.

    Returns
    -------
    list of dict
        ``{"sample_rate", "kind", "format", "what", "paths", "taps"}`` in rate
        order, per-output WAVs first; ``taps`` is None for biquad files.
    """
    groups: dict[tuple[int, str, str | None], list[dict[str, Any]]] = defaultdict(list)
    for e in manifest.get("files", []):
        kind = e.get("kind")
        if kind not in ("fir", "iir") or "sample_rate" not in e:
            continue
        groups[(int(e["sample_rate"]), kind, e.get("format"))].append(e)
    order = {None: 0, "multiwav": 1, "txt": 2, "f32": 3, "f64": 4}
    out = []
    for (fs, kind, fmt), entries in sorted(
        groups.items(), key=lambda kv: (kv[0][0], kv[0][1], order.get(kv[0][2], 9), str(kv[0][2]))
    ):
        what = _WHAT.get((kind, fmt)) or f"biquad coefficients ({fmt}): for DSPs that take biquads"
        taps = entries[0].get("taps") if kind == "fir" else None
        out.append(
            {
                "sample_rate": fs,
                "kind": kind,
                "format": fmt or "wav",
                "what": what,
                "paths": [e["path"] for e in entries],
                "taps": taps,
            }
        )
    return out


def files_lines(manifest: dict[str, Any]) -> list[str]:
    """Plain-text lines: the files per rate and format, relative to the design folder."""
    lines = []
    rate = None
    for g in file_groups(manifest):
        if g["sample_rate"] != rate:
            rate = g["sample_rate"]
            lines.append(f"  {rate} Hz:")
        taps = f", {g['taps']} taps" if g["taps"] else ""
        lines.append(f"    {', '.join(g['paths'])}  ({g['what']}{taps})")
    if lines:
        lines.append("  The common pre-gain is already inside every filter: load them at 0 dB.")
    return lines


def next_steps(design_dir: str) -> list[str]:
    """What to do next with a design written to ``design_dir`` (commands to run)."""
    return [
        "Next:",
        f"  hear it first:   roomcorr listen MUSIC.wav --design {design_dir}",
        f"  render a file:   roomcorr apply MUSIC.wav --design {design_dir} --out corrected.wav",
        f"  load elsewhere:  roomcorr commands {design_dir}   (ffmpeg, sox and PipeWire lines)",
        f"  how to load the filters into a player or DSP: {LOADING_DOC}",
        "  Start playback quietly and raise the level slowly; protect your hearing and respect "
        "the loudspeakers' excursion limits.",
    ]
