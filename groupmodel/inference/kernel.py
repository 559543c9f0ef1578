"""Pure per-chunk null tasks of the permutation test, and the whole-map task of TFCE and cluster nulls.

Each task is a function of picklable inputs (a :class:`~groupmodel.inference.freedman_lane.ContrastPlan`, a
batch of rearrangements stacked into one matrix, a chunk of residualised data, the observed thresholds)
returning counts and maxima; the driver combines the tasks' results by sum (counts) and maximum (maxima), so
they may run inline, on threads, in processes or on a cluster, in any order, with identical results.

Speed: permuting the data rows is the same as permuting the design rows, so for a batch of B
rearrangements the design side is stacked into one (B m, n) matrix and multiplied with the chunk
``W`` (n, v) in one product, in tiles of voxels that keep the result in a core's cache.  The data
are scaled to ``||W|| = 1`` per voxel once (statistics do not change), and the loop compares and
maximises a cheap increasing function of the statistic (see ``_tile``), converting only what it
keeps.  Each chunk is split into one contiguous part per thread; every thread does its own products
(with BLAS held to one thread) and the element-wise work after them, so that work, which BLAS's own
threads would leave to a single core, runs on all of them.  With the optional extra ``fast`` the element-wise
work after each product runs as compiled passes over the tile (:mod:`groupmodel.inference.compiled_scan`; in
the first batch the observed statistics and thresholds first), which form the same values with the same
operations as :func:`_tile` and the counting in :func:`_scan`, their numpy reference: the same bits either way.
Voxels whose residuals are at rounding level (constant data) get NaN statistics and p values.

Statistics used for inference ("oriented" statistics): ``|t|`` for two-sided t tests (so the
maximum statistic and the uncorrected p are two-sided), ``t`` for "greater", ``-t`` for "less", and
``F`` (always upper-tailed).  p values are ``(number of rearrangements, identity included, whose
statistic is >= the observed one) / J``, never below 1/J; "at least as large" allows a relative
tolerance of 100 machine epsilons (of the working statistic), the convention of
``scipy.stats.permutation_test``, so that rearrangements equal to the observed one in exact
arithmetic are counted.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import Any

import numpy as np

from .fastpath import compiled_scan
from .freedman_lane import ContrastPlan, residualise, stack_rows

__all__ = [
    "ChunkNulls",
    "ObservedChunk",
    "Scratch",
    "UnitChunk",
    "at_least",
    "chunk_nulls",
    "chunk_statistics",
    "count_type",
    "observed_chunk",
    "oriented_stat",
    "tile_width",
    "unit_columns",
]

_EPS = float(np.finfo(np.float64).eps)
#: Relative tolerance of "at least as large as the observed statistic" (scipy.stats.permutation_test).
TIE_RTOL = 100 * _EPS
#: The permutation loop multiplies tiles of voxels whose (B m, tile) product holds about this many float64
#: values (4 MiB).  Measured here (benchmarks/permutation_speed.py, 2 cores with 2 MiB of L2 each): wider tiles
#: than a core's L2 were faster, product and element-wise pass together, as BLAS packs the design side once
#: per product, and each rearrangement's rows of the product (m w values: 41 KiB for m = 5) stay near the core.
_TILE_VALUES = 2**19


def tile_width(rows: int) -> int:
    """Voxels per product for a stacked design side of ``rows`` rows (128 to 4096)."""
    return int(min(4096, max(128, _TILE_VALUES // max(rows, 1))))


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

class Scratch:
    """Work arrays of each thread, kept between the tasks of one run (fresh arrays for every task would
    cost page faults); a task given no scratch makes its own."""

    def __init__(self) -> None:
        self._by_thread: dict[int, _Buffers] = {}

    def buffers(self, rows: int, B: int, tile: int) -> _Buffers:
        """The calling thread's work arrays for a stacked design side of ``rows`` rows (B rearrangements)."""
        key = threading.get_ident()
        got = self._by_thread.get(key)
        if got is None or got.rows != rows or got.tile != tile:
            got = self._by_thread[key] = _Buffers(rows, B, tile)
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
        Residualised data of the tile, scaled to unit sum of squares per voxel (:func:`unit_columns`).
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


def oriented_stat(plan: ContrastPlan, o: np.ndarray) -> np.ndarray:
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


@dataclass(frozen=True)
class UnitChunk:
    """Residualised data of a chunk scaled to unit sum of squares per voxel (W, shape (n, v)), and the
    positions of the voxels without data (``bad``)."""

    W: np.ndarray
    bad: np.ndarray


def unit_columns(plan: ContrastPlan, chunk: np.ndarray) -> UnitChunk:
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
    return UnitChunk(W, np.flatnonzero(~valid))


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
    unit = unit_columns(plan, chunk)
    W, bad = unit.W, unit.bad
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
# Null tasks over a chunk of voxels
# --------------------------------------------------------------------------------------------


def at_least(observed: np.ndarray) -> np.ndarray:
    """Threshold for "statistic >= observed" with the relative tie tolerance."""
    with np.errstate(invalid="ignore"):
        gamma = np.where(np.isfinite(observed), TIE_RTOL * np.abs(observed), 0.0)
    return observed - gamma


def count_type(B: int) -> type[np.integer[Any]]:
    """Counts of one batch of B rearrangements fit in a small integer type, which keeps the reduction
    free of casts."""
    return np.uint8 if B < 256 else np.uint16 if B < 65536 else np.int64


@dataclass(frozen=True)
class ChunkNulls:
    """What a null task returns for one batch and one chunk.

    Attributes
    ----------
    counts : ndarray of small unsigned int, shape (v,)
        Rearrangements of the batch whose statistic is at least the observed one (tolerant), per voxel;
        summed over batches.
    maxima : ndarray, shape (B,)
        Largest oriented working statistic of each rearrangement over the chunk (-inf when no voxel has
        data); combined over chunks by maximum.
    """

    counts: np.ndarray
    maxima: np.ndarray


@dataclass(frozen=True)
class ObservedChunk:
    """The observed (identity) statistics of one chunk: t or F, the oriented working statistic (NaN
    without data) and the thresholds later batches are counted against."""

    stat: np.ndarray
    work: np.ndarray
    threshold: np.ndarray


def chunk_nulls(
    plan: ContrastPlan,
    A: np.ndarray,
    chunk: UnitChunk,
    threshold: np.ndarray,
    tile: int,
    maps: np.ndarray | None = None,
    scratch: Scratch | None = None,
) -> ChunkNulls:
    """Counts and maxima of a batch of rearrangements on one chunk (a pure function of its inputs).

    Parameters
    ----------
    plan : ContrastPlan
    A : ndarray, shape (m B, n)
        Design side of the batch (:func:`~groupmodel.inference.freedman_lane.stack_rows`).
    chunk : UnitChunk
        The chunk's data (:func:`unit_columns`).
    threshold : ndarray, shape (v,)
        "At least the observed statistic" per voxel (:attr:`ObservedChunk.threshold`).
    tile : int
        Voxels per product (:func:`tile_width`); fixed for a run, so that results do not depend on it.
    maps : ndarray, shape (B, v), optional
        Receives t or F of every rearrangement (for TFCE and clusters).
    scratch : Scratch, optional
        Work arrays kept between tasks (speed only).
    """
    return _scan(plan, A, chunk, threshold, tile, maps, scratch, None)


def observed_chunk(
    plan: ContrastPlan,
    A: np.ndarray,
    chunk: UnitChunk,
    tile: int,
    maps: np.ndarray | None = None,
    scratch: Scratch | None = None,
) -> tuple[ObservedChunk, ChunkNulls]:
    """:func:`chunk_nulls` for the first batch, which starts with the identity: the observed statistics
    and thresholds are taken from its first row, tile by tile, before the batch is counted."""
    v = chunk.W.shape[1]
    observed = ObservedChunk(np.full(v, np.nan), np.full(v, np.nan), np.full(v, np.nan))
    return observed, _scan(plan, A, chunk, observed.threshold, tile, maps, scratch, observed)


def _scan(
    plan: ContrastPlan,
    A: np.ndarray,
    chunk: UnitChunk,
    threshold: np.ndarray,
    tile: int,
    maps: np.ndarray | None,
    scratch: Scratch | None,
    observed: ObservedChunk | None,
) -> ChunkNulls:
    """The tile loop of :func:`chunk_nulls` and :func:`observed_chunk`."""
    B = A.shape[0] // plan.m
    buffers = (Scratch() if scratch is None else scratch).buffers(A.shape[0], B, tile)
    W, bad = chunk.W, chunk.bad
    v = W.shape[1]
    if compiled_scan() is not None:
        return _scan_compiled(plan, A, chunk, threshold, tile, maps, buffers, observed)
    counts = np.zeros(v, dtype=count_type(B))
    tile_maxima = []
    for ts in range(0, v, tile):
        te = min(v, ts + tile)
        tile_bad = bad[(bad >= ts) & (bad < te)] - ts if bad.size else bad
        if maps is not None:
            stats_out = maps[:, ts:te]
        elif observed is not None:
            stats_out = observed.stat[None, ts:te]
        else:
            stats_out = None
        o = _tile(plan, A, W[:, ts:te], buffers, tile_bad, stats_out)
        if observed is not None:
            if maps is not None:
                observed.stat[ts:te] = maps[0, ts:te]
            observed.work[ts:te] = o[0]
            observed.work[ts + tile_bad] = np.nan
            threshold[ts:te] = at_least(observed.work[ts:te])
        hit = buffers.flags(te - ts)
        with np.errstate(invalid="ignore"):  # NaN thresholds (no data) compare False
            np.greater_equal(o, threshold[ts:te], out=hit)
        np.add.reduce(hit.view(np.uint8), axis=0, dtype=counts.dtype, out=counts[ts:te])
        if o.shape[1]:
            tile_maxima.append(np.fmax.reduce(o, axis=1))
    maxima = np.fmax.reduce(np.stack(tile_maxima), axis=0) if tile_maxima else np.full(B, -np.inf)
    return ChunkNulls(counts, maxima)


def _scan_compiled(
    plan: ContrastPlan,
    A: np.ndarray,
    chunk: UnitChunk,
    threshold: np.ndarray,
    tile: int,
    maps: np.ndarray | None,
    buffers: _Buffers,
    observed: ObservedChunk | None,
) -> ChunkNulls:
    """The tile loop of :func:`_scan` with the element-wise work of each tile in compiled passes
    (:mod:`groupmodel.inference.compiled_scan`): the observed statistics and thresholds of the first batch
    (``observe_tile``), then the counts, maxima and maps (``scan_tile``); the same bits as :func:`_tile` and
    the counting of :func:`_scan`, which are their reference."""
    fused = compiled_scan()
    B = A.shape[0] // plan.m
    W, bad = chunk.W, chunk.bad
    v = W.shape[1]
    counts = np.zeros(v, dtype=count_type(B))
    orient = fused.ORIENT_ABS if plan.kind == "F" or plan.tail == "two-sided" else (
        fused.ORIENT_SIGNED if plan.tail == "greater" else fused.ORIENT_LESS)
    is_t, df = plan.kind == "t", float(plan.df)
    maxima = np.full(B, np.nan)
    no_stats = np.empty((0, 0))
    for ts in range(0, v, tile):
        te = min(v, ts + tile)
        tile_bad = bad[(bad >= ts) & (bad < te)] - ts if bad.size else bad
        G = buffers.views(te - ts)[0]
        np.matmul(A, W[:, ts:te], out=G)
        if observed is not None:
            fused.observe_tile(G, plan.m, plan.q, is_t, orient, df, tile_bad, observed.work[ts:te],
                               observed.stat[ts:te])
            threshold[ts:te] = at_least(observed.work[ts:te])
        stats = maps[:, ts:te] if maps is not None else no_stats
        fused.scan_tile(G, plan.m, plan.q, is_t, orient, df, tile_bad, threshold[ts:te], counts[ts:te], maxima, stats)
    if v == 0:
        maxima.fill(-np.inf)
    return ChunkNulls(counts, maxima)
