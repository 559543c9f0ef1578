"""Lines for logs: one per stage with its elapsed time, and for long stages a progress line at most every 30 s.

A job whose output goes to a file shows no progress bar (:mod:`.progress`), so without these lines a hung job
would look like a working one.  Stage and progress lines go to stdout with the rest of the run's report;
warnings go to stderr (shown even with ``quiet``).  Every line starts with ``groupmodel:``.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TextIO

__all__ = ["PROGRESS_INTERVAL", "StageLog", "duration_text"]

#: Seconds between two progress lines of one stage.
PROGRESS_INTERVAL = 30.0


def duration_text(seconds: float) -> str:
    """``0.4 s``, ``12 s``, ``3 min 5 s``, ``2 h 4 min``."""
    if seconds < 10:
        return f"{seconds:.1f} s"
    s = round(seconds)
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60} s"
    return f"{s // 3600} h {s % 3600 // 60} min"


class StageLog:
    """Stage and progress lines on ``stream`` (default stdout), warnings on ``errors`` (default stderr); nothing
    but warnings when ``quiet``.

    Parameters
    ----------
    quiet : bool
    progress_lines : bool
        Write the progress lines of long stages (default: when ``stream`` is not a terminal, where a progress
        bar shows instead).
    stream, errors : file, optional
    clock : callable, optional
        Seconds (monotonic); injectable for tests.
    """

    def __init__(self, quiet: bool = False, progress_lines: bool | None = None, stream: TextIO | None = None,
                 clock: Callable[[], float] = time.monotonic, errors: TextIO | None = None) -> None:
        self.quiet = quiet
        self._stream = stream
        self._errors = errors
        self.clock = clock
        tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.progress_lines = (not tty) if progress_lines is None else progress_lines
        self._last: dict[str, float] = {}
        self._start: dict[str, float] = {}

    @property
    def stream(self) -> TextIO:
        return self._stream if self._stream is not None else sys.stdout

    def info(self, text: str) -> None:
        if not self.quiet:
            self.stream.write(f"groupmodel: {text}\n")
            self.stream.flush()

    def warning(self, text: str) -> None:
        errors = self._errors if self._errors is not None else sys.stderr
        errors.write(f"groupmodel: warning: {text}\n")
        errors.flush()

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        """One line when the stage ends: ``<name>: done in 12 s``."""
        start = self.clock()
        self._start[name] = start
        yield
        self.info(f"{name}: done in {duration_text(self.clock() - start)}")

    def progress(self, name: str, done: int, total: int, unit: str = "") -> None:
        """A line ``<name>: k of J <unit> (rate/s, about T left)`` when at least :data:`PROGRESS_INTERVAL`
        seconds have passed since the stage began or since the last such line."""
        if self.quiet or not self.progress_lines or done >= total:
            return
        now = self.clock()
        start = self._start.setdefault(name, now)
        if now - self._last.get(name, start) < PROGRESS_INTERVAL:
            return
        self._last[name] = now
        elapsed = now - start
        rate = done / elapsed if elapsed > 0 else 0.0
        left = f", about {duration_text((total - done) / rate)} left" if rate > 0 else ""
        self.info(f"{name}: {done} of {total}{' ' + unit if unit else ''} ({rate:.3g}/s{left})")
