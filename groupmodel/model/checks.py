"""Checks of a design: rank, collinearity, cell counts, centring.

Each check returns :class:`Finding` objects (severity ``error``, ``warning`` or
``note``) with a one-line message in the study's words.  Thresholds are module
constants and documented in the README.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..engine.linalg import (
    RowSpace,
    condition_number,
    dependent_columns,
    has_constant_column,
    matrix_rank,
    rank_tolerance,
    variance_inflation,
    variance_inflation_by_regression,
    vif_text,
)
from .design import Design

# The linear algebra lives in groupmodel.engine.linalg; these names stay importable from here.
__all__ = [
    "CONDITION_WARN",
    "Finding",
    "SMALL_CELL",
    "VIF_WARN",
    "cell_counts_by_term",
    "check_design",
    "condition_number",
    "dependent_columns",
    "empty_cells_behind_rank",
    "empty_cells_text",
    "has_constant_column",
    "matrix_rank",
    "rank_tolerance",
    "variance_inflation",
    "variance_inflation_by_regression",
]

Severity = Literal["error", "warning", "note"]

#: Condition number (of the design with columns scaled to unit length) above which we warn.
#: Belsley, Kuh and Welsch (1980) call 30 and above strong dependence (from memory; common practice).
CONDITION_WARN = 30.0
#: Variance inflation factor above which we warn (a rule of thumb: common practice).
VIF_WARN = 10.0
#: Cells with fewer observations than this are warned about.
SMALL_CELL = 2


@dataclass(frozen=True)
class Finding:
    """One result of a check."""

    severity: Severity
    code: str
    message: str

    def as_dict(self) -> dict[str, str]:
        return {"severity": self.severity, "code": self.code, "message": self.message}

    def __str__(self) -> str:
        return f"{self.severity}: {self.message}"


def cell_counts_by_term(design: Design) -> dict[str, dict[str, int]]:
    """For every term with a factor, the count of each cell of its factors' crossing."""
    from itertools import product

    out: dict[str, dict[str, int]] = {}
    obs = design.observations
    seen = set()
    for term in design.terms:
        fs = tuple(m for m in term if m in design.factors)
        if not fs or fs in seen:
            continue
        seen.add(fs)
        counts = obs.groupby(list(fs), sort=False).size().to_dict() if len(obs) else {}
        table = {}
        for combo in product(*(design.factors[f].levels for f in fs)):
            key = combo if len(fs) > 1 else combo[0]
            table[", ".join(f"{f}={lv}" for f, lv in zip(fs, combo, strict=True))] = int(counts.get(key, 0))
        out[":".join(fs)] = table
    return out


def check_design(design: Design) -> list[Finding]:
    """All design-level findings (rank, collinearity, cells, centring)."""
    findings, rank = _rank_findings(design)
    findings += _collinearity_findings(design, rank)
    findings += _cell_findings(design)
    findings += _centring_findings(design)
    return findings


def _rank_findings(design: Design) -> tuple[list[Finding], int]:
    """Rank deficiency (a warning naming the dependent columns and the empty cells behind them), no residual
    df (an error); and the rank.

    A rank-deficient design is fitted with a generalised inverse: every estimable hypothesis has one value
    whichever inverse is used, and each hypothesis that is not estimable is refused on its own.
    """
    findings: list[Finding] = []
    x = design.matrix
    names = design.column_names
    n, p = x.shape
    if p > n:
        findings.append(Finding(
            "warning", "too_many_columns",
            f"the design has {p} columns but only {n} observations: it cannot be full rank",
        ))
    rank = matrix_rank(x)
    if rank < p:
        deps = dependent_columns(x, names)
        empty = empty_cells_behind_rank(design)
        cause = f" because no participant has {empty_cells_text(design, empty)}" if empty else ""
        findings.append(Finding(
            "warning", "rank_deficient",
            f"the design has rank {rank} with {p} columns{cause}: in the observed rows " + "; ".join(deps)
            + f"; it is fitted with a generalised inverse (n - rank = {n - rank} residual degrees of freedom): "
            "the hypotheses the observed rows determine are tested, any other is refused",
        ))
    if n - rank < 1:
        findings.append(Finding(
            "error", "no_error_df",
            f"the design leaves no residual degrees of freedom (n = {n}, rank = {rank})"
            + (f": it has {p} columns but only {n} observations" if p > n else "")
            + "; remove terms or add participants",
        ))
    return findings, rank


def empty_cells_text(design: Design, cells: list[tuple[str, ...]]) -> str:
    """Empty cells in the fewest factors that describe them: ``site=north, scanner=S1; site=south, scanner=N1``
    rather than every crossing of those with a third factor whose levels all occur in the list."""
    names = list(design.factors)
    empty = set(cells)
    keep = list(range(len(names)))
    for g in reversed(range(len(names))):
        trial = [i for i in keep if i != g]
        if all(tuple(c[i] if i != g else lv for i in range(len(names))) in empty
               for c in empty for lv in design.factors[names[g]].levels):
            keep = trial
    seen: dict[tuple[str, ...], None] = {}
    for c in cells:
        seen.setdefault(tuple(c[i] for i in keep), None)
    return "; ".join(", ".join(f"{names[i]}={lv}" for i, lv in zip(keep, key, strict=True)) for key in seen)


def empty_cells_behind_rank(design: Design) -> list[tuple[str, ...]]:
    """The empty cells whose design row (or covariate slope row) the observed rows do not reach.

    These are the cells whose absence makes the design rank deficient: with them observed, the columns
    they involve would be separated.
    """
    counts = design.cell_counts
    if not design.factors or not (counts == 0).any():
        return []
    space = RowSpace.of(design.matrix)
    out = []
    for i in np.flatnonzero(counts == 0):
        cell = design.cells[int(i)]
        rows = [design.cell_row(cell)] + [design.cell_slope_row(cell, c) for c in design.covariates]
        if not space.contains(np.array(rows)).all():
            out.append(cell)
    return out


def _collinearity_findings(design: Design, rank: int) -> list[Finding]:
    """Condition number and variance inflation of a full-rank design."""
    findings: list[Finding] = []
    x = design.matrix
    p = x.shape[1]
    cond = condition_number(x)
    if rank == p and cond > CONDITION_WARN:
        findings.append(Finding(
            "warning", "ill_conditioned",
            f"condition number {cond:.3g} (columns scaled to unit length) is above {CONDITION_WARN:g}: "
            "estimates are sensitive to small changes in the data; centre covariates or simplify the model",
        ))
    if rank == p and has_constant_column(x):
        # Without a constant column (cell-means and other no-intercept designs) the usual VIF, which adds a
        # constant to each regression, is infinite by construction and says nothing: skip it, as check does.
        for col, v in variance_inflation(x, design.column_names).items():
            if v > VIF_WARN:
                findings.append(Finding(
                    "warning", "high_vif",
                    f"column {col} has variance inflation factor {vif_text(v)} (above {VIF_WARN:g}): it is nearly a "
                    "combination of other columns; consider centring or dropping a term",
                ))
    return findings


def _cell_findings(design: Design) -> list[Finding]:
    """Empty and small cells of every term's factors."""
    findings: list[Finding] = []
    for term, table in cell_counts_by_term(design).items():
        for cell, count in table.items():
            if count == 0:
                findings.append(Finding("warning", "empty_cell", f"no participant has {cell} (term {term})"))
            elif count < SMALL_CELL:
                findings.append(Finding(
                    "warning", "small_cell", f"only {count} participant has {cell} (term {term})"
                ))
    return findings


def _centring_findings(design: Design) -> list[Finding]:
    """Covariates that enter an interaction with a factor uncentred."""
    findings: list[Finding] = []
    for term in design.terms:
        fs = [m for m in term if m in design.factors]
        covs = [m for m in term if m in design.covariates]
        for c in covs:
            cov = design.covariates[c]
            if fs and not cov.is_centred:
                findings.append(Finding(
                    "warning", "uncentred_interaction",
                    f"covariate {c} enters the interaction {':'.join(term)} uncentred: the columns of "
                    f"{', '.join(fs)} then describe group differences at {c} = 0, not at a typical {c}; "
                    'centre it ("center": "mean") unless {c} = 0 is meaningful'.replace("{c}", c),
                ))
    return findings
