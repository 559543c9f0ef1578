"""Permutation inference for the general linear model, voxel- or vertex-wise.

Array-level code: it knows nothing about files or specs.  Given a design ``X`` (n, p), a contrast
``L`` (q, p) and data ``Y`` (n, V) (an array or a numpy memmap, read in chunks of voxels), it
returns for the contrast the observed statistic, the uncorrected permutation p, the voxel-wise FWE p
from the maximum statistic (Nichols and Holmes 2002), and optionally TFCE (Smith and Nichols 2009)
and cluster-extent FWE p values, with the null distributions of the maxima.

Freedman-Lane (Freedman and Lane 1983; Winkler et al. 2014, NeuroImage 92:381-397)
------------------------------------------------------------------------------------
The design is partitioned, for each contrast, into effects of interest and nuisance.  Numerically:
``X = U S V'`` (economy SVD, rank r); the contrast in the coordinates ``theta = U'Y`` is
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
distinct permutations (:mod:`groupmodel.permutation`).  Without moving nuisance rows this is the
usual rule of identical rows of the interest part (two groups of 5 and 6: 462); with them, swaps
that change the nuisance fit are rightly counted as distinct.

Speed: permuting the data rows is the same as permuting the design rows, so for a batch of B
rearrangements the design side is stacked into one (B m, n) matrix and multiplied with the chunk
``W`` (n, v) in one product, in tiles of voxels that keep the result in a core's cache.  The data
are scaled to ``||W|| = 1`` per voxel once (statistics do not change), and the loop compares and
maximises a cheap increasing function of the statistic (see ``_tile``), converting only what it
keeps.  Each chunk is split into one contiguous part per thread; every thread does its own products
(with BLAS held to one thread) and the element-wise work after them, so that work, which BLAS's own
threads would leave to a single core, runs on all of them.
Voxels whose residuals are at rounding level (constant data) get NaN statistics and p values.

Statistics used for inference ("oriented" statistics): ``|t|`` for two-sided t tests (so the
maximum statistic and the uncorrected p are two-sided), ``t`` for "greater", ``-t`` for "less", and
``F`` (always upper-tailed).  p values are ``(number of rearrangements, identity included, whose
statistic is >= the observed one) / J``, never below 1/J; "at least as large" allows a relative
tolerance of 100 machine epsilons (of the working statistic), the convention of
``scipy.stats.permutation_test``, so that rearrangements equal to the observed one in exact
arithmetic are counted.

TFCE and cluster extent need whole maps: for each batch the statistic maps of all chunks are
assembled before enhancing (optionally in worker processes, ``n_jobs``).  TFCE is applied to the t
(or F) map; for "less" to -t (reported with a negative sign).  TFCE of a two-sided t map enhances
the positive and negative parts separately and keeps the sign; its null statistic is
``max |TFCE|``.  The step dh is fixed once, from the observed map (default: its largest enhanced
value / 100), and used for every rearrangement, so that all maps are enhanced by one function.
Cluster-extent inference uses a cluster-forming threshold given as a z value, applied to the
statistic with the same p
(:func:`groupmodel.clusters.stat_threshold`); the null statistic is the largest cluster size.

Reproducibility: the rearrangements depend only on (n, blocks, method, J, seed); each chunk's
statistics are a pure function of (design, contrast, rearrangements, chunk of data)
(:func:`chunk_statistics`), so results do not depend on the chunk size, on ``threads``, on
``n_jobs`` or on the order chunks are processed, apart from the last bits that a BLAS product may
change with its shape (counts and p values are unaffected thanks to the tolerance above).
"""

from __future__ import annotations

import math
import multiprocessing
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from contextlib import AbstractContextManager, contextmanager, nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np

from ..engine.ols import design_matrix
from ..errors import EstimabilityError, InputError, ModelError
from .clusters import Clusters, label_clusters, max_cluster_size, stat_threshold
from .rearrangements import Method, PermutationSet, default_method, permutation_set
from .tfce import Adjacency, TfceParams, tfce

__all__ = [
    "ContrastPlan",
    "MapWorkers",
    "whole_map_batch",
    "Partition",
    "PermutationResult",
    "chunk_statistics",
    "partition",
    "plan_contrast",
    "run_permutations",
    "run_tests",
    "shared_workers",
]

Tail = Literal["two-sided", "greater", "less"]
Kind = Literal["t", "F"]

_EPS = float(np.finfo(np.float64).eps)
#: Relative tolerance of "at least as large as the observed statistic" (scipy.stats.permutation_test).
TIE_RTOL = 100 * _EPS
#: Relative tolerance of the estimability check, as in :mod:`groupmodel.ols`.
ESTIMABILITY_RTOL = 1e-8
#: Singular values of the contrast in design coordinates below this fraction of the largest are 0.
_CONTRAST_RANK_RTOL = 1e-10
#: Interest rows equal to this relative precision are the same class (indistinguishable).
_CLASS_DECIMALS = 8
#: Residual sums of squares at or below ``(this * n * eps * max|y|)^2`` count as zero (constant data).
ZERO_SS_FACTOR = 16.0
#: The permutation loop multiplies tiles of voxels whose (B m, tile) product holds about this
#: many float64 values (1 MiB, a core's L2 cache here), so that the passes over it stay in cache.
_TILE_VALUES = 2**17


def tile_width(rows: int) -> int:
    """Voxels per product for a stacked design side of ``rows`` rows (128 to 4096)."""
    return int(min(4096, max(128, _TILE_VALUES // max(rows, 1))))


def cpu_quota(cgroup_root: str = "/sys/fs/cgroup") -> float | None:
    """CPUs' worth of time the control group allows (a container's or batch job's quota), or None.

    Reads cgroup v2 ``cpu.max`` ("max 100000" or "200000 100000") or cgroup v1
    ``cpu/cpu.cfs_quota_us`` and ``cpu.cfs_period_us`` (quota -1: none).
    """
    root = Path(cgroup_root)
    try:
        if (root / "cpu.max").exists():
            quota, period = (root / "cpu.max").read_text().split()[:2]
            return None if quota == "max" else int(quota) / int(period)
        v1 = root / "cpu"
        if (v1 / "cpu.cfs_quota_us").exists():
            quota_us = int((v1 / "cpu.cfs_quota_us").read_text())
            period_us = int((v1 / "cpu.cfs_period_us").read_text())
            return None if quota_us <= 0 or period_us <= 0 else quota_us / period_us
    except (OSError, ValueError):
        return None
    return None


def available_cores() -> int:
    """Cores this process may use: its CPU affinity, capped by a control-group CPU quota if any.

    On a shared node a container or batch job often sees every core but may use only a few; running
    more threads than that only adds contention.
    """
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    quota = cpu_quota()
    if quota is not None:
        cores = min(cores, math.ceil(quota))
    return max(1, cores)


@contextmanager
def single_threaded_blas() -> Iterator[None]:
    """Limit BLAS to one thread while the block runs (threads of our own share the cores instead).

    The permutation loop runs one thread per core, each doing its own products and the element-wise
    work after them; a multi-threaded BLAS inside each would oversubscribe the cores.  The limit is
    process-wide (BLAS has no per-thread setting) and is restored on exit.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


# --------------------------------------------------------------------------------------------
# Partition of the design
# --------------------------------------------------------------------------------------------


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
    X = design_matrix(design, " (in permutation inference)")
    L = _as_weights(weights, X.shape[1])
    n, p = X.shape
    U, s, Vt = np.linalg.svd(X, full_matrices=False)
    tol = s.max() * max(n, p) * _EPS if s.size else 0.0
    r = int(np.sum(s > tol))
    if r == 0:
        raise ModelError("the design is all zeros (in permutation inference); check the design matrix")
    Ur, sr, Vr = U[:, :r], s[:r], Vt[:r].T
    resid = L - (L @ Vr) @ Vr.T
    bad = np.linalg.norm(resid, axis=1) > ESTIMABILITY_RTOL * np.maximum(np.linalg.norm(L, axis=1), 1e-300)
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

    ``method="auto"`` chooses sign flips when the interest part is the same on every row (the
    one-sample case), else permutation.
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
        method = default_method(_row_classes(part.interest.T))
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


# --------------------------------------------------------------------------------------------
# The per-chunk computation (pure)
# --------------------------------------------------------------------------------------------


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
    W = np.array(chunk, dtype=np.float64, order="C", copy=True)
    n = W.shape[0]
    with np.errstate(invalid="ignore"):
        scale = np.abs(W).max(axis=0) if W.size else np.zeros(W.shape[1])
    if plan.nuisance.shape[1]:
        W -= plan.nuisance @ (plan.nuisance.T @ W)
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


class _Buffers:
    """Reusable work arrays for the tiles of one batch (avoids allocating per tile)."""

    def __init__(self, rows: int, B: int, tile: int) -> None:
        self.rows, self.B, self.tile = rows, B, tile
        self._g = np.empty(rows * tile)
        self._s = np.empty(B * tile)
        self._t = np.empty(B * tile)
        self._i = np.empty(B * tile)
        self._f = np.empty(B * tile, dtype=bool)
        self._views: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = {}

    def views(self, w: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Contiguous (rows, w), (B, w), (B, w), (B, w) float views for a tile of width w."""
        return self._all(w)[:4]

    def flags(self, w: int) -> np.ndarray:
        """A (B, w) boolean view."""
        return self._all(w)[4]

    def _all(self, w: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        # Made once per width: almost every tile has the same width, and views cost Python time.
        got = self._views.get(w)
        if got is None:
            B = self.B
            got = self._views[w] = (
                self._g[: self.rows * w].reshape(self.rows, w),
                self._s[: B * w].reshape(B, w),
                self._t[: B * w].reshape(B, w),
                self._i[: B * w].reshape(B, w),
                self._f[: B * w].reshape(B, w),
            )
        return got


# The permutation loop compares and maximises an oriented "working statistic" o, an increasing
# function of the oriented t or F that is cheaper to form, and converts to t or F only what it keeps
# (maps, maxima, the observed map).  The residualised data are scaled to ||W|| = 1 per voxel; with
# g the stacked products, a = ||g_interest||^2 and z = ||g_nuisance||^2 (so RSS = 1 - z - a):
#
# * one design-side row (m = 1, e.g. two groups with an intercept, or a one-sample test):
#   u = g (the correlation of the rearranged data with the interest direction),
#   t = sqrt(df) u / sqrt(1 - u^2), F = t^2; o = |u| (two-sided t, F), u ("greater"), -u ("less");
# * m > 1: the partial R^2 of the interest part, r = a / (1 - z) = s / (1 + s) with s = a / RSS
#   (= t^2 / df, or q F / df), so t^2 = df r / (1 - r) and F = df / q * r / (1 - r); for t,
#   o = r (two-sided) or +-r with the sign of g_0 (one-sided).  r needs no subtraction of a.


def _tile(
    plan: ContrastPlan,
    A: np.ndarray,
    W: np.ndarray,
    buffers: _Buffers,
    bad: np.ndarray,
    stats_out: np.ndarray | None = None,
) -> np.ndarray:
    """Oriented working statistic of every rearrangement of a batch, for one tile of voxels.

    Parameters
    ----------
    A : ndarray, shape (m B, n)
        Stacked design side of the batch (:func:`stack_rows`).
    W : ndarray, shape (n, w)
        Residualised data of the tile, scaled to unit sum of squares per voxel (:func:`_unit_columns`).
    bad : ndarray of int
        Positions (in the tile) of voxels without data: working statistic -inf, statistic NaN.
    stats_out : ndarray, shape (B, w) or (1, w), optional
        Receives t or F (signed) of the first rows of the batch.

    Returns
    -------
    ndarray, shape (B, w)
        A view into ``buffers`` (overwritten by the next call).
    """
    m, q, df, kind, tail = plan.m, plan.q, plan.df, plan.kind, plan.tail
    w = W.shape[1]
    B = A.shape[0] // m
    G, out, tmp, interest = buffers.views(w)
    with np.errstate(invalid="ignore", divide="ignore"):
        if m == 1:
            np.matmul(A, W, out=out)  # u, since ||W|| = 1
            if stats_out is not None:
                u = out[: stats_out.shape[0]]
                one_minus = np.maximum(1.0 - np.square(u), 0.0)
                if kind == "t":
                    np.divide(math.sqrt(df) * u, np.sqrt(one_minus), out=stats_out)
                else:
                    np.divide(df * np.square(u), one_minus, out=stats_out)
            if kind == "F" or tail == "two-sided":
                np.abs(out, out=out)
            elif tail == "less":
                np.negative(out, out=out)
        else:
            np.matmul(A, W, out=G)
            rows = G.reshape(m, B, w)  # rows[k]: design-side row k of every rearrangement
            g0 = rows[0]  # first interest row, signed (the t numerator)
            np.multiply(g0, g0, out=interest)
            if q > 1:
                np.square(rows[1:q], out=rows[1:q])
                for k in range(1, q):
                    np.add(interest, rows[k], out=interest)
            if m > q:
                np.square(rows[q:], out=rows[q:])
                np.subtract(1.0, rows[q], out=tmp)
                for k in range(q + 1, m):
                    np.subtract(tmp, rows[k], out=tmp)  # 1 - z = a + RSS
            else:
                tmp.fill(1.0)
            if stats_out is not None:
                k = stats_out.shape[0]
                rss = np.maximum(tmp[:k] - interest[:k], 0.0)
                if kind == "t":
                    np.divide(g0[:k], np.sqrt(rss * (1.0 / df)), out=stats_out)
                else:
                    np.divide(interest[:k] * (df / q), rss, out=stats_out)
            if kind == "t" and tail != "two-sided":
                np.copysign(interest, g0, out=interest)
                if tail == "less":
                    np.negative(interest, out=interest)
            np.divide(interest, tmp, out=out)
    if bad.size:
        out[:, bad] = -np.inf
        if stats_out is not None:
            stats_out[:, bad] = np.nan
    return out


def _oriented_stat(plan: ContrastPlan, o: np.ndarray) -> np.ndarray:
    """Oriented t (|t|, t or -t) or F from the oriented working statistic."""
    df = plan.df
    o = np.asarray(o, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        if plan.m == 1:
            one_minus = np.maximum(1.0 - np.square(o), 0.0)
            if plan.kind == "t":
                return math.sqrt(df) * o / np.sqrt(one_minus)
            return df * np.square(o) / one_minus
        r = np.abs(o)
        ratio = r / np.maximum(1.0 - r, 0.0)  # a / RSS
        if plan.kind == "t":
            return np.sign(o) * np.sqrt(df * ratio)
        return ratio * (df / plan.q)


def _unit_columns(plan: ContrastPlan, chunk: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residualised data scaled to unit sum of squares per voxel, and the voxels without data.

    Statistics do not change when a voxel's data are scaled, and with ``||W|| = 1`` the products
    are directly ``u`` (m = 1) and RSS is ``1 - ||g||^2``.  Voxels without data get zeros.
    """
    W, ss = residualise(plan, chunk)
    valid = ss > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(valid, 1.0 / np.sqrt(np.where(valid, ss, 1.0)), 0.0)
    W *= scale
    W[:, ~valid] = 0.0  # also clears NaN
    return W, np.flatnonzero(~valid)


def chunk_statistics(
    plan: ContrastPlan,
    perm: np.ndarray | None,
    flips: np.ndarray | None,
    chunk: np.ndarray,
) -> np.ndarray:
    """t or F of every rearrangement in a batch, for one chunk of data (a pure function).

    Parameters
    ----------
    plan : ContrastPlan
    perm : ndarray of int, shape (B, n), or None
    flips : ndarray of int8, shape (B, n), or None
    chunk : ndarray, shape (n, v)

    Returns
    -------
    ndarray of float64, shape (B, v)
        Row 0 is the parametric statistic when the batch starts with the identity.
    """
    W, bad = _unit_columns(plan, chunk)
    A = stack_rows(plan, perm, flips)
    B = A.shape[0] // plan.m
    tile = tile_width(A.shape[0])
    buffers = _Buffers(A.shape[0], B, tile)
    out = np.empty((B, W.shape[1]))
    for s in range(0, W.shape[1], tile):
        e = min(W.shape[1], s + tile)
        tile_bad = bad[(bad >= s) & (bad < e)] - s
        _tile(plan, A, W[:, s:e], buffers, tile_bad, stats_out=out[:, s:e])
    return out


# --------------------------------------------------------------------------------------------
# Whole-map nulls (TFCE, cluster extent), optionally in worker processes
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _MapSpec:
    """How to turn one statistic map into its TFCE and cluster null statistics."""

    kind: str
    tail: str
    tfce: TfceParams | None  # with dh fixed
    cluster_threshold: float | None


def _enhance_input(stat: np.ndarray, spec: _MapSpec) -> tuple[np.ndarray, bool]:
    """The map TFCE and clusters work on, and whether it is two-sided."""
    if spec.kind == "t" and spec.tail == "less":
        return -stat, False
    return stat, spec.kind == "t" and spec.tail == "two-sided"


def _map_nulls(maps: np.ndarray, spec: _MapSpec, adjacency: Adjacency) -> tuple[np.ndarray, np.ndarray]:
    """Max |TFCE| and largest cluster size of each map (NaN where not requested)."""
    B = maps.shape[0]
    tmax = np.full(B, np.nan)
    cmax = np.full(B, np.nan)
    for b in range(B):
        x, two = _enhance_input(maps[b], spec)
        if spec.tfce is not None:
            p = spec.tfce
            t = tfce(x, adjacency, p.dh, p.E, p.H, p.rule, two_sided=two)
            tmax[b] = np.abs(t).max() if t.size else 0.0
        if spec.cluster_threshold is not None:
            cmax[b] = max_cluster_size(x, spec.cluster_threshold, adjacency, two_sided=two)
    return tmax, cmax


_WORKER: dict[str, Any] = {}


def _worker_init(adjacency: Adjacency) -> None:
    _WORKER["adjacency"] = adjacency


def _worker_nulls(maps: np.ndarray, spec: _MapSpec) -> tuple[np.ndarray, np.ndarray]:
    return _map_nulls(maps, spec, _WORKER["adjacency"])


class MapWorkers:
    """Worker processes that compute the TFCE and cluster nulls of whole maps on one adjacency.

    Starting a worker costs about a second (a fresh interpreter importing numpy and scipy), so one
    set of workers serves every contrast of a fit: pass it to :func:`run_permutations` as
    ``workers``.  Use as a context manager, or call :meth:`close`.

    Parameters
    ----------
    n_jobs : int
        Worker processes (>= 2; with 1 the nulls are computed in the calling process instead).
    adjacency : Adjacency
        Neighbourhood of the elements, shipped to each worker once.
    """

    def __init__(self, n_jobs: int, adjacency: Adjacency) -> None:
        if n_jobs < 2:
            raise InputError(f"worker processes are for n_jobs >= 2; got {n_jobs} (in MapWorkers)")
        self.n_jobs, self.adjacency = int(n_jobs), adjacency
        if "grid" not in adjacency._cache:  # build the tables once, ship them with the adjacency
            adjacency.neighbour_table()
            adjacency.neighbour_chain()
        self.pool = ProcessPoolExecutor(
            max_workers=self.n_jobs,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=_worker_init,
            initargs=(adjacency,),
        )

    def submit(self, maps: np.ndarray, spec: _MapSpec) -> Future:
        return self.pool.submit(_worker_nulls, maps, spec)

    def close(self, cancel: bool = False) -> None:
        self.pool.shutdown(wait=True, cancel_futures=cancel)

    def __enter__(self) -> MapWorkers:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close(cancel=exc[0] is not None)


def shared_workers(
    n_jobs: int, adjacency: Adjacency | None, whole_maps: bool
) -> AbstractContextManager[MapWorkers | None]:
    """Worker processes for several contrasts as a context manager, or ``None`` when none are needed
    (one job, no adjacency, or neither TFCE nor clusters asked for)."""
    if n_jobs > 1 and adjacency is not None and whole_maps:
        return MapWorkers(n_jobs, adjacency)
    return nullcontext()


class _NullRunner:
    """Runs :func:`_map_nulls` inline or on worker processes; results come back in order."""

    def __init__(self, n_jobs: int, adjacency: Adjacency, spec: _MapSpec, workers: MapWorkers | None) -> None:
        self.adjacency, self.spec = adjacency, spec
        self.pending: list[tuple[int, Future]] = []
        self.owned = workers is None and n_jobs > 1
        self.workers = MapWorkers(n_jobs, adjacency) if self.owned else workers
        self.n_jobs = self.workers.n_jobs if self.workers is not None else 1

    def submit(self, start: int, maps: np.ndarray, sink: Callable[[int, np.ndarray, np.ndarray], None]) -> None:
        if self.workers is None:
            tmax, cmax = _map_nulls(maps, self.spec, self.adjacency)
            sink(start, tmax, cmax)
            return
        size = math.ceil(maps.shape[0] / self.n_jobs)
        for s in range(0, maps.shape[0], size):
            self.pending.append((start + s, self.workers.submit(maps[s : s + size].copy(), self.spec)))
        # Bound the memory held by maps in flight (see whole_map_batch).
        while len(self.pending) > 2 * self.n_jobs:
            self._collect_one(sink)

    def _collect_one(self, sink: Callable[[int, np.ndarray, np.ndarray], None]) -> None:
        start, fut = self.pending.pop(0)
        tmax, cmax = fut.result()
        sink(start, tmax, cmax)

    def finish(self, sink: Callable[[int, np.ndarray, np.ndarray], None]) -> None:
        while self.pending:
            self._collect_one(sink)
        if self.owned and self.workers is not None:
            self.workers.close()

    def abort(self) -> None:
        for _, fut in self.pending:
            fut.cancel()
        self.pending.clear()
        if self.owned and self.workers is not None:
            self.workers.close(cancel=True)


# --------------------------------------------------------------------------------------------
# Driver
# --------------------------------------------------------------------------------------------


@dataclass
class PermutationResult:
    """Permutation inference for one contrast; maps have one value per voxel or vertex (V).

    Attributes
    ----------
    name, kind, tail : str
    df : int
        Residual degrees of freedom; ``q`` the numerator df of F.
    q : int
    stat : ndarray, shape (V,)
        Observed t or F (the identity rearrangement; equals the parametric statistic).
    p_perm : ndarray, shape (V,)
        Uncorrected permutation p of the oriented statistic (|t| two-sided, t, -t, or F).
    p_fwe : ndarray, shape (V,)
        Voxel-wise FWE p from the maximum oriented statistic over all elements.
    max_null : ndarray, shape (J,)
        Maximum oriented statistic of each rearrangement (identity first).
    n_perm : int
        J, the rearrangements used (identity included).
    exhaustive : bool
    method : str
    seed : int or None
    n_possible : int
        Distinct rearrangements that exist.
    tfce, p_tfce_fwe : ndarray, shape (V,), or None
        TFCE of the observed map (sign kept) and its FWE p from the maximum |TFCE|; NaN where the
        statistic is NaN (such elements count as 0 when enhancing).
    tfce_max_null : ndarray, shape (J,), or None
    tfce_params : TfceParams or None
        E, H, rule and the step dh used.
    cluster_z, cluster_threshold : float or None
        Cluster-forming threshold as z, and in units of the statistic.
    clusters : Clusters or None
        Observed clusters.
    cluster_p_fwe : ndarray, shape (C,), or None
        FWE p of each observed cluster (by size).
    p_cluster_fwe : ndarray, shape (V,), or None
        The FWE p of each element's cluster; 1 outside clusters.
    cluster_max_null : ndarray, shape (J,), or None
        Largest cluster size of each rearrangement.
    """

    name: str
    kind: str
    tail: str
    df: int
    q: int
    stat: np.ndarray
    p_perm: np.ndarray
    p_fwe: np.ndarray
    max_null: np.ndarray
    n_perm: int
    exhaustive: bool
    method: str
    seed: int | None
    n_possible: int
    tfce: np.ndarray | None = None
    p_tfce_fwe: np.ndarray | None = None
    tfce_max_null: np.ndarray | None = None
    tfce_params: TfceParams | None = None
    cluster_z: float | None = None
    cluster_threshold: float | None = None
    clusters: Clusters | None = None
    cluster_p_fwe: np.ndarray | None = None
    p_cluster_fwe: np.ndarray | None = None
    cluster_max_null: np.ndarray | None = None


def _orient(stat: np.ndarray, kind: str, tail: str, out: np.ndarray | None = None) -> np.ndarray:
    if kind == "t" and tail == "two-sided":
        return np.abs(stat, out=out)
    if kind == "t" and tail == "less":
        return np.negative(stat, out=out)
    if out is None:
        return stat
    np.copyto(out, stat)
    return out


def _at_least(observed: np.ndarray) -> np.ndarray:
    """Threshold for "statistic >= observed" with the relative tie tolerance."""
    with np.errstate(invalid="ignore"):
        gamma = np.where(np.isfinite(observed), TIE_RTOL * np.abs(observed), 0.0)
    return observed - gamma


def _fwe_p(observed: np.ndarray, maxima: np.ndarray) -> np.ndarray:
    """Fraction of maxima >= each observed value (tolerant), NaN where observed is NaN."""
    ordered = np.sort(maxima[~np.isnan(maxima)])
    J = maxima.size
    thr = _at_least(observed)
    count = ordered.size - np.searchsorted(ordered, thr, side="left")
    p = count / J
    return np.where(np.isnan(observed), np.nan, p)


#: Rearrangements stacked into one matrix product by default; larger batches gain nothing measurable.
BATCH_SIZE = 100
#: Copies of a batch of whole statistic maps alive at once with worker processes: the batch being
#: filled, two batches submitted and waiting, and about one more in pickled transit and in the workers.
_MAP_COPIES_WITH_WORKERS = 5


def whole_map_batch(n_elements: int, budget_bytes: int, n_jobs: int, largest: int = BATCH_SIZE) -> int:
    """Rearrangements per batch so that the whole maps TFCE and clusters need fit in a memory budget.

    Parameters
    ----------
    n_elements : int
        Voxels or vertices per map (V).
    budget_bytes : int
        Memory for the float64 maps of the batches alive at once (one copy inline, about five with
        worker processes: :data:`_MAP_COPIES_WITH_WORKERS`).
    n_jobs : int
        Worker processes (1: inline).
    largest : int
        Upper limit (default :data:`BATCH_SIZE`).

    Returns
    -------
    int
        Between 8 and ``largest``; at 8 the budget may be exceeded for very large maps.
    """
    copies = 1 if n_jobs <= 1 else _MAP_COPIES_WITH_WORKERS
    return int(max(8, min(largest, budget_bytes // max(copies * n_elements * 8, 1))))


def _chunks(V: int, chunk_size: int | None) -> list[tuple[int, int]]:
    size = V if not chunk_size or chunk_size >= V else int(chunk_size)
    if size < 1:
        raise InputError(f"chunk_size must be >= 1; got {chunk_size} (in run_permutations)")
    return [(s, min(V, s + size)) for s in range(0, V, size)]


def _parts(start: int, stop: int, threads: int, tile: int) -> list[tuple[int, int]]:
    """Split a chunk into at most ``threads`` contiguous parts of whole tiles, one per thread."""
    n_tiles = -(-(stop - start) // tile)
    per = max(1, -(-n_tiles // threads)) * tile
    return [(s, min(stop, s + per)) for s in range(start, stop, per)]


def run_permutations(
    design: np.ndarray,
    weights: np.ndarray,
    data: np.ndarray,
    *,
    kind: Kind = "t",
    tail: Tail = "two-sided",
    name: str = "",
    n_perm: int = 5000,
    method: Literal["auto", "permute", "flip", "both"] = "auto",
    blocks: np.ndarray | None = None,
    whole_blocks: bool = False,
    seed: int = 0,
    chunk_size: int | None = None,
    batch_size: int = BATCH_SIZE,
    adjacency: Adjacency | None = None,
    tfce_params: TfceParams | None = None,
    cluster_z: float | None = None,
    n_jobs: int = 1,
    threads: int | None = None,
    workers: MapWorkers | None = None,
    cache_bytes: int = 1 << 30,
    progress: Callable[[int, int], None] | None = None,
) -> PermutationResult:
    """Freedman-Lane permutation inference for one contrast (see the module docstring).

    Parameters
    ----------
    design : ndarray, shape (n, p)
    weights : ndarray, shape (q, p) or (p,)
        Estimable contrast rows.
    data : ndarray or numpy.memmap, shape (n, V)
        One row per observation, one column per voxel/vertex (in-mask elements only).
    kind : {"t", "F"}
    tail : {"two-sided", "greater", "less"}
        For t; the oriented statistic is |t|, t or -t.
    name : str
    n_perm : int
        J, rearrangements including the identity (all distinct ones if fewer exist).
    method : {"auto", "permute", "flip", "both"}
        "auto": sign flips if the interest part is constant over rows, else permutation.
    blocks : ndarray of int, shape (n,), optional
        Exchangeability blocks; rows are permuted within blocks, or whole blocks are permuted
        with ``whole_blocks=True``.
    seed : int
        Seed of ``numpy.random.default_rng`` for the random rearrangements.
    chunk_size : int, optional
        Voxels read and processed at a time (default: all).  Results do not depend on it.
    batch_size : int
        Rearrangements stacked into one matrix product (about 100 is efficient).
    adjacency : Adjacency, optional
        Neighbourhood graph over the V elements; needed for TFCE and clusters.
    tfce_params : TfceParams, optional
        Compute TFCE and its FWE p with these settings (dh None: max oriented observed / 100).
    cluster_z : float, optional
        Compute cluster-extent FWE p at this cluster-forming z.
    n_jobs : int
        Worker processes for the TFCE / cluster nulls (results do not depend on it).
    threads : int, optional
        Threads for the stacked products and the element-wise work after them (default: the cores
        this process may use).  Each thread takes its own contiguous part of every chunk and BLAS is
        limited to one thread meanwhile (:func:`single_threaded_blas`).  Results do not depend on it.
    workers : MapWorkers, optional
        Worker processes to use for the TFCE / cluster nulls instead of starting ``n_jobs`` new
        ones (share one set between contrasts); they must have been started on ``adjacency``.
    cache_bytes : int
        Keep the residualised data in memory between batches when it fits in this many bytes.
    progress : callable(done, total), optional
        Called after each batch with the number of rearrangements done.

    Returns
    -------
    PermutationResult
    """
    X = design_matrix(design, " (in permutation inference)")
    n = X.shape[0]
    data_shape = getattr(data, "shape", None)
    if data_shape is None or len(data_shape) != 2 or data_shape[0] != n:
        raise InputError(
            f"data of shape ({n}, V) were expected (one row per design row); got {data_shape} "
            f"(in {name or 'run_permutations'}); pass observations as rows"
        )
    V = int(data_shape[1])
    if batch_size < 1:
        raise InputError(f"batch_size must be >= 1; got {batch_size} (in run_permutations)")
    if (tfce_params is not None or cluster_z is not None) and adjacency is None:
        raise InputError(
            "TFCE and cluster inference need the neighbourhood of the elements; got no adjacency "
            f"(in {name or 'run_permutations'}); pass grid_adjacency(mask) or mesh_adjacency(faces)"
        )
    if workers is not None and workers.adjacency is not adjacency:
        raise InputError(
            f"the worker processes were started on another adjacency (in {name or 'run_permutations'}); "
            "start MapWorkers with the adjacency passed here"
        )
    if adjacency is not None and adjacency.n != V:
        raise InputError(
            f"the adjacency has {adjacency.n} elements but the data have {V} columns "
            f"(in {name or 'run_permutations'}); build the adjacency from the same mask"
        )
    plan = plan_contrast(
        X, weights, kind=kind, tail=tail, name=name, method=method, blocks=blocks, whole_blocks=whole_blocks
    )
    pset = permutation_set(
        n, n_perm, plan.method, blocks=blocks, whole_blocks=whole_blocks, seed=seed, classes=plan.classes
    )
    J = pset.size
    chunks = _chunks(V, chunk_size)
    need_maps = tfce_params is not None or cluster_z is not None
    cache_ok = isinstance(data, np.ndarray) and not isinstance(data, np.memmap) and n * V * 8 <= cache_bytes
    cache: dict[int, tuple[np.ndarray, np.ndarray]] = {}  # chunk start -> (unit-scaled W, bad voxels)

    stat = np.full(V, np.nan)
    threshold = np.full(V, np.nan)
    count = np.zeros(V, dtype=np.int64)
    max_null = np.full(J, -np.inf)
    tfce_max = np.full(J, np.nan)
    clus_max = np.full(J, np.nan)
    runner: _NullRunner | None = None
    spec: _MapSpec | None = None
    obs_tfce: np.ndarray | None = None
    obs_clusters: Clusters | None = None
    c_thr: float | None = None
    params: TfceParams | None = None

    maps_buffer: np.ndarray | None = None
    work_obs = np.full(V, np.nan)  # observed working statistic, oriented
    # Per-batch counts fit in a small integer type, which keeps the reduction free of casts.
    count_type = np.uint8 if batch_size < 256 else np.uint16 if batch_size < 65536 else np.int64
    n_threads = available_cores() if threads is None else int(threads)
    if n_threads < 1:
        raise InputError(f"threads must be >= 1; got {threads} (in run_permutations)")
    # The tile width and the parts each thread takes are fixed for the run (not per batch), so that
    # the cached residualised parts are reused by every batch.
    tile = tile_width(plan.m * min(batch_size, J))
    parts = [_parts(s, e, n_threads, tile) for s, e in chunks]
    n_slots = max((len(p) for p in parts), default=1)
    slots: list[_Buffers | None] = [None] * n_slots

    def scan(slot: int, s: int, e: int, A: np.ndarray, b0: int, maps: np.ndarray | None) -> np.ndarray:
        """Working statistics of one batch on voxels [s, e): counts, observed map, maps; row maxima."""
        if s in cache:
            W, bad = cache[s]
        else:
            W, bad = _unit_columns(plan, data[:, s:e])
            if cache_ok:
                cache[s] = (W, bad)
        B = A.shape[0] // plan.m
        buffers = slots[slot]
        if buffers is None or buffers.rows != A.shape[0]:
            buffers = slots[slot] = _Buffers(A.shape[0], B, tile)
        tile_maxima = []
        for ts in range(0, e - s, tile):
            te = min(e - s, ts + tile)
            gs, ge = s + ts, s + te
            tile_bad = bad[(bad >= ts) & (bad < te)] - ts if bad.size else bad
            if maps is not None:
                stats_out = maps[:, gs:ge]
            elif b0 == 0:
                stats_out = stat[None, gs:ge]
            else:
                stats_out = None
            o = _tile(plan, A, W[:, ts:te], buffers, tile_bad, stats_out)
            if b0 == 0:
                if maps is not None:
                    stat[gs:ge] = maps[0, gs:ge]
                work_obs[gs:ge] = o[0]
                work_obs[gs + tile_bad] = np.nan
                threshold[gs:ge] = _at_least(work_obs[gs:ge])
            hit = buffers.flags(te - ts)
            with np.errstate(invalid="ignore"):  # NaN thresholds (no data) compare False
                np.greater_equal(o, threshold[gs:ge], out=hit)
            count[gs:ge] += np.add.reduce(hit.view(np.uint8), axis=0, dtype=count_type)
            if o.shape[1]:
                tile_maxima.append(np.fmax.reduce(o, axis=1))
        if not tile_maxima:
            return np.full(B, -np.inf)
        return np.fmax.reduce(np.stack(tile_maxima), axis=0)

    def sink(start: int, tm: np.ndarray, cm: np.ndarray) -> None:
        tfce_max[start : start + tm.size] = tm
        clus_max[start : start + cm.size] = cm

    pool = ThreadPoolExecutor(n_threads, thread_name_prefix="groupmodel-perm") if n_threads > 1 else None
    try:
        with single_threaded_blas():
            for b0 in range(0, J, batch_size):
                b1 = min(J, b0 + batch_size)
                B = b1 - b0
                perm, flips = pset.batch(b0, b1)
                A = stack_rows(plan, perm, flips)
                if need_maps:
                    if maps_buffer is None:
                        maps_buffer = np.empty((min(batch_size, J), V))
                    maps = maps_buffer[:B]  # reused: a fresh (B, V) array per batch costs page faults
                else:
                    maps = None
                for chunk_parts in parts:
                    # Each thread writes only its own voxels; the row maxima are combined here (the
                    # maximum does not depend on the order, so neither do the results).
                    if pool is None:
                        maxima = [scan(k, s, e, A, b0, maps) for k, (s, e) in enumerate(chunk_parts)]
                    else:
                        futures = [pool.submit(scan, k, s, e, A, b0, maps) for k, (s, e) in enumerate(chunk_parts)]
                        maxima = [f.result() for f in futures]
                    for row_max in maxima:
                        np.fmax(max_null[b0:b1], row_max, out=max_null[b0:b1])
                if maps is not None:
                    if runner is None:
                        # The observed map fixes the TFCE step and the cluster threshold (in stat units).
                        observed = _orient(maps[0].copy(), kind, tail)
                        if tfce_params is not None:
                            dh = tfce_params.dh
                            if dh is None:
                                top = np.nanmax(observed) if np.any(np.isfinite(observed)) else np.nan
                                dh = top / 100 if np.isfinite(top) and top > 0 else 0.1
                            params = tfce_params.with_dh(dh)
                        if cluster_z is not None:
                            c_thr = stat_threshold(cluster_z, kind, plan.df, plan.q)
                        spec = _MapSpec(kind, tail, params, c_thr)
                        x, two = _enhance_input(maps[0], spec)
                        if params is not None:
                            obs_tfce = tfce(x, adjacency, params.dh, params.E, params.H, params.rule, two_sided=two)
                            if kind == "t" and tail == "less":
                                obs_tfce = -obs_tfce
                        if c_thr is not None:
                            obs_clusters = label_clusters(x, c_thr, adjacency, two_sided=two)
                        runner = _NullRunner(n_jobs, adjacency, spec, workers)
                    runner.submit(b0, maps, sink)
                if progress is not None:
                    progress(b1, J)
            if runner is not None:
                runner.finish(sink)
    except BaseException:
        if runner is not None:
            runner.abort()
        raise
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)

    with np.errstate(invalid="ignore"):
        p_perm = np.where(np.isnan(stat), np.nan, count / J)
    max_null[np.isneginf(max_null)] = np.nan
    p_fwe = _fwe_p(work_obs, max_null)
    max_null = _oriented_stat(plan, max_null)
    result = PermutationResult(
        name=name,
        kind=kind,
        tail=tail,
        df=plan.df,
        q=plan.q,
        stat=stat,
        p_perm=p_perm,
        p_fwe=p_fwe,
        max_null=max_null,
        n_perm=J,
        exhaustive=pset.exhaustive,
        method=pset.method,
        seed=pset.seed,
        n_possible=pset.n_possible,
    )
    if obs_tfce is not None:
        no_data = np.isnan(stat)
        obs_tfce[no_data] = np.nan
        result.tfce = obs_tfce
        result.tfce_max_null = tfce_max
        result.p_tfce_fwe = _fwe_p(np.abs(obs_tfce), tfce_max)
        result.tfce_params = params
    if obs_clusters is not None:
        result.cluster_z = float(cluster_z)
        result.cluster_threshold = c_thr
        result.clusters = obs_clusters
        result.cluster_max_null = clus_max
        cp = _fwe_p(obs_clusters.sizes.astype(np.float64), clus_max)
        result.cluster_p_fwe = cp
        p_map = np.ones(V)
        inside = obs_clusters.labels > 0
        p_map[inside] = cp[obs_clusters.labels[inside] - 1]
        p_map[np.isnan(stat)] = np.nan
        result.p_cluster_fwe = p_map
    return result


def run_tests(
    design: np.ndarray,
    tests: Sequence[Any],
    data: np.ndarray,
    **options: Any,
) -> list[PermutationResult]:
    """:func:`run_permutations` for each test (objects with ``name``, ``weights``, ``kind``, ``tail``,
    such as :class:`groupmodel.ols.Test`), with the same options and seed.  With ``n_jobs > 1`` and
    TFCE or clusters, one set of worker processes serves every test."""
    whole_maps = options.get("tfce_params") is not None or options.get("cluster_z") is not None
    n_jobs = options.get("n_jobs", 1) if options.get("workers") is None else 1
    with shared_workers(n_jobs, options.get("adjacency"), whole_maps) as workers:
        if workers is not None:
            options = {**options, "workers": workers}
        return [
            run_permutations(
                design, t.weights, data, kind=t.kind, tail=getattr(t, "tail", "two-sided"), name=t.name, **options
            )
            for t in tests
        ]


# Re-exported for callers that build their own loops.
__all__ += ["Method", "PermutationSet", "permutation_set", "residualise", "stack_rows"]
