"""Checks of a design: rank, collinearity, cell counts, centring.

Each check returns :class:`Finding` objects (severity ``error``, ``warning`` or
``note``) with a one-line message in the study's words.  Thresholds are module
constants and documented in the README.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..text import number_text
from .design import Design

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


def rank_tolerance(matrix: np.ndarray, s: np.ndarray) -> float:
    """The rank tolerance used throughout: ``s.max() * max(n, p) * eps`` (as numpy.linalg.matrix_rank)."""
    return float(s.max() * max(matrix.shape) * np.finfo(float).eps) if s.size else 0.0


def matrix_rank(matrix: np.ndarray) -> int:
    s = np.linalg.svd(matrix, compute_uv=False)
    return int((s > rank_tolerance(matrix, s)).sum())


def _fmt_coef(c: float) -> str:
    return number_text(abs(c), whole_tol=1e-6)


def dependent_columns(matrix: np.ndarray, names: list[str]) -> list[str]:
    """Describe each column that is a linear combination of earlier independent columns, in words.

    Columns are taken left to right; a column that adds nothing to the span of the columns kept so far is
    written as that combination, e.g. ``column site=B equals intercept - site=A``.
    """
    kept: list[int] = []
    out = []
    tol = rank_tolerance(matrix, np.linalg.svd(matrix, compute_uv=False)) * 10
    for j in range(matrix.shape[1]):
        trial = matrix[:, kept + [j]]
        s = np.linalg.svd(trial, compute_uv=False)
        # More columns than rows: svd returns only n values, so the column is dependent whatever they are.
        if s.size == trial.shape[1] and s.min() > tol and s.min() / s.max() > 1e-10:
            kept.append(j)
            continue
        if not np.any(matrix[:, j]):
            out.append(f"column {names[j]} is all zero")
            continue
        coef, *_ = np.linalg.lstsq(matrix[:, kept], matrix[:, j], rcond=None) if kept else (np.zeros(0),)
        parts = []
        for c, k in zip(coef, kept, strict=True):
            if abs(c) < 1e-8:
                continue
            sign = "-" if c < 0 else "+"
            mag = _fmt_coef(c)
            body = names[k] if mag == "1" else f"{mag} x {names[k]}"
            parts.append(f"{sign} {body}")
        expr = " ".join(parts).lstrip("+ ").strip() if parts else "0"
        if expr.startswith("- "):
            expr = "-" + expr[2:]
        out.append(f"column {names[j]} equals {expr}")
    return out


def condition_number(matrix: np.ndarray) -> float:
    """Condition number of the design with each column scaled to unit length (Belsley's scaling)."""
    norms = np.linalg.norm(matrix, axis=0)
    scaled = matrix / np.where(norms > 0, norms, 1.0)
    s = np.linalg.svd(scaled, compute_uv=False)
    return float(s.max() / s.min()) if s.min() > 0 else float("inf")


def has_constant_column(matrix: np.ndarray) -> bool:
    """Whether some column is a nonzero constant (an intercept)."""
    return bool(np.any((np.ptp(matrix, axis=0) == 0) & (matrix[0] != 0))) if matrix.size else False


def variance_inflation(matrix: np.ndarray, names: list[str]) -> dict[str, float]:
    """VIF of every non-constant column: 1 / (1 - R^2) from regressing it on the other columns and a constant.

    Computed from one inverse: VIF_j = [(Z'Z)^-1]_jj (Z'Z)_jj with Z the centred non-constant columns, the
    standard identity (from memory; checked against statsmodels' variance_inflation_factor in the tests).
    When Z'Z is singular (a rank-deficient design, or indicators of every level), each column is regressed
    on the others instead and the affected columns get ``inf``.
    """
    keep = [j for j in range(matrix.shape[1]) if np.ptp(matrix[:, j]) > 0]
    if not keep:
        return {}
    z = matrix[:, keep] - matrix[:, keep].mean(axis=0)
    gram = z.T @ z
    if np.linalg.cond(gram) < 1e12:
        vif = np.diag(np.linalg.inv(gram)) * np.diag(gram)
        return {names[j]: float(v) for j, v in zip(keep, vif, strict=True)}
    return variance_inflation_by_regression(matrix, names)


def variance_inflation_by_regression(matrix: np.ndarray, names: list[str]) -> dict[str, float]:
    """VIF by one least-squares regression per column (the definition; slower, robust to singularity)."""
    n, p = matrix.shape
    out: dict[str, float] = {}
    for j in range(p):
        x = matrix[:, j]
        if np.ptp(x) == 0:
            continue
        others = np.column_stack([np.ones(n), np.delete(matrix, j, axis=1)])
        coef, *_ = np.linalg.lstsq(others, x, rcond=None)
        resid = x - others @ coef
        ss_tot = float(((x - x.mean()) ** 2).sum())
        ss_res = float((resid**2).sum())
        out[names[j]] = float("inf") if ss_res <= ss_tot * 1e-12 else ss_tot / ss_res
    return out


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
    findings: list[Finding] = []
    x = design.matrix
    names = design.column_names
    n, p = x.shape
    if p > n:
        findings.append(Finding(
            "error", "too_many_columns",
            f"the design has {p} columns but only {n} observations; remove terms or add participants",
        ))
    rank = matrix_rank(x)
    if rank < p:
        deps = dependent_columns(x, names)
        findings.append(Finding(
            "error", "rank_deficient",
            f"the design has rank {rank} with {p} columns: " + "; ".join(deps)
            + "; remove a dependent column or term, or check for empty cells",
        ))
    elif n - rank < 1:
        findings.append(Finding(
            "error", "no_error_df",
            f"the design leaves no residual degrees of freedom (n = {n}, rank = {rank}); "
            "remove terms or add participants",
        ))
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
        for col, v in variance_inflation(x, names).items():
            if v > VIF_WARN:
                findings.append(Finding(
                    "warning", "high_vif",
                    f"column {col} has variance inflation factor {v:.3g} (above {VIF_WARN:g}): it is nearly a "
                    "combination of other columns; consider centring or dropping a term",
                ))
    for term, table in cell_counts_by_term(design).items():
        for cell, count in table.items():
            if count == 0:
                findings.append(Finding("warning", "empty_cell", f"no participant has {cell} (term {term})"))
            elif count < SMALL_CELL:
                findings.append(Finding(
                    "warning", "small_cell", f"only {count} participant has {cell} (term {term})"
                ))
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
