"""Cell means of a table fit with within-participant factors (cell_means.tsv).

Every cell crosses a between cell with a within cell.  The values of one within cell come from different
participants, so they are independent: each within cell's values (one per participant who has it) are fitted
with the between-participant design, and the cell's mean, SE and 95% interval come from that fit (error df =
participants with that within cell - rank of the between design; covariates held as in the cell rows).  This
is the mixed stratum of a hypothesis on one cell; an OLS fit of every observation at once would treat the
participants' repeated values as independent and overstate the df.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..model.assembly import Model
from .cell_means import cell_estimates

__all__ = ["strata_cell_means"]


def strata_cell_means(model: Model, y: np.ndarray) -> pd.DataFrame:
    """One row per cell of the full design (its factor levels, count, estimate, se, ci_low, ci_high)."""
    strata = model.strata
    assert strata is not None
    design, between = model.design, strata.between
    bpos = {c: i for i, c in enumerate(between.cells)}
    wpos = {c: j for j, c in enumerate(strata.within_cells)}
    rows_b = between.cell_rows()
    per_within = [_within_cell(strata.observation_index[:, w], between.matrix, rows_b, y)
                  for w in range(len(strata.within_cells))]
    names = list(design.factors)
    records = []
    for cell, count in zip(design.cells, design.cell_counts, strict=True):
        levels = dict(zip(names, cell, strict=True))
        b = bpos[tuple(levels[f] for f in between.factors)]
        w = wpos[tuple(levels[f] for f in strata.within_factors)]
        est, se, half = (arr[b] for arr in per_within[w])
        records.append({**levels, "count": int(count), "estimate": est, "se": se,
                        "ci_low": est - half, "ci_high": est + half})
    return pd.DataFrame.from_records(records, columns=[*names, "count", "estimate", "se", "ci_low", "ci_high"])


def _within_cell(index: np.ndarray, x_all: np.ndarray, rows: np.ndarray,
                 y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Estimates, SEs and interval half-widths of the between cells' means from one within cell's values."""
    have = index >= 0
    x, values = x_all[have], y[index[have]]
    nan = np.full(rows.shape[0], np.nan)
    if not have.any():
        return nan, nan, nan
    return cell_estimates(x, values, rows)
