"""Progress events of long work (data passes, scoring) and their terminal display.

The library only emits :class:`Event` objects to a callback. ``progress=True`` picks the
:class:`TerminalBar` (a rich progress bar on stderr, silent when stderr is not a
terminal); the command line also offers JSON lines for batch logs.
"""

from __future__ import annotations

import json
import sys
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass


@dataclass
class Event:
    """``kind`` is ``"start"``, ``"advance"``, ``"end"`` or ``"note"``."""

    kind: str
    task: str            # e.g. "profile", "pass 3", "scoring"
    rows: int = 0        # rows done so far in this task
    total: int | None = None
    message: str = ""


Callback = Callable[[Event], None]


def _nothing(event: Event) -> None:
    return None


def make_callback(progress) -> Callback:
    """Normalise the user's ``progress`` argument to a callback."""
    if progress is None or progress is False:
        return _nothing
    if progress is True:
        return TerminalBar() if sys.stderr.isatty() else _nothing
    if callable(progress):
        return progress
    raise TypeError("progress must be True, False or a callable taking an Event")


class TerminalBar:
    """A rich progress bar per task: rows, rows per second and time left."""

    def __init__(self):
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description:>10}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"), TimeRemainingColumn(), transient=False,
            console=None)
        self._tasks: dict[str, int] = {}
        self._t0: dict[str, float] = {}

    def __call__(self, event: Event) -> None:
        p = self._progress
        if event.kind == "start":
            if not self._tasks:
                p.start()
            self._tasks[event.task] = p.add_task(event.task, total=event.total, rate="")
            self._t0[event.task] = time.perf_counter()
        elif event.kind in ("advance", "end") and event.task in self._tasks:
            dt = max(time.perf_counter() - self._t0[event.task], 1e-9)
            p.update(self._tasks[event.task], completed=event.rows,
                     rate=f"{event.rows / dt:,.0f} rows/s")
            if event.kind == "end":
                p.update(self._tasks[event.task], total=event.rows)
        elif event.kind == "note":
            p.console.print(event.message)
        if event.kind == "end" and event.task == "done":
            p.stop()

    def close(self) -> None:
        self._progress.stop()


class JsonLines:
    """One JSON object per event on a stream (for batch-job logs)."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr

    def __call__(self, event: Event) -> None:
        record = {"time": round(time.time(), 3), **asdict(event)}
        self.stream.write(json.dumps(record) + "\n")
        self.stream.flush()
