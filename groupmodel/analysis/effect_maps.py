"""Effect sizes and intervals of one hypothesis from its engine results (maps of a voxel fit, rows of a table fit).

Which statistics a hypothesis gets:

* every t hypothesis: ``ci_lower``, ``ci_upper`` (the interval of the effect ``L b``);
* a t hypothesis whose weights over cell means compare two means (they sum to 0 and their positive part to
  1: one cell or average of cells minus another; :func:`groupmodel.engine.effect_sizes.compares_two_means`):
  also ``cohens_d``, the effect over the residual SD;
* every t and F hypothesis: ``partial_eta_squared`` with ``partial_eta_squared_ci_lower`` / ``_ci_upper``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..engine import effect_sizes as es

if TYPE_CHECKING:
    from ..engine.ols import TestResult
    from ..model.hypotheses import Hypothesis

__all__ = ["EFFECT_SIZE_STATS", "effect_size_names", "effect_sizes", "has_cohens_d"]

#: Every statistic this module can add, in the order they are written.
EFFECT_SIZE_STATS = ("ci_lower", "ci_upper", "cohens_d", "partial_eta_squared",
                     "partial_eta_squared_ci_lower", "partial_eta_squared_ci_upper")


def has_cohens_d(h: Hypothesis) -> bool:
    """Whether Cohen's d is defined for ``h``: a t test over cell means (not slopes) comparing two means."""
    return h.test == "t" and h.on_slopes is None and es.compares_two_means(h.cell_weights)


def effect_size_names(h: Hypothesis) -> tuple[str, ...]:
    """The effect-size statistics of ``h``, in the order of :data:`EFFECT_SIZE_STATS`."""
    if h.test != "t":
        return EFFECT_SIZE_STATS[3:]
    return tuple(s for s in EFFECT_SIZE_STATS if s != "cohens_d" or has_cohens_d(h))


def effect_sizes(h: Hypothesis, result: TestResult, residual_variance: np.ndarray,
                 level: float = es.DEFAULT_CI_LEVEL, *, grid: bool = True) -> dict[str, np.ndarray]:
    """The statistics of :func:`effect_size_names` for one chunk (``grid``: see
    :func:`groupmodel.engine.effect_sizes.partial_eta_squared_interval`).  Untested voxels (NaN statistic,
    e.g. zero residual variance) get NaN throughout."""
    out: dict[str, np.ndarray] = {}
    stat = np.asarray(result.statistic, dtype=np.float64)
    untested = np.isnan(stat)
    if h.test == "t":
        f = stat**2
        ci = es.t_interval(result.effect, result.se, result.df2, level)
        out["ci_lower"], out["ci_upper"] = ci.lower, ci.upper
        if has_cohens_d(h):
            out["cohens_d"] = np.where(untested, np.nan, es.cohens_d(result.effect, residual_variance))
    else:
        f = stat
    out["partial_eta_squared"] = es.partial_eta_squared(f, result.df1, result.df2)
    eta = es.partial_eta_squared_interval(f, result.df1, result.df2, level, grid=grid)
    out["partial_eta_squared_ci_lower"], out["partial_eta_squared_ci_upper"] = eta.lower, eta.upper
    return {k: np.where(untested, np.nan, out[k]) for k in effect_size_names(h)}
