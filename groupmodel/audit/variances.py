"""``groupmodel check`` with a spec that names an ``outcome`` column: do the groups' residual variances differ?

The outcome is fitted with the hand-written design (rows matched to participants as the other checks match
them); for every factor the audit identified, each group's residual variance and Levene's test
(``scipy.stats.levene``, centred on medians) follow :mod:`groupmodel.engine.variance_check`.  A factor whose
variances differ is reported as a warning suggesting ``variance_groups`` (Welch's v and G).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..engine.linalg import rank_tolerance
from ..engine.variance_check import LEVENE_ALPHA, VARIANCE_RATIO_WARN, group_variances, unequal
from ..engine.welch import GROUP_DF_MIN, group_residual_df
from ..text import number_text
from .context import AuditContext
from .read import AuditFinding

__all__ = ["FactorGroups", "checkable_groups", "column_space", "variance_findings"]


def _outcome(ctx: AuditContext) -> tuple[str, np.ndarray, np.ndarray] | None:
    """The outcome column, its value for every design row, and the table row of every design row (None when
    the spec names no outcome, the rows are not matched, or a value is missing)."""
    spec, alignment = ctx.request.spec, ctx.alignment
    if spec is None or not spec.outcome or alignment is None or alignment.claimed is None:
        return None
    claimed = np.asarray(alignment.claimed)
    frame = alignment.table.frame
    if spec.outcome not in frame.columns or np.any(claimed < 0):
        return None
    y = pd.to_numeric(frame[spec.outcome].iloc[claimed], errors="coerce").to_numpy(dtype=float)
    return (spec.outcome, y, claimed) if np.all(np.isfinite(y)) else None


@dataclass(frozen=True)
class FactorGroups:
    """An identified factor's groups among the design rows: labels per row, residual df per group, level names."""

    factor: str
    labels: np.ndarray
    rho: np.ndarray
    levels: list[str]


def column_space(ctx: AuditContext) -> np.ndarray:
    """An orthonormal basis of the hand-written design's columns."""
    x = ctx.files.x.values
    u, s, _ = np.linalg.svd(x, full_matrices=False)
    return u[:, : int(np.sum(s > rank_tolerance(x, s)))]


def checkable_groups(ctx: AuditContext, u: np.ndarray, claimed: np.ndarray) -> list[FactorGroups]:
    """The identified factors whose groups can be compared: every row in a group, two groups or more, each with
    enough residual degrees of freedom."""
    assert ctx.columns is not None and ctx.alignment is not None
    table = ctx.alignment.table
    out = []
    for factor in ctx.columns.factors:
        codes = table.codes.get(factor)
        if codes is None or np.any(codes[claimed] < 0):
            continue
        present, labels = np.unique(codes[claimed], return_inverse=True)
        rho = group_residual_df(u, labels, present.size)
        if present.size >= 2 and np.all(rho >= GROUP_DF_MIN):
            out.append(FactorGroups(factor, labels, rho, [table.factors[factor][c] for c in present]))
    return out


def variance_findings(ctx: AuditContext) -> list[AuditFinding]:
    """A warning for each identified factor whose groups' residual variances of the spec's outcome differ."""
    got = _outcome(ctx)
    if got is None or ctx.columns is None:
        return []
    outcome, y, claimed = got
    u = column_space(ctx)
    resid = (y - u @ (u.T @ y))[:, None]
    out = []
    for g in checkable_groups(ctx, u, claimed):
        variances, p = group_variances(resid, g.labels, g.rho)
        if not unequal(variances, p)[0]:
            continue
        levels = g.levels
        hi, lo = int(np.argmax(variances[:, 0])), int(np.argmin(variances[:, 0]))
        out.append(AuditFinding(
            "warning", "unequal_variances",
            f"the residual variances of {outcome!r} (the spec's outcome, fitted with this design) in the groups of "
            f"{g.factor!r} differ by a factor of {number_text(variances[hi, 0] / variances[lo, 0])} ({levels[hi]} "
            f"{number_text(variances[hi, 0])}, {levels[lo]} {number_text(variances[lo, 0])}; Levene's test, "
            f"scipy.stats.levene centred on medians: p = {number_text(p[0])}), more than the factor "
            f"{number_text(VARIANCE_RATIO_WARN)} with p < {number_text(LEVENE_ALPHA)} this check allows; pooled t "
            f'and F assume equal variances: consider "variance_groups": "{g.factor}" in the spec',
            "variances"))  # type: ignore[arg-type]
    return out
