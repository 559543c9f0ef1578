"""Progress bars: tqdm on a terminal, nothing otherwise (logs captured to files stay clean)."""

from __future__ import annotations

import sys
from typing import Any


class Progress:
    """A progress bar that may be absent: ``update`` and ``close`` are no-ops without a terminal."""

    def __init__(self, bar: Any = None) -> None:
        self._bar = bar

    @property
    def shown(self) -> bool:
        return self._bar is not None

    def update(self, n: int) -> None:
        if self._bar is not None:
            self._bar.update(n)

    def grow(self, n: int) -> None:
        """``n`` more to do (for totals known only as the work goes on)."""
        if self._bar is not None:
            self._bar.total += n
            self._bar.refresh()

    def update_to(self, done: int) -> None:
        """Move the bar to ``done`` (for callbacks that report totals so far)."""
        if self._bar is not None:
            self._bar.update(done - self._bar.n)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None


def progress_bar(total: int, desc: str, unit: str = "vox", enabled: bool = True) -> Progress:
    """A tqdm bar on stderr when ``enabled`` and stderr is a terminal; an absent bar otherwise."""
    if not enabled or not sys.stderr.isatty():
        return Progress()
    from tqdm import tqdm

    return Progress(tqdm(total=total, desc=desc, unit=unit, leave=False))
