"""Compiled (numba) union-find kernels for 3-D grids: TFCE and cluster labelling.

Imported only through :func:`groupmodel.inference.fastpath.compiled_kernels`, which falls back to the
numpy implementations (:mod:`groupmodel.inference.tfce`, :mod:`groupmodel.inference.clusters`) when
numba is not installed or ``GROUPMODEL_NO_COMPILED=1``.  The numpy code is the reference: these kernels
use the same levels, thresholds and prefix weights (computed by the numpy module and passed in) and give
the same TFCE to rounding (the tests compare them to 1e-9) and the same clusters.

TFCE, in three steps:

1. in memory (element) order, each active element's *earlier* neighbours are marked: those that entered
   before it (a higher level relative to its sign, or the same level and a smaller index).  Of earlier
   neighbours that are neighbours of each other only the first along the offset path is kept (they are
   joined already), so an element keeps about one neighbour per touching group.  Runs of voxels along the
   last axis are done a column at a time, so every read is a contiguous slice of the padded level grid;
2. again in memory order, a counting sort gives each active element its position in entering order
   (level descending, index ascending) and its kept neighbours are written, as positions, into entering
   order, one forward-moving pointer per level;
3. in entering order each element finds the roots of its kept neighbours, unites them (union by size,
   path halving) and joins the result; the union-find state is indexed by position, so an entering
   element's own reads and writes are sequential.  Roots carry lazy accumulators exactly as in the numpy
   module: ``acc += size^E (S[last] - S[k])`` when a root's size changes at level k; an element remembers
   its root's accumulator when it joins (offset) and an absorbed root the absorber's (base).

Cluster labelling is the same union-find at one threshold, in memory order over the earlier half of the
neighbourhood.

Compilation is cached on disk (``cache=True``: numba's ``__pycache__`` beside this file, or its user-wide
cache directory, or ``NUMBA_CACHE_DIR``), so worker processes load the machine code instead of compiling.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["grid_components", "grid_levels", "tfce_grid", "tfce_grid_max"]

_JIT = {"cache": True, "nogil": True}


@numba.njit(**_JIT)
def _find(parent: np.ndarray, x: int) -> int:
    """Root of x, halving the path on the way."""
    while parent[x] != x:
        parent[x] = parent[parent[x]]
        x = parent[x]
    return x


@numba.njit(**_JIT)
def _popcount(x: np.uint32) -> int:
    """Number of set bits (branch-free, in 64-bit arithmetic as numba does it)."""
    y = np.uint64(x)
    y = y - ((y >> np.uint64(1)) & np.uint64(0x5555555555555555))
    y = (y & np.uint64(0x3333333333333333)) + ((y >> np.uint64(2)) & np.uint64(0x3333333333333333))
    y = (y + (y >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return int((y * np.uint64(0x0101010101010101)) >> np.uint64(56))


#: Trailing-zero count of a power of two by a de Bruijn sequence: _DEBRUIJN[(bit * 0x077CB531 mod 2^32) >> 27].
_DEBRUIJN = np.array(
    [0, 1, 28, 2, 29, 14, 24, 3, 30, 22, 20, 15, 25, 17, 4, 8, 31, 27, 13, 23, 21, 19, 16, 7, 26, 12, 18, 6, 11, 5,
     10, 9],
    dtype=np.int64,
)


@numba.njit(**_JIT)
def _lowest_bit(code: np.uint32) -> int:
    """Index of the lowest set bit of a nonzero code."""
    low = np.uint64(code & (~code + np.uint32(1)))
    return _DEBRUIJN[((low * np.uint64(0x077CB531)) & np.uint64(0xFFFFFFFF)) >> np.uint64(27)]


#: Elements handled together in the first pass (pieces of runs of consecutive voxels along the last axis).
_PIECE = 256


@numba.njit(**_JIT)
def _earlier_codes(
    signed: np.ndarray, gindex: np.ndarray, offsets: np.ndarray, earlier: np.ndarray, padded_size: int, K: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pass 1, in element order.  Bit c of codes[e]: neighbour c of e entered before e (a higher level
    relative to e's sign, or the same level and a smaller index) and no neighbour before it on the offset
    path that touches it did.  Also the padded level grid, and the number of elements and of kept
    neighbours per level.

    Runs of consecutive voxels along the last axis are handled a piece at a time and a column (offset) at
    a time, so that every read is a contiguous slice of the padded level grid (the loops vectorise)."""
    n, D = signed.size, offsets.size
    grid = np.zeros(padded_size, np.int32)
    for e in range(n):
        grid[gindex[e]] = signed[e]
    behind = np.zeros(D, np.int32)  # 1 for negative offsets: an equal level there entered before
    for c in range(D):
        if offsets[c] < 0:
            behind[c] = 1
    codes = np.zeros(n, np.uint32)
    per_level = np.zeros(K + 1, np.int64)
    pairs_level = np.zeros(K + 1, np.int64)
    own = np.empty(_PIECE, np.int32)
    sgn = np.empty(_PIECE, np.int32)
    seen = np.empty(_PIECE, np.uint32)
    blocked = np.empty(_PIECE, np.uint32)
    e0 = 0
    while e0 < n:
        e1 = e0 + 1
        while e1 < n and e1 - e0 < _PIECE and gindex[e1] == gindex[e1 - 1] + 1:
            e1 += 1
        width, g0 = e1 - e0, gindex[e0]
        for i in range(width):
            s = signed[e0 + i]
            sgn[i] = 1 if s >= 0 else -1
            own[i] = abs(s) if s != 0 else 1 << 30  # inactive elements see nothing earlier
            seen[i] = 0
            blocked[i] = 0
        for c in range(D):
            nl, b, bit = grid[g0 + offsets[c] : g0 + offsets[c] + width], behind[c], np.uint32(c)
            for i in range(width):
                seen[i] |= np.uint32(nl[i] * sgn[i] + b > own[i]) << bit
        for c in range(D):  # earlier[c] holds only columns before c
            ec, bit = earlier[c], np.uint32(c)
            for i in range(width):
                blocked[i] |= np.uint32((seen[i] & ec) != 0) << bit
        for i in range(width):
            keep = seen[i] & ~blocked[i]
            codes[e0 + i] = keep
            lev = abs(signed[e0 + i])
            per_level[lev] += 1
            pairs_level[lev] += _popcount(keep)
        e0 = e1
    per_level[0] = 0
    return grid, codes, per_level, pairs_level


@numba.njit(**_JIT)
def _entering_layout(
    signed: np.ndarray,
    grid: np.ndarray,
    codes: np.ndarray,
    per_level: np.ndarray,
    pairs_level: np.ndarray,
    gindex: np.ndarray,
    offsets: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Passes 2 and 3, in element order: each active element's position in entering order (level
    descending, index ascending), and its kept neighbours as positions, stored in entering order so that
    the merge reads them sequentially.  Within a level entering order is element order, so each level's
    slots are filled by one forward-moving pointer.  The padded grid, no longer needed for levels, holds
    the positions of the active voxels in between.  Returns (position of each element, start of each
    position's neighbours, the neighbours)."""
    n, K = signed.size, per_level.size - 1
    at = np.zeros(K + 1, np.int64)
    pair_at = np.zeros(K + 1, np.int64)
    p = q = 0
    for k in range(K, 0, -1):
        at[k], pair_at[k] = p, q
        p += per_level[k]
        q += pairs_level[k]
    position = np.full(n, -1, np.int32)
    start = np.empty(p + 1, np.int64)
    start[p] = q
    nb = np.empty(q, np.int32)
    first_pair = pair_at.copy()
    for e in range(n):
        own = abs(signed[e])
        if own:
            position[e] = grid[gindex[e]] = at[own]
            start[at[own]] = pair_at[own]
            at[own] += 1
            pair_at[own] += _popcount(codes[e])
    for e in range(n):
        code = codes[e]
        if code:
            own = abs(signed[e])
            j = first_pair[own]
            g = gindex[e]
            while code:
                nb[j] = grid[g + offsets[_lowest_bit(code)]]
                j += 1
                code &= code - np.uint32(1)
            first_pair[own] = j
    return position, start, nb


@numba.njit(**_JIT)
def _extent(size: int, E: float) -> float:
    """``size^E``; a square root for E = 0.5, as numpy's ``**`` computes it."""
    return np.sqrt(np.float64(size)) if E == 0.5 else np.float64(size) ** E


@numba.njit(**_JIT)
def _merge(start: np.ndarray, nb: np.ndarray, per_level: np.ndarray, S: np.ndarray, E: float) -> np.ndarray:
    """Union-find over positions in entering order with lazy accumulators; each position's TFCE."""
    A = start.size - 1
    parent = np.arange(A).astype(np.int32)
    size = np.zeros(A, np.int64)
    last = np.zeros(A, np.int32)
    acc = np.zeros(A)
    offset = np.zeros(A)
    base = np.zeros(A)
    leaf = np.arange(A).astype(np.int32)
    gone = np.empty(A, np.int32)  # absorbed roots, in the order absorbed, and their absorbers
    into = np.empty(A, np.int32)
    n_gone = 0
    p = 0
    for k in range(per_level.size - 1, 0, -1):
        stop = p + per_level[k]
        while p < stop:
            root = -1
            for j in range(start[p], start[p + 1]):
                r = _find(parent, nb[j])
                if last[r] != k:
                    acc[r] += _extent(size[r], E) * (S[last[r]] - S[k])
                    last[r] = k
                if root < 0:
                    root = r
                elif r != root:
                    keep, lose = (root, r) if size[root] >= size[r] else (r, root)
                    parent[lose] = keep
                    base[lose] = acc[keep]
                    size[keep] += size[lose]
                    gone[n_gone], into[n_gone] = lose, keep
                    n_gone += 1
                    root = keep
            if root < 0:
                size[p] = 1
                last[p] = k
            else:
                parent[p] = root
                size[root] += 1
                leaf[p] = root
                offset[p] = acc[root]
            p += 1
    # Surviving roots down to level 0, then what absorbed roots inherit (latest absorption first).
    for p in range(A):
        if parent[p] == p:
            acc[p] += _extent(size[p], E) * (S[last[p]] - S[0])
    inherited = np.zeros(A)
    for j in range(n_gone - 1, -1, -1):
        inherited[gone[j]] = inherited[into[j]] + acc[into[j]] - base[gone[j]]
    value = np.empty(A)
    for p in range(A):
        r = leaf[p]
        value[p] = acc[r] - offset[p] + inherited[r]
    return value


@numba.njit(**_JIT)
def tfce_grid(
    signed: np.ndarray,
    K: int,
    gindex: np.ndarray,
    offsets: np.ndarray,
    earlier: np.ndarray,
    padded_size: int,
    S: np.ndarray,
    E: float,
) -> np.ndarray:
    """TFCE of the elements of a grid from their signed levels (negative: enhanced as -x, returned < 0).

    ``signed`` int32 (n,); ``gindex``, ``offsets`` (intp) and ``earlier`` (uint32) from the grid layout;
    ``S`` the prefix weights ``S[k] = sum_{j <= k} h_j^H dh`` (float64, K + 1).
    """
    grid, codes, per_level, pairs_level = _earlier_codes(signed, gindex, offsets, earlier, padded_size, K)
    position, start, nb = _entering_layout(signed, grid, codes, per_level, pairs_level, gindex, offsets)
    value = _merge(start, nb, per_level, S, E)
    out = np.zeros(signed.size)
    for e in range(signed.size):
        s = signed[e]
        if s > 0:
            out[e] = value[position[e]]
        elif s < 0:
            out[e] = -value[position[e]]
    return out


@numba.njit(**_JIT)
def tfce_grid_max(
    signed: np.ndarray,
    K: int,
    gindex: np.ndarray,
    offsets: np.ndarray,
    earlier: np.ndarray,
    padded_size: int,
    S: np.ndarray,
    E: float,
) -> float:
    """The largest |TFCE| of :func:`tfce_grid` (what a null map contributes), without the map."""
    grid, codes, per_level, pairs_level = _earlier_codes(signed, gindex, offsets, earlier, padded_size, K)
    _, start, nb = _entering_layout(signed, grid, codes, per_level, pairs_level, gindex, offsets)
    value = _merge(start, nb, per_level, S, E)
    top = 0.0
    for p in range(value.size):
        v = abs(value[p])
        if v > top:
            top = v
    return top


@numba.njit(cache=True, nogil=True, error_model="numpy")
def grid_levels(x: np.ndarray, dh: float, shift: float, two_sided: bool) -> tuple[np.ndarray, int]:
    """Signed TFCE levels and their largest magnitude K, in one pass: the same IEEE operations as
    :func:`groupmodel.inference.tfce.tfce_levels` (``floor(x / dh + shift)`` where positive, else 0; minus
    the same of ``-x`` when two-sided), so the same integers.  ``shift`` is the rule's shift plus the slack."""
    n = x.size
    levels = np.empty(n, np.int32)
    K = 0
    for e in range(n):
        s = x[e] / dh + shift
        lev = np.int32(np.floor(s)) if s > 0.0 else np.int32(0)
        if two_sided:
            s = (-x[e]) / dh + shift
            if s > 0.0:
                lev -= np.int32(np.floor(s))
        levels[e] = lev
        a = abs(lev)
        if a > K:
            K = a
    return levels, K


@numba.njit(**_JIT)
def grid_components(
    sign: np.ndarray, gindex: np.ndarray, offsets: np.ndarray, element: np.ndarray, padded_size: int
) -> tuple[np.ndarray, np.ndarray, int]:
    """Connected components of the nonzero elements, joining neighbours of equal sign.

    Returns the active elements (ascending), their component labels (0..C-1, numbered by first element)
    and C, like :func:`groupmodel.inference.clusters._component_labels`.
    """
    n = sign.size
    grid = np.zeros(padded_size, np.int8)
    n_active = 0
    for e in range(n):
        grid[gindex[e]] = sign[e]
        if sign[e] != 0:
            n_active += 1
    parent = np.arange(n).astype(np.int32)
    for e in range(n):
        s = sign[e]
        if s == 0:
            continue
        g = gindex[e]
        for c in range(offsets.size):
            o = offsets[c]
            if o < 0 and grid[g + o] == s:
                a = _find(parent, e)
                b = _find(parent, element[g + o])
                if a != b:
                    if a < b:
                        parent[b] = a
                    else:
                        parent[a] = b
    active = np.empty(n_active, np.int64)
    labels = np.empty(n_active, np.int64)
    first = np.full(n, -1, np.int64)
    count = 0
    i = 0
    for e in range(n):
        if sign[e] != 0:
            r = _find(parent, e)
            if first[r] < 0:
                first[r] = count
                count += 1
            active[i] = e
            labels[i] = first[r]
            i += 1
    return active, labels, count
