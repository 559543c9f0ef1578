"""Effect sizes and intervals of a hypothesis tested in its error stratum (within-participant factors).

Every quantity is taken in the stratum the hypothesis is tested in, with that stratum's error df:

* t tests: ``ci_lower``/``ci_upper``, the estimate -/+ t(df2) se, df2 = participants entered - rank of the
  between design;
* ``cohens_d`` where the hypothesis compares two (cell or marginal) means, as for one row per participant:
  the estimate over the residual SD of the data the stratum fits.  Within stratum (a paired comparison such as
  post - pre): the mean difference over the SD of the differences (with between factors, their pooled residual
  SD within the between cells), often written d_z.  Between stratum: the difference over the residual SD of the
  participant averages.  Mixed stratum (e.g. groups at one session): over the residual SD of the values in
  that within cell;
* ``partial_eta_squared`` = F df1 / (F df1 + df2) = SSH / (SSH + SSE) in the stratum (the split-plot partial
  eta squared, with the stratum's error sum of squares); its noncentral-F interval (Steiger 2004) on the
  stratum's df.  For an F test with more than one within df the F follows a noncentral F on those df only
  under sphericity, so the interval is not given there (n/a; the reason is in the sidecar and results.json).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..engine import effect_sizes as es
from .effect_maps import EFFECT_SIZE_STATS, has_cohens_d

if TYPE_CHECKING:
    from ..model.hypotheses import Hypothesis
    from ..model.strata import StratumTest
    from .strata_fit import StratumResult

__all__ = ["is_stratum_t", "strata_effect_names", "strata_effect_sizes"]

def is_stratum_t(test: StratumTest) -> bool:
    """Whether the hypothesis is a t test in its stratum (one between row, one transformed value)."""
    return test.is_t


def strata_effect_names(h: Hypothesis, test: StratumTest) -> tuple[str, ...]:
    """The effect-size statistics of ``h`` in its stratum, in the order of :data:`EFFECT_SIZE_STATS`."""
    if is_stratum_t(test):
        return tuple(s for s in EFFECT_SIZE_STATS if s != "cohens_d" or has_cohens_d(h))
    if test.within_df > 1:
        return ("partial_eta_squared",)
    return EFFECT_SIZE_STATS[3:]


def strata_effect_sizes(h: Hypothesis, test: StratumTest, r: StratumResult, level: float, *,
                        grid: bool = True) -> dict[str, np.ndarray]:
    """The statistics of :func:`strata_effect_names` from one stratum fit (NaN where the statistic is NaN)."""
    stat = np.asarray(r.statistic, dtype=np.float64)
    untested = np.isnan(stat)
    out: dict[str, np.ndarray] = {}
    if is_stratum_t(test):
        ci = es.t_interval(r.estimate, r.se, r.df2, level)
        out["ci_lower"], out["ci_upper"] = ci.lower, ci.upper
        out["cohens_d"] = es.cohens_d(r.estimate, r.residual_variance)
        f = stat**2
    else:
        f = stat
    out["partial_eta_squared"] = es.partial_eta_squared(f, r.df1, r.df2)
    names = strata_effect_names(h, test)
    if "partial_eta_squared_ci_lower" in names:
        eta = es.partial_eta_squared_interval(f, r.df1, r.df2, level, grid=grid)
        out["partial_eta_squared_ci_lower"], out["partial_eta_squared_ci_upper"] = eta.lower, eta.upper
    return {k: np.where(untested, np.nan, out[k]) for k in names}
