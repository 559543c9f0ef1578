"""Compiled (numba) element-wise pass of the permutation loop: one pass over each tile's products.

Imported only through :func:`groupmodel.inference.fastpath.compiled_scan`, which falls back to the numpy
reference (:func:`groupmodel.inference.kernel._tile` and the counting in ``_scan``) when numba is not
installed or ``GROUPMODEL_NO_COMPILED=1``.

After the product ``G = A W`` of a tile (rows ``k B + b``: design-side row k of rearrangement b), the
numpy reference makes about ten passes over ``(B, w)`` arrays: squares, sums, the working statistic,
the comparison with the thresholds, the count, the row maxima.  :func:`scan_tile` does the same work
one rearrangement at a time on rows of the tile that stay in the first-level cache.  Every value is
formed by the same IEEE operations in the same order as the reference (``x * x`` for a square, the sum
of interest rows from row 0 up, ``1 - z`` by subtracting the nuisance rows in order, then one division;
no fused multiply-add, no reassociation: numba compiles without fast-math), so the working statistics,
the t or F maps, the counts and the maxima are the same bits on both paths.

Compilation is cached on disk (``cache=True``), like :mod:`groupmodel.inference.compiled`.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["ORIENT_ABS", "ORIENT_LESS", "ORIENT_SIGNED", "scan_tile"]

# error_model="numpy": a division by zero gives inf or NaN, as numpy does, instead of raising.
_JIT = {"cache": True, "nogil": True, "error_model": "numpy"}

#: How the working statistic is oriented: |u| or r (two-sided t, F), signed (t "greater"), negated (t "less").
ORIENT_ABS, ORIENT_SIGNED, ORIENT_LESS = 0, 1, 2


@numba.njit(**_JIT)
def _row_one(G: np.ndarray, b: int, orient: int, o: np.ndarray) -> None:
    """m = 1: the working statistic of rearrangement b is u itself, oriented."""
    g = G[b]
    if orient == ORIENT_ABS:
        for j in range(o.size):
            o[j] = abs(g[j])
    elif orient == ORIENT_SIGNED:
        for j in range(o.size):
            o[j] = g[j]
    else:
        for j in range(o.size):
            o[j] = -g[j]


@numba.njit(**_JIT)
def _stats_one(G: np.ndarray, b: int, is_t: bool, df: float, out: np.ndarray) -> None:
    """m = 1: t = sqrt(df) u / sqrt(max(1 - u^2, 0)) or F = df u^2 / max(1 - u^2, 0), as the reference."""
    g = G[b]
    root_df = math.sqrt(df)
    for j in range(out.size):
        u = g[j]
        one_minus = 1.0 - u * u
        if one_minus < 0.0:
            one_minus = 0.0
        if is_t:
            out[j] = (root_df * u) / np.sqrt(one_minus)
        else:
            out[j] = (df * (u * u)) / one_minus


@numba.njit(**_JIT)
def _sums(G: np.ndarray, b: int, B: int, m: int, q: int, a: np.ndarray, rest: np.ndarray) -> None:
    """m > 1: a = ||g_interest||^2 (row 0 first) and rest = 1 - ||g_nuisance||^2 (rows q..m-1 in order)."""
    w = a.size
    g0 = G[b]
    for j in range(w):
        a[j] = g0[j] * g0[j]
    for k in range(1, q):
        gk = G[k * B + b]
        for j in range(w):
            a[j] = a[j] + gk[j] * gk[j]
    if m > q:
        gq = G[q * B + b]
        for j in range(w):
            rest[j] = 1.0 - gq[j] * gq[j]
        for k in range(q + 1, m):
            gk = G[k * B + b]
            for j in range(w):
                rest[j] = rest[j] - gk[j] * gk[j]
    else:
        for j in range(w):
            rest[j] = 1.0


@numba.njit(**_JIT)
def _stats_many(
    g0: np.ndarray, a: np.ndarray, rest: np.ndarray, is_t: bool, df: float, q: int, out: np.ndarray
) -> None:
    """m > 1: t = g0 / sqrt(RSS / df) or F = a (df / q) / RSS, RSS = max(1 - z - a, 0), as the reference."""
    inv_df = 1.0 / df
    df_q = df / q
    for j in range(out.size):
        rss = rest[j] - a[j]
        if rss < 0.0:
            rss = 0.0
        if is_t:
            out[j] = g0[j] / np.sqrt(rss * inv_df)
        else:
            out[j] = (a[j] * df_q) / rss


@numba.njit(**_JIT)
def _row_many(g0: np.ndarray, a: np.ndarray, rest: np.ndarray, orient: int, o: np.ndarray) -> None:
    """m > 1: the working statistic r = a / (1 - z), signed by g0 for one-sided t."""
    if orient == ORIENT_ABS:
        for j in range(o.size):
            o[j] = a[j] / rest[j]
    elif orient == ORIENT_SIGNED:
        for j in range(o.size):
            o[j] = np.copysign(a[j], g0[j]) / rest[j]
    else:
        for j in range(o.size):
            o[j] = (-np.copysign(a[j], g0[j])) / rest[j]


@numba.njit(**_JIT)
def _count_and_max(o: np.ndarray, threshold: np.ndarray, counts: np.ndarray) -> float:
    """counts += (o >= threshold) (NaN thresholds never count); the row maximum ignoring NaN (NaN if all are).
    Written without branches, so that the loop vectorises."""
    top = -np.inf
    seen = 0
    for j in range(o.size):
        x = o[j]
        counts[j] += x >= threshold[j]
        top = x if x > top else top
        seen += x == x
    return top if seen else np.nan


@numba.njit(**_JIT)
def _count_max_one(g: np.ndarray, orient: int, threshold: np.ndarray, counts: np.ndarray) -> float:
    """m = 1 without maps or missing data: :func:`_row_one` and :func:`_count_and_max` in one loop."""
    top = -np.inf
    seen = 0
    for j in range(g.size):
        x = g[j]
        if orient == ORIENT_ABS:
            x = abs(x)
        elif orient == ORIENT_LESS:
            x = -x
        counts[j] += x >= threshold[j]
        top = x if x > top else top
        seen += x == x
    return top if seen else np.nan


@numba.njit(**_JIT)
def _count_max_many(
    g0: np.ndarray, last: np.ndarray, a: np.ndarray, rest: np.ndarray, fresh: bool, orient: int,
    threshold: np.ndarray, counts: np.ndarray,
) -> float:
    """m > q without maps or missing data: the last nuisance row's subtraction (from 1 when it is the only
    one, ``fresh``), :func:`_row_many` and :func:`_count_and_max` in one loop, the same operations in the
    same order."""
    top = -np.inf
    seen = 0
    for j in range(g0.size):
        r = (1.0 if fresh else rest[j]) - last[j] * last[j]
        if orient == ORIENT_ABS:
            x = a[j] / r
        elif orient == ORIENT_SIGNED:
            x = np.copysign(a[j], g0[j]) / r
        else:
            x = (-np.copysign(a[j], g0[j])) / r
        counts[j] += x >= threshold[j]
        top = x if x > top else top
        seen += x == x
    return top if seen else np.nan


@numba.njit(**_JIT)
def _fused_row(
    G: np.ndarray, b: int, B: int, m: int, q: int, orient: int, a: np.ndarray, rest: np.ndarray,
    threshold: np.ndarray, counts: np.ndarray,
) -> float:
    """One rearrangement's counts and maximum when no map is written and every element has data (the
    common case), in fewer passes: the last product row is read in the counting loop."""
    if m == 1:
        return _count_max_one(G[b], orient, threshold, counts)
    # Rows 0 .. m - 2 as in _sums, the last (nuisance) row in the counting loop.
    _sums(G, b, B, m - 1, q, a, rest)
    return _count_max_many(G[b], G[(m - 1) * B + b], a, rest, m - 1 == q, orient, threshold, counts)


@numba.njit(**_JIT)
def scan_tile(
    G: np.ndarray,
    m: int,
    q: int,
    is_t: bool,
    orient: int,
    df: float,
    bad: np.ndarray,
    threshold: np.ndarray,
    counts: np.ndarray,
    maxima: np.ndarray,
    stats: np.ndarray,
) -> None:
    """Counts, maxima and (optionally) t or F of one tile, from its products.

    Parameters
    ----------
    G : float64 (m B, w)
        The tile's products ``A W`` (``W`` unit-scaled).
    m, q : int
        Design-side rows per rearrangement and interest rows among them.
    is_t, orient, df
        The statistic (t or F), the orientation code (``ORIENT_*``), residual degrees of freedom.
    bad : int (k,)
        Positions in the tile of elements without data: working statistic -inf, statistic NaN.
    threshold : float64 (w,)
        "At least the observed" per element.
    counts : unsigned int (w,)
        Incremented by the rearrangements at or above the threshold.
    maxima : float64 (B,)
        Row maxima so far, NaN-ignoring (NaN before the first tile); updated with this tile's.
    stats : float64 (s, w)
        Receives t or F of rearrangements 0 .. s-1 (s = 0: none).
    """
    w = G.shape[1]
    B = G.shape[0] // m
    o = np.empty(w)
    a = np.empty(w)
    rest = np.empty(w)
    fused = bad.size == 0 and (m == 1 or m > q)
    for b in range(B):
        if fused and b >= stats.shape[0]:
            top = _fused_row(G, b, B, m, q, orient, a, rest, threshold, counts)
            old = maxima[b]
            if old != old or top > old:
                maxima[b] = top
            continue
        if m == 1:
            if b < stats.shape[0]:
                _stats_one(G, b, is_t, df, stats[b])
            _row_one(G, b, orient, o)
        else:
            _sums(G, b, B, m, q, a, rest)
            if b < stats.shape[0]:
                _stats_many(G[b], a, rest, is_t, df, q, stats[b])
            _row_many(G[b], a, rest, orient, o)
        for i in range(bad.size):
            o[bad[i]] = -np.inf
            if b < stats.shape[0]:
                stats[b, bad[i]] = np.nan
        top = _count_and_max(o, threshold, counts)
        old = maxima[b]
        if old != old or top > old:  # fmax: NaN only while every value so far is NaN
            maxima[b] = top
