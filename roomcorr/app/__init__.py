"""The application layer: what a user can do with a room, as plain functions returning data.

The command line and the browser app both call these; neither does signal
processing or folder bookkeeping of its own. Everything returned is plain
JSON-ready data (dicts, lists, floats, strings).
"""

from roomcorr.app.explore import (
    compare_view,
    decay_view,
    design_view,
    measurement_view,
    room_overview,
    run_file,
    run_files,
)

__all__ = [
    "compare_view",
    "decay_view",
    "design_view",
    "measurement_view",
    "room_overview",
    "run_file",
    "run_files",
]
