"""What the terminal shows while a measurement runs.

On a terminal: one live line per capture (``rich``) with the loudspeaker and
position, a progress bar, the time left and an input meter (peak and RMS of
the latest audio block, in dBFS or, with the microphone's sensitivity, in
dB SPL). Elsewhere (a pipe, a log file, ``CI`` set, or ``--plain``): plain
lines at the start, at every quarter and at the end of each capture.

Ctrl-C is not caught here: the capture aborts its streams at once and the
interrupt goes on to the command line.
"""

from __future__ import annotations

import os
import sys
from typing import Any, TextIO

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn

from roomcorr.measure.levels import to_spl

STOP_NOTE = "Ctrl-C stops at once"


class PlainView:
    """Progress as plain lines (for pipes, logs and CI)."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream
        self.sensitivity_dbfs: float | None = None
        self._label = ""
        self._next = 0.25
        self._peak = -200.0

    def __enter__(self) -> PlainView:
        return self

    def __exit__(self, *exc: Any) -> None:
        return None

    def say(self, text: str) -> None:
        print(text, file=self.stream or sys.stdout, flush=True)

    def meter_text(self, peak_dbfs: float, rms_dbfs: float) -> str:
        if self.sensitivity_dbfs is None:
            return f"input peak {peak_dbfs:6.1f} dBFS, rms {rms_dbfs:6.1f} dBFS"
        return (
            f"input peak {peak_dbfs:6.1f} dBFS, level "
            f"{to_spl(rms_dbfs, self.sensitivity_dbfs):5.1f} dB SPL"
        )

    def start(self, label: str, duration_s: float) -> None:
        self._label, self._next, self._peak = label, 0.25, -200.0
        self._duration = duration_s
        self.say(f"{label}: {duration_s:.1f} s ({STOP_NOTE})")

    def update(self, fraction: float, peak_dbfs: float, rms_dbfs: float) -> None:
        self._peak = max(self._peak, peak_dbfs)
        if fraction >= self._next and fraction < 1.0:
            left = (1.0 - fraction) * self._duration
            self.say(
                f"  {self._label}: {fraction:4.0%}, {left:4.1f} s left, "
                f"{self.meter_text(peak_dbfs, rms_dbfs)}"
            )
            while self._next <= fraction:
                self._next += 0.25

    def stop(self) -> None:
        self.say(f"  {self._label}: done (highest input peak {self._peak:.1f} dBFS)")


class LiveView(PlainView):
    """A live line per capture on a terminal, drawn with ``rich``."""

    def __init__(self, console: Any = None) -> None:
        super().__init__()

        self.console = console or Console(highlight=False)
        self._progress: Any = None

    def say(self, text: str) -> None:
        self.console.print(text, markup=False, highlight=False)

    def start(self, label: str, duration_s: float) -> None:
        self._label, self._duration, self._peak = label, duration_s, -200.0
        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(bar_width=24),
            TextColumn("{task.fields[left]}"),
            TextColumn("{task.fields[meter]}"),
            TextColumn(f"[dim]{STOP_NOTE}[/dim]"),
            console=self.console,
            transient=False,
            refresh_per_second=10,
        )
        self._task = self._progress.add_task(
            label, total=1.0, left=f"{duration_s:4.1f} s left", meter=""
        )
        self._progress.start()

    def update(self, fraction: float, peak_dbfs: float, rms_dbfs: float) -> None:
        if self._progress is None:
            return
        self._peak = max(self._peak, peak_dbfs)
        left = (1.0 - fraction) * self._duration
        self._progress.update(
            self._task,
            completed=fraction,
            left=f"{left:4.1f} s left",
            meter=self.meter_text(peak_dbfs, rms_dbfs) + " " + _bar(peak_dbfs),
        )

    def stop(self) -> None:
        if self._progress is not None:
            self._progress.update(self._task, completed=1.0, left="done")
            self._progress.stop()
            self._progress = None

    def __exit__(self, *exc: Any) -> None:
        self.stop()


def _bar(peak_dbfs: float, width: int = 12) -> str:
    """A small peak bar from -60 to 0 dBFS (``#`` filled, ``!`` at the top when near 0)."""
    n = int(round(width * min(max((peak_dbfs + 60.0) / 60.0, 0.0), 1.0)))
    top = "!" if peak_dbfs > -3.0 else "|"
    return "[" + "#" * n + "." * (width - n) + "]" + top


def make_view(plain: bool = False) -> PlainView:
    """A live view on a terminal; plain lines when asked, when not a terminal, or in CI."""
    ci = os.environ.get("CI", "").strip().lower() not in ("", "0", "false")
    if plain or ci or not sys.stdout.isatty():
        return PlainView()
    return LiveView()
