"""Progress reporting for long steps, decoupled from the terminal.

Library functions take an optional ``progress`` callable and report ``progress(step, done,
total)``: the step's name (reading, fitting, drawing, ...), units done and the units in all.
They never print. The CLI passes a :class:`Bar` when stderr is a terminal and ``--quiet`` is
not given, and nothing otherwise, so scripts and pipes see no progress text.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import TextIO

Progress = Callable[[str, int, int], None]


def report(progress: Progress | None, step: str, done: int, total: int) -> None:
    """Call progress(step, done, total) when a reporter is given."""
    if progress is not None:
        progress(step, done, total)


class Bar:
    """A one-line text bar on a terminal stream, redrawn at most ten times a second.

    Usage: ``bar = Bar(); bar("fitting", 3, 13); ...; bar.close()``.
    """

    WIDTH = 28

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self._last = 0.0
        self._shown = False

    def __call__(self, step: str, done: int, total: int) -> None:
        now = time.monotonic()
        if done < total and now - self._last < 0.1:
            return
        self._last = now
        frac = min(max(done / total, 0.0), 1.0) if total > 0 else 1.0
        filled = round(frac * self.WIDTH)
        line = f"\r{step:<12} [{'#' * filled}{'.' * (self.WIDTH - filled)}] {done}/{total}"
        self.stream.write(line + "\033[K")
        self.stream.flush()
        self._shown = True

    def close(self) -> None:
        """Clear the bar's line so the summary starts on a clean line."""
        if self._shown:
            self.stream.write("\r\033[K")
            self.stream.flush()
            self._shown = False


def terminal_bar(quiet: bool, stream: TextIO | None = None) -> Bar | None:
    """A Bar when the stream (default stderr) is a terminal and not quiet, else None."""
    stream = stream if stream is not None else sys.stderr
    try:
        tty = stream.isatty()
    except (AttributeError, ValueError):
        tty = False
    return Bar(stream) if tty and not quiet else None
