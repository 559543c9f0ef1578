"""A hypothesis's statistic map among its maps, and its peak: where the test looks for its strongest evidence."""

from __future__ import annotations

import numpy as np

__all__ = ["peak_element", "statistic_map"]


def peak_element(stat: np.ndarray, tail: str) -> int | None:
    """Position of the peak of a statistic map in the direction its test looks (None if nothing was tested):
    the largest t (or Welch's v) for ``greater``, the smallest for ``less``, the largest |t| for two-sided tests,
    the largest F (or G; its tail is ``upper``).  NaN (untested) elements are skipped."""
    stat = np.asarray(stat, dtype=np.float64)
    if not np.any(~np.isnan(stat)):
        return None
    if tail == "greater":
        return int(np.nanargmax(stat))
    if tail == "less":
        return int(np.nanargmin(stat))
    return int(np.nanargmax(np.abs(stat)))


def statistic_map(maps: dict[str, np.ndarray]) -> np.ndarray:
    """A hypothesis's statistic map among its maps: t or F, or with variance groups v or G."""
    return next(maps[k] for k in ("t", "F", "v", "G") if k in maps)
