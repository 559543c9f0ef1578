"""The estimated mean of every cell of a table-level fit, with its standard error and 95% confidence interval
(covariates held where the cell rows hold them, as in the hypotheses' statements)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from ..engine.linalg import RowSpace
from ..model.design import Design

#: Confidence level of the intervals.
LEVEL = 0.95


def cell_means(design: Design, y: np.ndarray) -> pd.DataFrame:
    """One row per cell: its factor levels, count, estimate, se, ci_low, ci_high (NaN when not estimable)."""
    est, se, half = cell_estimates(design.matrix, np.asarray(y, dtype=float).ravel(), design.cell_rows())
    frame = pd.DataFrame([dict(zip(design.factors, c, strict=True)) for c in design.cells],
                         columns=list(design.factors))
    frame["count"] = design.cell_counts.astype(int)
    frame["estimate"], frame["se"] = est, se
    frame["ci_low"], frame["ci_high"] = est - half, est + half
    return frame


def cell_estimates(x: np.ndarray, y: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The OLS fit of ``y`` on ``x`` at the design ``rows``: estimates, SEs and the half-widths of their
    :data:`LEVEL` intervals (error df = rows of ``x`` - its rank); NaN where a row is not estimable or no df is
    left."""
    pinv = np.linalg.pinv(x)
    b = pinv @ y
    space = RowSpace.of(x)
    df = x.shape[0] - space.rank
    resid = y - x @ b
    sigma2 = float(resid @ resid) / df if df > 0 else np.nan
    xtx_inv = pinv @ pinv.T  # (X'X)^+
    est = rows @ b
    se = np.sqrt(np.einsum("ij,jk,ik->i", rows, xtx_inv, rows) * sigma2)
    ok = space.contains(rows)
    est, se = np.where(ok, est, np.nan), np.where(ok, se, np.nan)
    half = stats.t.isf((1 - LEVEL) / 2, df) * se if df > 0 else np.full_like(se, np.nan)
    return est, se, half


__all__ = ["LEVEL", "cell_estimates", "cell_means"]
