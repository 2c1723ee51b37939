"""roomcorr: measure a listening room and design safe correction filters.

The public API re-exports the main entry points; see README.md and
DEVELOPERS.md for the data flow.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__", "run_design", "read_ir_set", "write_design", "load_settings"]


def __getattr__(name: str):  # lazy, so `roomcorr --help` stays fast
    if name == "run_design":
        from roomcorr.pipeline import run_design

        return run_design
    if name == "read_ir_set":
        from roomcorr.audio_io import read_ir_set

        return read_ir_set
    if name == "write_design":
        from roomcorr.deliver.export import write_design

        return write_design
    if name == "load_settings":
        from roomcorr.settings import load_settings

        return load_settings
    raise AttributeError(f"module 'roomcorr' has no attribute {name!r}")
