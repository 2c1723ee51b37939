"""The report's section on the design's files and how to load them.

Plain text and a table (from :mod:`roomcorr.deliver.loading`); html.py puts them in a section.
"""

from __future__ import annotations

from typing import Any

from roomcorr.deliver.loading import LOADING_DOC


def files_parts(
    groups: list[dict[str, Any]], design_name: str
) -> tuple[list[list[str]], list[str]]:
    """A table of the filter files per rate and format, and short loading advice.

    Parameters
    ----------
    groups : list of dict
        :func:`roomcorr.deliver.loading.file_groups` of the design's manifest.
    design_name : str
        The design folder's name, for the command lines.

    Returns
    -------
    table : list of list of str
        First row the header.
    paragraphs : list of str
    """
    table = [["rate (Hz)", "files (in the design folder)", "for", "taps"]]
    for g in groups:
        table.append(
            [str(g["sample_rate"]), ", ".join(g["paths"]), g["what"], str(g["taps"] or "")]
        )
    paragraphs = [
        "Load the filters for the sample rate your player runs at; the common pre-gain is "
        "already inside every filter, so load them at 0 dB and start quietly.",
        "A convolution plug-in in a music player or audio workstation: one WAV per "
        "output (pick the file named after each loudspeaker) or, where the plug-in takes "
        "one file for all channels, the multichannel WAV (channels in output order).",
        "A system-wide convolver (Linux, PipeWire): roomcorr commands "
        f"{design_name} --pipewire roomcorr.conf writes a ready-to-load configuration.",
        f"Command-line processors: roomcorr commands {design_name} prints exact ffmpeg "
        "and sox command lines with this design's routes, delays and gains.",
        "A DSP that takes only biquads: the iir/ files, when the design has them. "
        f"Step by step for every kind of playback chain: {LOADING_DOC}.",
    ]
    return table, paragraphs
