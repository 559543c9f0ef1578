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

__all__ = ["ORIENT_ABS", "ORIENT_LESS", "ORIENT_SIGNED", "observe_tile", "scan_tile"]

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
def _interest(G: np.ndarray, b: int, B: int, q: int, a: np.ndarray) -> None:
    """a = ||g_interest||^2: the squares of rows 0 .. q-1 of rearrangement b added from row 0 up."""
    w = a.size
    g0 = G[b]
    for j in range(w):
        a[j] = g0[j] * g0[j]
    for k in range(1, q):
        gk = G[k * B + b]
        for j in range(w):
            a[j] = a[j] + gk[j] * gk[j]


@numba.njit(**_JIT)
def _sums(G: np.ndarray, b: int, B: int, m: int, q: int, a: np.ndarray, rest: np.ndarray) -> None:
    """m > 1: a = ||g_interest||^2 (row 0 first) and rest = 1 - ||g_nuisance||^2 (rows q..m-1 in order)."""
    w = a.size
    _interest(G, b, B, q, a)
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


@numba.njit(inline="always", **_JIT)
def _larger(x: float, top: float) -> float:
    """x if it is larger than top, else top (a NaN x never is)."""
    return x if x > top else top


@numba.njit(**_JIT)
def _top(o: np.ndarray) -> float:
    """The largest value ignoring NaN (NaN if all are).  Eight running maxima over neighbouring elements, so
    that each comparison need not wait for the one before (a maximum of floats does not vectorise without
    fast-math); the largest value is the same whatever the order."""
    t0 = t1 = t2 = t3 = t4 = t5 = t6 = t7 = -np.inf
    w = o.size
    full = w - w % 8
    for j in range(0, full, 8):
        t0, t1, t2, t3 = _larger(o[j], t0), _larger(o[j + 1], t1), _larger(o[j + 2], t2), _larger(o[j + 3], t3)
        t4, t5, t6, t7 = _larger(o[j + 4], t4), _larger(o[j + 5], t5), _larger(o[j + 6], t6), _larger(o[j + 7], t7)
    top = -np.inf
    for j in range(full, w):
        top = _larger(o[j], top)
    for t in (t0, t1, t2, t3, t4, t5, t6, t7):
        top = _larger(t, top)
    if top == -np.inf:  # every value -inf or NaN: NaN only if all are
        for j in range(w):
            if o[j] == o[j]:
                return top
        return np.nan
    return top


@numba.njit(**_JIT)
def _count(o: np.ndarray, threshold: np.ndarray, counts: np.ndarray) -> None:
    """counts += (o >= threshold); NaN thresholds never count."""
    for j in range(o.size):
        counts[j] += o[j] >= threshold[j]


@numba.njit(**_JIT)
def _count_and_max(o: np.ndarray, threshold: np.ndarray, counts: np.ndarray) -> float:
    """counts += (o >= threshold); the row maximum ignoring NaN (NaN if all are)."""
    _count(o, threshold, counts)
    return _top(o)


@numba.njit(**_JIT)
def _oriented_count(g: np.ndarray, absolute: bool, flip: float, threshold: np.ndarray, counts: np.ndarray,
                    o: np.ndarray) -> None:
    """m = 1: o = |g| or g * flip (flip = -1 negates exactly), as :func:`_row_one`; counts += (o >= threshold)."""
    for j in range(o.size):
        x = abs(g[j]) if absolute else g[j] * flip
        o[j] = x
        counts[j] += x >= threshold[j]


@numba.njit(**_JIT)
def _nuisance(G: np.ndarray, b: int, B: int, first: int, stop: int, rest: np.ndarray) -> None:
    """rest = 1 - g_first^2 - ... - g_(stop-1)^2 (stop > first), subtracted in row order as in :func:`_sums`,
    two rows per pass over the elements."""
    w = rest.size
    g = G[first * B + b]
    k = first + 1
    if k < stop:
        h = G[k * B + b]
        for j in range(w):
            rest[j] = (1.0 - g[j] * g[j]) - h[j] * h[j]
        k += 1
    else:
        for j in range(w):
            rest[j] = 1.0 - g[j] * g[j]
    while k < stop:
        g = G[k * B + b]
        if k + 1 < stop:
            h = G[(k + 1) * B + b]
            for j in range(w):
                rest[j] = (rest[j] - g[j] * g[j]) - h[j] * h[j]
            k += 2
        else:
            for j in range(w):
                rest[j] = rest[j] - g[j] * g[j]
            k += 1


@numba.njit(**_JIT)
def _ratio_count(
    g0: np.ndarray, a: np.ndarray, square: bool, rest: np.ndarray, before: np.ndarray, last: np.ndarray,
    absolute: bool, flip: float, threshold: np.ndarray, counts: np.ndarray, o: np.ndarray,
) -> None:
    """m > 1: o = (a^2 if square else a) / ((rest - before^2) - last^2), given the sign of g0 * flip for
    one-sided t (as :func:`_row_many`: ``copysign(a, -g0)`` is ``-copysign(a, g0)`` bit for bit);
    counts += (o >= threshold).  A row of zeros for ``before`` (or ``last``) changes no bit: x - 0 * 0 is x."""
    for j in range(o.size):
        num = a[j] * a[j] if square else a[j]
        if not absolute:
            num = np.copysign(num, g0[j] * flip)
        x = num / ((rest[j] - before[j] * before[j]) - last[j] * last[j])
        o[j] = x
        counts[j] += x >= threshold[j]


@numba.njit(**_JIT)
def _fused_row(
    G: np.ndarray, b: int, B: int, m: int, q: int, orient: int, a: np.ndarray, rest: np.ndarray, zeros: np.ndarray,
    threshold: np.ndarray, counts: np.ndarray, o: np.ndarray,
) -> float:
    """One rearrangement's counts and maximum when no map is written and every element has data (the common
    case), in fewer passes than :func:`_sums`, :func:`_row_many` and :func:`_count_and_max` with the same
    operations in the same order: the interest row squared where it is read when q = 1, the nuisance rows
    two per pass, the last two of them (or zeros in their place) in the counting loop.  ``rest`` holds ones on
    entry when fewer than three nuisance rows move (it then stays so)."""
    absolute = orient == ORIENT_ABS
    flip = -1.0 if orient == ORIENT_LESS else 1.0
    if m == 1:
        _oriented_count(G[b], absolute, flip, threshold, counts, o)
        return _top(o)
    if q > 1:
        _interest(G, b, B, q, a)
    last = G[(m - 1) * B + b] if m > q else zeros
    before = G[(m - 2) * B + b] if m - 1 > q else zeros
    if m - 2 > q:
        _nuisance(G, b, B, q, m - 2, rest)
    _ratio_count(G[b], G[b] if q == 1 else a, q == 1, rest, before, last, absolute, flip, threshold, counts, o)
    return _top(o)


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
    # rest stays all ones for the fused rows when fewer than three nuisance rows move: they run first, and only the
    # rows after them (maps, missing data: _sums) overwrite it
    rest = np.ones(w)
    zeros = np.zeros(w)
    fused = bad.size == 0
    for b in range(stats.shape[0] if fused else 0, B if fused else 0):
        top = _fused_row(G, b, B, m, q, orient, a, rest, zeros, threshold, counts, o)
        old = maxima[b]
        if old != old or top > old:
            maxima[b] = top
    for b in range(min(stats.shape[0], B) if fused else B):
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


@numba.njit(**_JIT)
def observe_tile(
    G: np.ndarray, m: int, q: int, is_t: bool, orient: int, df: float, bad: np.ndarray, work: np.ndarray,
    stat: np.ndarray,
) -> None:
    """The observed statistics of a tile from its products, rearrangement 0 (the identity) of the first batch:
    the working statistic (NaN without data) and t or F, as the reference (:func:`groupmodel.inference.kernel._tile`
    and ``_scan``), before the tile is counted against the thresholds made from them."""
    w = G.shape[1]
    B = G.shape[0] // m
    if m == 1:
        _stats_one(G, 0, is_t, df, stat)
        _row_one(G, 0, orient, work)
    else:
        a = np.empty(w)
        rest = np.empty(w)
        _sums(G, 0, B, m, q, a, rest)
        _stats_many(G[0], a, rest, is_t, df, q, stat)
        _row_many(G[0], a, rest, orient, work)
    for i in range(bad.size):
        work[bad[i]] = np.nan
        stat[bad[i]] = np.nan
