"""The pieces a report is made of: figures, per-channel columns, sections, the page.

Every section module of :mod:`roomcorr.report` builds :class:`Section` objects from
these; :mod:`roomcorr.report.html` assembles and renders them.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass
class Figure:
    """One PNG figure of the report."""

    key: str
    caption: str
    png: bytes


@dataclass
class Column:
    """One loudspeaker channel's part of a section (shown side by side with the others)."""

    channel: str
    paragraphs: list[str] = field(default_factory=list)
    figures: list[Figure] = field(default_factory=list)
    table: list[list[str]] | None = None  # first row is the header
    details: tuple[str, list[str]] | None = None  # (summary, paragraphs): folded away


@dataclass
class Section:
    """One section of the page: text, table and figures, then one column per channel."""

    id: str
    title: str
    paragraphs: list[str] = field(default_factory=list)
    figures: list[Figure] = field(default_factory=list)
    table: list[list[str]] | None = None  # first row is the header
    columns: list[Column] = field(default_factory=list)

    def all_figures(self) -> list[Figure]:
        """The section's own figures, then every column's, in page order."""
        return [*self.figures, *(f for c in self.columns for f in c.figures)]


@dataclass
class Report:
    title: str
    subtitle: str
    sections: list[Section]
    #: Lines under the title: date, run ids, positions, what was measured.
    facts: list[str] = field(default_factory=list)


#: Section ids, in page order (per channel sections get a ``-<channel>`` suffix).
SECTION_TITLES = {
    "overview": "At a glance",
    "changes": "What the correction did, channel by channel",
    "compare": "What changed since the earlier measurement",
    "room": "The room as measured",
    "result": "Predicted result at every position",
    "filter": "The correction filter",
    "time": "Impulse and step",
    "phase": "Direct sound and latency (mixed phase)",
    "decay": "Reverberation by octave",
    "ringing": "Low-frequency ringing",
    "iir": "The biquad version",
    "quality": "How good the measurement was",
    "through": "Measured through the design's filters",
    "causes": "Why the peaks and dips are there",
    "safety": "Safety and levels",
    "files": "The files and how to load them",
}
