"""Another process holding a room's lock, as a running roomcorr command would."""

from __future__ import annotations

import contextlib
import subprocess
import sys
from collections.abc import Iterator

from roomcorr import rooms


@contextlib.contextmanager
def room_held_elsewhere(room: rooms.Room) -> Iterator[None]:
    """Inside the block another process holds ``room``'s lock (killed on exit)."""
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import time; from roomcorr import rooms as r; "
            f"room = r.open_room({str(room.root)!r});\n"
            "with r.room_lock(room, 'test holder'):\n print('held', flush=True); time.sleep(60)",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        yield
    finally:
        holder.kill()
        holder.wait()
