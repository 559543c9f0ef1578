"""Linear algebra of designs, one definition each: rank tolerance, rank, row space and estimability,
independent rows, dependent columns, conditioning and variance inflation.

Pure functions of arrays (no files, no spec).  The model layer, the OLS engine and the audit use these, so
that "rank", "estimable" and "independent" mean the same thing everywhere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..text import number_text

#: Machine epsilon of float64.
EPS = float(np.finfo(np.float64).eps)
#: Relative tolerance of the estimability test: a row L is estimable when
#: ||L - L P|| <= ESTIMABILITY_TOL * ||L||, P the projector on the design's row space.  Loose enough for
#: weights rounded to about 8 significant digits (1/3 written 0.33333333 passes where the exact row is
#: estimable; such a row is tested as its projection onto the row space), tight enough to catch any
#: genuinely non-estimable row.
ESTIMABILITY_TOL = 1e-8
#: Factor on the rank tolerance when choosing a maximal independent subset of rows or columns.
SUBSET_TOL_FACTOR = 10
#: Factor on ``max(q, p) * eps`` under which the smallest singular value of a test's rows counts as zero
#: (the OLS engine refuses such a test: its rows are dependent).
DEPENDENT_ROWS_FACTOR = 1e3
#: Gram matrices with a condition number at or above this are treated as singular by the VIF shortcut.
VIF_GRAM_COND = 1e12


def rank_tolerance(matrix: np.ndarray, s: np.ndarray) -> float:
    """The rank tolerance used throughout: ``s.max() * max(n, p) * eps`` (as numpy.linalg.matrix_rank).

    ``s`` holds the singular values of ``matrix``; 0 when there are none.
    """
    return float(s.max() * max(matrix.shape) * np.finfo(float).eps) if s.size else 0.0


def matrix_rank(matrix: np.ndarray) -> int:
    """Numerical rank of ``matrix`` at :func:`rank_tolerance`."""
    s = np.linalg.svd(matrix, compute_uv=False)
    return int((s > rank_tolerance(matrix, s)).sum())


@dataclass(frozen=True)
class RowSpace:
    """The row space of a design, for estimability tests (from an SVD with a stated tolerance)."""

    basis: np.ndarray  # (r, p) orthonormal rows
    rank: int
    tol: float

    @classmethod
    def of(cls, matrix: np.ndarray) -> RowSpace:
        _, s, vt = np.linalg.svd(matrix, full_matrices=False)
        tol = rank_tolerance(matrix, s)
        r = int((s > tol).sum())
        return cls(vt[:r], r, tol)

    def distance(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Distance of each row from the row space and each row's norm, both shape (q,)."""
        rows = np.atleast_2d(rows)
        off = np.linalg.norm(rows - (rows @ self.basis.T) @ self.basis, axis=1)
        return off, np.linalg.norm(rows, axis=1)

    def residual(self, rows: np.ndarray) -> np.ndarray:
        """Relative distance of each row from the row space, shape (q,)."""
        off, norms = self.distance(rows)
        return off / np.where(norms > 0, norms, 1.0)

    def contains(self, rows: np.ndarray) -> np.ndarray:
        """Whether each row is estimable: within ESTIMABILITY_TOL (relative) of the row space; shape (q,)."""
        off, norms = self.distance(rows)
        return ~(off > ESTIMABILITY_TOL * np.maximum(norms, np.finfo(float).tiny))


def independent_rows(rows: np.ndarray) -> list[int]:
    """Indices of a maximal independent subset of ``rows``, earliest rows preferred."""
    kept: list[int] = []
    for i in range(rows.shape[0]):
        trial = rows[kept + [i]]
        s = np.linalg.svd(trial, compute_uv=False)
        if s.size and s.min() > rank_tolerance(trial, s) * SUBSET_TOL_FACTOR:
            kept.append(i)
    return kept


def rows_dependent(rows: np.ndarray) -> bool:
    """Whether the rows of a (q, p) test are linearly dependent (only meaningful for q > 1)."""
    q, p = rows.shape
    s = np.linalg.svd(rows, compute_uv=False)
    return bool(q > 1 and s[-1] <= s[0] * max(q, p) * EPS * DEPENDENT_ROWS_FACTOR)


def _fmt_coef(c: float) -> str:
    return number_text(abs(c), whole_tol=1e-6)


def dependent_columns(matrix: np.ndarray, names: list[str], entry_tol: np.ndarray | None = None) -> list[str]:
    """Describe each column that is a linear combination of earlier independent columns, in words.

    Columns are taken left to right; a column that adds nothing to the span of the columns kept so far is
    written as that combination, e.g. ``column site=B equals intercept - site=A``.

    ``entry_tol`` (one absolute tolerance per column: the rounding of typed entries) lets the words drop terms
    and shorten coefficients that are rounding noise (``-0.0016 x intercept`` where codes were typed with two
    decimals), as long as the shorter combination still reproduces the column within that rounding; such a
    combination is marked "within the rounding of the typed entries".
    """
    kept: list[int] = []
    out = []
    tol = rank_tolerance(matrix, np.linalg.svd(matrix, compute_uv=False)) * SUBSET_TOL_FACTOR
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
        note = ""
        if entry_tol is not None and kept:
            short = simplest_combination(matrix[:, kept], matrix[:, j], entry_tol[kept], float(entry_tol[j]))
            if not np.allclose(short, coef, rtol=1e-9, atol=1e-12):
                coef, note = short, " (within the rounding of the typed entries)"
        out.append(f"column {names[j]} equals {_combination_text(coef, [names[k] for k in kept])}{note}")
    return out


#: Most decimals a coefficient is shortened to when the typed entries are rounded.
SNAP_DECIMALS = 4


def simplest_combination(a: np.ndarray, y: np.ndarray, tol_a: np.ndarray, tol_y: float) -> np.ndarray:
    """Coefficients ``c`` with ``a @ c`` equal to ``y`` within the typed rounding, with as few terms and as
    few decimals as that allows.

    A combination reproduces ``y`` when no row is off by more than ``tol_y + sum_k |c_k| tol_a[k]`` (the
    rounding of the entries of ``y`` and of the columns used).  Terms are dropped smallest contribution first,
    then coefficients rounded to the fewest decimals (two significant digits at least, up to
    :data:`SNAP_DECIMALS` decimals), largest first, the others
    refitted each time.  Without rounding (``tol`` about 0) this is the least-squares combination.
    """
    k = a.shape[1]
    coef, *_ = np.linalg.lstsq(a, y, rcond=None)
    slack = 1e-12 * max(1.0, float(np.abs(y).max()))

    def fits(c: np.ndarray) -> bool:
        return float(np.abs(a @ c - y).max()) <= tol_y + float(np.abs(c) @ tol_a) + slack

    def refit(fixed: dict[int, float], free: list[int]) -> np.ndarray:
        c = np.zeros(k)
        for i, v in fixed.items():
            c[i] = v
        if free:
            c[free], *_ = np.linalg.lstsq(a[:, free], y - a @ c, rcond=None)
        return c

    active = [i for i in range(k) if coef[i] != 0]
    size = np.abs(coef) * np.abs(a).max(axis=0)
    for i in sorted(active, key=lambda i: size[i]):
        trial = refit({}, [m for m in active if m != i])
        if fits(trial):
            active, coef = [m for m in active if m != i], trial
    fixed: dict[int, float] = {}
    for i in sorted(active, key=lambda i: -abs(coef[i])):
        # at least two significant digits: 0.3162 becomes 0.32, not 0.3
        first = max(0, 1 - int(np.floor(np.log10(abs(coef[i]))))) if coef[i] != 0 else 0
        for d in range(first, max(first, SNAP_DECIMALS) + 1):
            v = round(float(coef[i]), d)
            if v == 0:
                continue
            trial = refit({**fixed, i: v}, [m for m in active if m != i and m not in fixed])
            if fits(trial):
                fixed[i], coef = v, trial
                break
    return coef


def _combination_text(coef: np.ndarray, names: list[str]) -> str:
    parts = []
    for c, name in zip(coef, names, strict=True):
        if abs(c) < 1e-8:
            continue
        sign = "-" if c < 0 else "+"
        mag = _fmt_coef(c)
        body = name if mag == "1" else f"{mag} x {name}"
        parts.append(f"{sign} {body}")
    expr = " ".join(parts).lstrip("+ ").strip() if parts else "0"
    if expr.startswith("- "):
        expr = "-" + expr[2:]
    return expr


def condition_number(matrix: np.ndarray) -> float:
    """Condition number of the design with each column scaled to unit length (Belsley's scaling).

    ``inf`` for a rank-deficient design (smallest singular value at or below the rank tolerance, or more
    columns than rows), rather than the reciprocal of a rounding error.
    """
    norms = np.linalg.norm(matrix, axis=0)
    scaled = matrix / np.where(norms > 0, norms, 1.0)
    s = np.linalg.svd(scaled, compute_uv=False)
    if s.size < matrix.shape[1] or s.min() <= rank_tolerance(scaled, s):
        return float("inf")
    return float(s.max() / s.min())


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
    if np.linalg.cond(gram) < VIF_GRAM_COND:
        vif = np.diag(np.linalg.inv(gram)) * np.diag(gram)
        return {names[j]: float(v) for j, v in zip(keep, vif, strict=True)}
    return variance_inflation_by_regression(matrix, names)


def vif_text(v: float) -> str:
    """A VIF for a message: 3 significant digits; an infinite one (the column's residual below 10^-12 of its
    variation: beyond what float64 can tell from exact collinearity) as ``"> 1e12"``."""
    return "> 1e12" if v == float("inf") else f"{v:.3g}"


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
