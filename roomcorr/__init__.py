"""roomcorr: measure a listening room and design safe correction filters.

The public API re-exports the main entry points; see README.md and
DEVELOPERS.md for the data flow.
"""

from __future__ import annotations

import _signal  # the built-in module: no import work (``signal`` imports enum) before the handler
import sys as _sys

__version__ = "0.1.0"

#: SIGINT numbers that arrived while the ``roomcorr`` command was still starting.
_EARLY_INTERRUPTS: list[int] = []


def _note_early_interrupt(signum: int, frame: object) -> None:
    _EARLY_INTERRUPTS.append(signum)


# Run as the command (``python -m roomcorr``, the ``roomcorr`` script), Ctrl-C before
# the command's own handler is in place is noted here and answered by
# :func:`roomcorr.cli.main` with one line and exit 130, never a traceback from the
# import machinery. Imported as a library, nothing changes.
if _sys.argv[:1] == ["-m"] or _sys.argv[0].endswith(("/roomcorr", "\\roomcorr.exe")):
    if _signal.getsignal(_signal.SIGINT) is _signal.default_int_handler:
        _signal.signal(_signal.SIGINT, _note_early_interrupt)

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
