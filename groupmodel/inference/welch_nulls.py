"""Pure per-chunk null tasks of Freedman-Lane permutation inference with Welch's v or G.

The same scheme as :mod:`groupmodel.inference.freedman_lane` (Winkler et al. 2014): the data are residualised
against the nuisance space of the contrast, ``W = Y - U_z U_z' Y``, rearranged (``W*[i] = flips[i] W[perm[i]]``)
and refitted with the full model; the statistic of each rearrangement is Welch's v (t tests) or G (F tests) of
:mod:`groupmodel.engine.welch`, with each variance group's residual variance re-estimated from the rearranged
data.  (Adding back the nuisance fit changes neither v nor G: it moves no residual and no estimable ``L b``.)

Valid rearrangements keep the variance groups' constraint: rows are permuted only within their variance group
(exchangeable errors need equal variances), while sign flips (symmetric errors) need no equal variances.
Choosing them is the caller's business (:mod:`groupmodel.analysis.welch_inference`).

Oriented statistics, as in :mod:`groupmodel.inference.kernel`: ``|v|`` (two-sided), ``v`` ("greater"),
``-v`` ("less"), ``G``.  A task returns per-voxel counts of rearrangements at least as large as the observed
statistic and each rearrangement's maximum over the chunk; the caller sums counts and maximises maxima, so the
results do not depend on the chunking.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..engine.ols import ZERO_VARIANCE_FACTOR
from ..engine.welch import WelchPrepared, welch_statistics
from .kernel import at_least

__all__ = ["WelchNullPlan", "WelchNulls", "oriented_welch", "welch_batch", "welch_residualise"]

_EPS = float(np.finfo(np.float64).eps)
#: Voxels per tile of the rearrangement loop (an (n, TILE) block stays in a core's cache).
TILE = 2048


@dataclass(frozen=True, eq=False)
class WelchNullPlan:
    """One contrast's permutation plan with variance groups; holds no data and pickles.

    Attributes
    ----------
    wp : WelchPrepared
        The full model with its variance groups.
    a : ndarray, shape (q, r)
        The contrast in the SVD coordinates of ``wp.base``.
    nuisance : ndarray, shape (n, r - q)
        Orthonormal basis of the contrast's nuisance space.
    kind, tail : str
    """

    wp: WelchPrepared
    a: np.ndarray
    nuisance: np.ndarray
    kind: str
    tail: str


def welch_residualise(plan: WelchNullPlan, chunk: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``W`` (n, v) residualised against the nuisance, and the rounding floor of each group's variance (v,)."""
    w = np.array(chunk, dtype=np.float64, order="C", copy=True)
    if plan.nuisance.shape[1]:
        w -= plan.nuisance @ (plan.nuisance.T @ w)
    with np.errstate(invalid="ignore"):
        scale = np.abs(w).max(axis=0) if w.size else np.zeros(w.shape[1])
    return w, (ZERO_VARIANCE_FACTOR * w.shape[0] * _EPS * scale) ** 2


def oriented_welch(plan: WelchNullPlan, stat: np.ndarray) -> np.ndarray:
    """|v| (two-sided), v ("greater"), -v ("less") or G: larger is more extreme."""
    if plan.kind == "F" or plan.tail == "greater":
        return stat
    return np.abs(stat) if plan.tail == "two-sided" else -stat


def _statistics(plan: WelchNullPlan, y: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """v or G of one rearranged chunk ``y`` (n, v)."""
    wp = plan.wp
    u = wp.base.u
    uy = u.T @ y
    resid = y - u @ uy
    onehot = np.zeros((wp.k, y.shape[0]))
    onehot[wp.labels, np.arange(y.shape[0])] = 1.0
    group_var = (onehot @ (resid * resid)) / wp.resid_df[:, None]
    group_var[group_var <= floor] = np.nan
    stat, _, _ = welch_statistics(wp, plan.a, plan.a @ uy, group_var, plan.kind, with_df=False)
    return stat


@dataclass(frozen=True)
class WelchNulls:
    """Counts (v,) of rearrangements at least the observed statistic, and maxima (B,) over the chunk; with
    ``stat`` (v,), the observed v or G, when the batch began with the identity."""

    counts: np.ndarray
    maxima: np.ndarray
    stat: np.ndarray | None = None


def welch_batch(plan: WelchNullPlan, perm: np.ndarray | None, flips: np.ndarray | None, chunk: np.ndarray,
                observed: np.ndarray | None) -> WelchNulls:
    """One batch of rearrangements on one chunk (a pure function of its inputs).

    Parameters
    ----------
    perm, flips : ndarray, shape (B, n), or None
        The batch (:meth:`groupmodel.inference.rearrangements.PermutationSet.batch`).
    chunk : ndarray, shape (n, v)
        Data of the chunk (not residualised).
    observed : ndarray, shape (v,), or None
        The observed oriented statistic; None for the first batch, whose first rearrangement must be the
        identity: it gives the observed statistic (returned as ``stat``).

    The voxels are taken in tiles of :data:`TILE` (every rearrangement of a tile before the next tile), so that
    the working arrays stay in a core's cache; each voxel's statistics depend only on its own data.
    """
    w, floor = welch_residualise(plan, chunk)
    ref = perm if perm is not None else flips
    B, v = ref.shape[0], w.shape[1]
    counts = np.zeros(v, dtype=np.int64)
    maxima = np.full(B, -np.inf)
    stat0 = np.full(v, np.nan) if observed is None else None
    threshold = np.full(v, np.nan) if observed is None else at_least(observed)
    for lo in range(0, v, TILE):
        hi = min(v, lo + TILE)
        tile = np.ascontiguousarray(w[:, lo:hi])
        for b in range(B):
            y = tile if perm is None else tile[perm[b]]
            if flips is not None:
                y = y * flips[b][:, None]
            with np.errstate(invalid="ignore"):
                stat = _statistics(plan, y, floor[lo:hi])
            o = oriented_welch(plan, stat)
            if stat0 is not None and b == 0:
                stat0[lo:hi] = stat
                threshold[lo:hi] = at_least(o)
            with np.errstate(invalid="ignore"):
                counts[lo:hi] += o >= threshold[lo:hi]
            if not np.all(np.isnan(o)):
                maxima[b] = max(maxima[b], float(np.nanmax(o)))
    return WelchNulls(counts, maxima, stat0)
