"""Freedman-Lane plans: the design split, for one contrast, into interest and the nuisance that moves.

Array-level code: it knows nothing about files or specs.

Freedman-Lane (Freedman and Lane 1983; Winkler et al. 2014, NeuroImage 92:381-397)
------------------------------------------------------------------------------------
The design is partitioned, for each contrast, into effects of interest and nuisance.  Numerically:
``X = U S V'`` (economy SVD, rank r, which may be below p: a rank-deficient design is split the same way,
its contrast rows estimable, and only its column space is used); the contrast in the coordinates ``theta = U'Y`` is
``M = L V_r S_r^-1`` (so ``L b = M theta``); the right singular vectors of ``M`` split the
column space of ``X`` into the interest space ``U_i`` (q columns, spanning the space of Winkler et
al.'s ``X_i = X D L' (L D L')^-1``, ``D = (X'X)^+``) and the nuisance space ``U_z`` (r - q columns,
spanning ``Z = X N`` with ``N`` a basis of the null space of ``L``).  Both are orthonormal and
orthogonal to each other.  For a t contrast, ``U_i`` is oriented so that ``U_i' Y`` has the sign of
``L b``.

For each rearrangement ``P`` (a row permutation and/or sign flips): the data are residualised
against the nuisance, ``W = Y - U_z U_z' Y``; the rearranged data ``P W`` are refitted with the full
model, giving

    t = u_i' P W / sqrt(RSS / df),    F = ||U_i' P W||^2 / q / (RSS / df),
    RSS = ||W||^2 - ||U_i' P W||^2 - ||U_z' P W||^2,     df = n - r,

(adding back the nuisance fit, as Freedman-Lane prescribe, changes neither statistic).  The
identity rearrangement gives the parametric t or F (to rounding, about 1e-12 relative for
ordinary t; the tests check 1e-10 against statsmodels).  Nuisance directions that every
rearrangement leaves unchanged (the constant vector under permutation, block indicators under
within-block permutation, within-block position indicators under whole-block permutation)
contribute ``z' P W = z' W = 0`` and are dropped, so a two-sample test with an intercept costs one
row per rearrangement; the remaining m = q + (moving nuisance) rows form the design side.

Counting rearrangements: observations whose design-side rows are identical are interchangeable
(swapping them cannot change the statistic), so they form one class for counting and enumerating
distinct permutations (:mod:`groupmodel.inference.rearrangements`).  Without moving nuisance rows this is the
usual rule of identical rows of the interest part (two groups of 5 and 6: 462); with them, swaps
that change the nuisance fit are rightly counted as distinct.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..engine.linalg import RowSpace, rank_tolerance
from ..errors import EstimabilityError, InputError, ModelError

__all__ = [
    "ContrastPlan",
    "MEAN_SHIFT_TOL",
    "Kind",
    "Partition",
    "Tail",
    "partition",
    "plan_contrast",
    "residualise",
    "stack_rows",
]

Tail = Literal["two-sided", "greater", "less"]
Kind = Literal["t", "F"]

_EPS = float(np.finfo(np.float64).eps)
#: Singular values of the contrast in design coordinates below this fraction of the largest are 0.
_CONTRAST_RANK_RTOL = 1e-10
#: Interest rows equal to this relative precision are the same class (indistinguishable).
_CLASS_DECIMALS = 8
#: Residual sums of squares at or below ``(this * n * eps * max|y|)^2`` count as zero (constant data).
ZERO_SS_FACTOR = 16.0


@dataclass(frozen=True)
class Partition:
    """Interest and nuisance spaces of a design for one contrast.

    Attributes
    ----------
    interest : ndarray, shape (n, q)
        Orthonormal basis of the interest space; for a t contrast (q = 1) oriented so that
        ``interest' Y`` has the sign of ``L b``.
    nuisance : ndarray, shape (n, r - q)
        Orthonormal basis of the nuisance space (the reduced model under ``L b = 0``).
    rank : int
        Rank r of the design.
    df : int
        Residual degrees of freedom n - r.
    """

    interest: np.ndarray
    nuisance: np.ndarray
    rank: int
    df: int

    @property
    def q(self) -> int:
        """Rank of the contrast (numerator df of F)."""
        return int(self.interest.shape[1])

    @property
    def n(self) -> int:
        """Number of rows."""
        return int(self.interest.shape[0])


def _as_weights(weights: np.ndarray, p: int) -> np.ndarray:
    L = np.asarray(weights, dtype=np.float64)
    if L.ndim == 1:
        L = L[None, :]
    if L.ndim != 2 or L.shape[1] != p or L.shape[0] < 1:
        raise InputError(
            f"contrast weights of shape (q, {p}) were expected; got {np.shape(weights)} "
            "(in permutation inference); give one weight per design column"
        )
    if not np.all(np.isfinite(L)):
        raise InputError("the contrast weights contain NaN or inf (in permutation inference)")
    return L


def partition(design: np.ndarray, weights: np.ndarray, kind: Kind = "t") -> Partition:
    """Split the column space of the design into interest and nuisance for a contrast.

    Parameters
    ----------
    design : ndarray, shape (n, p)
    weights : ndarray, shape (q, p) or (p,)
        Contrast rows; must be estimable (in the row space of the design).
    kind : {"t", "F"}
        A t contrast must have rank 1.

    Returns
    -------
    Partition

    Raises
    ------
    EstimabilityError
        If a contrast row is not estimable.
    ModelError
        If the contrast is zero, a t contrast has rank > 1, or no residual df remain.
    """
    # Imported here: engine.ols brings scipy.special, which worker processes (that import this module
    # through the kernel to enhance maps) do not need.
    from ..engine.ols import design_matrix

    X = design_matrix(design, " (in permutation inference)")
    L = _as_weights(weights, X.shape[1])
    n, p = X.shape
    U, s, Vt = np.linalg.svd(X, full_matrices=False)
    r = int(np.sum(s > rank_tolerance(X, s)))
    if r == 0:
        raise ModelError("the design is all zeros (in permutation inference); check the design matrix")
    # A rank-deficient design (r < p) is split the same way: everything below lives in its column space.
    Ur, sr, Vr = U[:, :r], s[:r], Vt[:r].T
    bad = ~RowSpace(Vt[:r], r, rank_tolerance(X, s)).contains(L)
    if bad.any():
        raise EstimabilityError(
            f"contrast rows {np.flatnonzero(bad).tolist()} are not estimable in this design: they are "
            "not combinations of the design rows (in permutation inference); restate the hypothesis "
            "in terms of estimable effects"
        )
    df = n - r
    if df < 1:
        raise ModelError(
            f"no residual degrees of freedom: {n} observations for a design of rank {r} "
            "(in permutation inference); use fewer columns or more observations"
        )
    M = (L @ Vr) / sr  # (q0, r): L b = M (U' Y)
    _, sm, Bt = np.linalg.svd(M, full_matrices=True)
    if sm.size == 0 or sm[0] == 0:
        raise ModelError("the contrast is zero (in permutation inference); give nonzero weights")
    q = int(np.sum(sm > sm[0] * _CONTRAST_RANK_RTOL))
    if kind == "t" and q != 1:
        raise ModelError(
            f"a t contrast must be one row; got rank {q} (in permutation inference); use kind 'F'"
        )
    B = Bt.T  # (r, r) orthogonal; first q columns span the rows of M
    interest = Ur @ B[:, :q]
    nuisance = Ur @ B[:, q:]
    if kind == "t":
        # Orient so that interest' Y has the sign of L b = M theta.
        if float(M[0] @ B[:, 0]) < 0:
            interest = -interest
    return Partition(interest=interest, nuisance=nuisance, rank=r, df=df)


def _invariant_basis(n: int, method: str, blocks: np.ndarray | None, whole_blocks: bool) -> np.ndarray | None:
    """Orthonormal basis of the vectors every rearrangement of the kind leaves unchanged."""
    if method != "permute":
        return None  # sign flips leave no nonzero vector unchanged
    if blocks is None:
        return np.full((n, 1), 1 / math.sqrt(n))
    labels = np.unique(blocks)
    if whole_blocks:
        # Vectors that are the same in every block at each within-block position.
        pos = np.empty(n, dtype=np.int64)
        for b in labels:
            rows = np.flatnonzero(blocks == b)
            pos[rows] = np.arange(rows.size)
        ind = (pos[:, None] == np.arange(pos.max() + 1)[None, :]).astype(np.float64)
    else:
        ind = (blocks[:, None] == labels[None, :]).astype(np.float64)
    return ind / np.sqrt(ind.sum(axis=0))


def _moving_nuisance(nuisance: np.ndarray, invariant: np.ndarray | None) -> np.ndarray:
    """The part of the nuisance space that rearrangements can move (drop the invariant part)."""
    if invariant is None or nuisance.shape[1] == 0:
        return nuisance
    A, sv, _ = np.linalg.svd(nuisance.T @ invariant, full_matrices=True)
    # Principal angles of 0 (cosine 1) are directions shared with the invariant space.
    shared = np.zeros(A.shape[1], dtype=bool)
    shared[: sv.size] = sv > 1 - 1e-10
    return nuisance @ A[:, ~shared]


#: Relative size (of sqrt(n)) under which the interest space counts as orthogonal to the constant vector.
MEAN_SHIFT_TOL = 1e-8


def moves_with_mean(part: Partition) -> bool:
    """True when adding a constant to every observation changes the contrast ``L b``.

    ``L b`` changes by ``c M U' 1`` when ``c`` is added to every observation, which is non-zero exactly when
    the constant vector has a component in the interest space: ``||U_i' 1|| > 0`` (to ``MEAN_SHIFT_TOL``
    of ``sqrt(n)``, its largest value).  In a model that contains the grand mean, this is the case when the
    contrast's weights over cell means do not sum to zero: a mean or a combination of means, which row
    permutation cannot move (it leaves the mean of the data unchanged), but sign flips can.  Differences,
    interactions and slopes do not move with the mean: permutation tests them.
    """
    shift = np.linalg.norm(part.interest.sum(axis=0))
    return bool(shift > MEAN_SHIFT_TOL * math.sqrt(part.n))


def _row_classes(rows: np.ndarray) -> np.ndarray:
    """Class per observation: observations whose design-side columns are equal share a class."""
    scale = np.abs(rows).max()
    if scale == 0:
        return np.zeros(rows.shape[1], dtype=np.int64)
    keys = np.round(rows.T / scale, _CLASS_DECIMALS)
    keys[keys == 0] = 0.0  # -0.0 and 0.0 are one class
    _, inverse = np.unique(keys, axis=0, return_inverse=True)
    return inverse.ravel().astype(np.int64)


@dataclass(frozen=True)
class ContrastPlan:
    """Everything the per-chunk computation needs for one contrast; holds no data and pickles.

    Attributes
    ----------
    name, kind, tail : str
    q : int
        Rank of the contrast.
    df : int
        Residual degrees of freedom.
    nuisance : ndarray, shape (n, r - q)
        Basis the data are residualised against.
    rows : ndarray, shape (m, n)
        Design side of one rearrangement: the q interest rows, then the nuisance rows that
        rearrangements move.
    classes : ndarray of int64, shape (n,)
        Observations with equal design-side columns (indistinguishable under permutation).
    method : {"permute", "flip", "both"}
    """

    name: str
    kind: str
    tail: str
    q: int
    df: int
    nuisance: np.ndarray
    rows: np.ndarray
    classes: np.ndarray
    method: str

    @property
    def m(self) -> int:
        """Rows per rearrangement in the stacked product."""
        return int(self.rows.shape[0])


def plan_contrast(
    design: np.ndarray,
    weights: np.ndarray,
    *,
    kind: Kind = "t",
    tail: Tail = "two-sided",
    name: str = "",
    method: Literal["auto", "permute", "flip", "both"] = "auto",
    blocks: np.ndarray | None = None,
    whole_blocks: bool = False,
) -> ContrastPlan:
    """Prepare one contrast for permutation inference (see the module docstring).

    ``method="auto"`` chooses sign flips when the contrast concerns a mean (:func:`moves_with_mean`),
    else permutation.
    """
    if kind not in ("t", "F"):
        raise InputError(f"kind must be 't' or 'F'; got {kind!r} (in {name or 'contrast'})")
    if tail not in ("two-sided", "greater", "less"):
        raise InputError(f"tail must be 'two-sided', 'greater' or 'less'; got {tail!r} (in {name or 'contrast'})")
    if kind == "F" and tail != "two-sided":
        raise InputError(f"an F test is upper-tailed and takes no tail; got {tail!r} (in {name or 'contrast'})")
    part = partition(design, weights, kind)
    n = part.n
    if blocks is not None:
        blocks = np.asarray(blocks)
        if blocks.shape != (n,):
            raise InputError(
                f"one block label per row was expected ({n}); got shape {blocks.shape} (in {name or 'contrast'})"
            )
    if method == "auto":
        method = "flip" if moves_with_mean(part) else "permute"
    if method not in ("permute", "flip", "both"):
        raise InputError(f"method must be 'auto', 'permute', 'flip' or 'both'; got {method!r}")
    moving = _moving_nuisance(part.nuisance, _invariant_basis(n, method, blocks, whole_blocks))
    rows = np.ascontiguousarray(np.hstack([part.interest, moving]).T)
    return ContrastPlan(
        name=name,
        kind=kind,
        tail=tail,
        q=part.q,
        df=part.df,
        nuisance=np.ascontiguousarray(part.nuisance),
        rows=rows,
        classes=_row_classes(rows),
        method=method,
    )


def residualise(plan: ContrastPlan, chunk: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Data residualised against the nuisance, and its sum of squares per voxel.

    Parameters
    ----------
    plan : ContrastPlan
    chunk : ndarray, shape (n, v)

    Returns
    -------
    W : ndarray of float64, shape (n, v), C-contiguous
    ss : ndarray of float64, shape (v,)
        0 for voxels whose residuals are at rounding level (constant data), which then get a NaN
        statistic.
    """
    copied = type(chunk) is not np.ndarray or chunk.dtype != np.float64
    if copied:
        chunk = np.array(chunk, dtype=np.float64, order="C", copy=True)  # read once (a file-backed map, say)
    n, v = chunk.shape
    # The largest |value| per voxel without an |chunk| temporary: max(max, -min) is the same number.
    scale = np.fmax(np.max(chunk, axis=0), -np.min(chunk, axis=0)) if chunk.size else np.zeros(v)
    if plan.nuisance.shape[1]:
        # chunk - fit, written into the fit's array: the same numbers as a copy of the chunk minus the fit
        W = plan.nuisance @ (plan.nuisance.T @ chunk)
        np.subtract(chunk, W, out=W)
    else:
        W = chunk if copied else np.array(chunk, dtype=np.float64, order="C", copy=True)  # the caller's stays as is
    ss = np.einsum("ij,ij->j", W, W)
    # Residuals at rounding level (e.g. a constant voxel against an intercept) are no data: their
    # statistic would be noise, so they are marked (ss = 0 -> NaN statistic), as in groupmodel.ols.
    ss[ss <= (ZERO_SS_FACTOR * n * _EPS * scale) ** 2] = 0.0
    return W, ss


def stack_rows(plan: ContrastPlan, perm: np.ndarray | None, flips: np.ndarray | None) -> np.ndarray:
    """Design side of a batch of B rearrangements, shape (m * B, n).

    For rearrangement b, ``rows`` has column i moved to column ``perm[b, i]`` and multiplied by
    ``flips[b, i]``, so that (those rows) ``@ W`` equals ``rows @ (rearranged W)``.  The stacked
    matrix is row-major over the m design-side rows: row k of every rearrangement (B rows), then row
    k + 1 of every rearrangement, and so on, so that the product reshaped to (m, B, v) gives each
    design-side row as one contiguous (B, v) block and sums over rows are additions of blocks.
    """
    m, n = plan.rows.shape
    ref = perm if perm is not None else flips
    B = ref.shape[0]
    values = np.broadcast_to(plan.rows[:, None, :], (m, B, n))
    if flips is not None:
        values = values * flips[None, :, :]
    if perm is None:
        out = np.ascontiguousarray(values)
    else:
        out = np.empty((m, B, n))
        np.put_along_axis(out, np.broadcast_to(perm[None, :, :].astype(np.intp), (m, B, n)), values, axis=2)
    return out.reshape(m * B, n)
