"""The report's sections with one column per channel, in page order."""

from __future__ import annotations

from typing import Any

from roomcorr.analysis.decay import decay_method as _decay_method
from roomcorr.report.context import ReportChannel, ReportContext
from roomcorr.report.correction import filter_column, iir_column, result_column, room_column
from roomcorr.report.impulse import phase_column, time_column
from roomcorr.report.parts import SECTION_TITLES, Section
from roomcorr.report.reverberation import decay_column, ringing_column

#: Sections with one column per channel: (id, text above the columns, column builder).
#: Add a per-channel section by writing a ``xxx_column(x, ctx)`` and listing it here.
CHANNEL_SECTIONS: list[tuple[str, str, Any]] = [
    ("room", "Thin lines are the individual microphone positions, the thick line is their "
     "power average. Grey areas lie outside the correction band.", room_column),
    ("result", "Analysed with the same window and smoothing as the measurement. The filters "
     "include the pre-gain, so the target is drawn lowered by it. Lines close to the target at "
     "every position mean the correction holds across the listening area.", result_column),
    ("filter", "Pink areas mark frequencies where boost was wanted but refused.",
     filter_column),
    ("time", "Top: the filter alone. Bottom: the first position before and after correction. "
     "Anything left of 0 ms is pre-ringing; a minimum-phase filter has none.", time_column),
    ("phase", "", phase_column),
    ("iir", "", iir_column),
    ("decay", _decay_method() + ". Per octave band: the noise floor is subtracted, the "
     "backward integration stops where the late decay meets the noise and the energy it "
     "would still have had is added back. EDT from 0 to -10 dB, T20 from -5 to -25 dB, T30 "
     "from -5 to -35 dB, each extrapolated to 60 dB (ISO 3382-1), averaged over positions; "
     "curves show the first position. * marks a value whose range comes within 10 dB of the "
     "noise floor.", decay_column),
    ("ringing", "Sliding-window spectra of the first position from 20 to 300 Hz: each row "
     "starts 10 ms later than the one below. A bright ridge reaching high up is a room mode "
     "that keeps ringing after the sound stops.", ringing_column),
]


def channel_section(
    sec_id: str, intro: str, chans: list[ReportChannel], ctx: ReportContext, build: Any
) -> Section | None:
    """A section with one column per channel (None when no channel has anything to show)."""
    cols = [c for c in (build(x, ctx) for x in chans) if c is not None]
    if not cols:
        return None
    sec = Section(sec_id, SECTION_TITLES[sec_id], columns=cols)
    if intro:
        sec.paragraphs.append(intro)
    return sec
