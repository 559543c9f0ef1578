"""Threshold-free cluster enhancement (TFCE) over a generic neighbourhood graph.

TFCE (Smith and Nichols 2009, NeuroImage 44(1):83-98) replaces each element's statistic by

    TFCE(v) = sum over thresholds h_k <= x(v) of  e(v, h_k)^E * h_k^H * dh,

where ``e(v, h)`` is the number of elements in the connected component of ``{x >= h}`` that
contains ``v``.  The defaults E = 0.5 and H = 2 are the paper's choice for 3-D images.

Discretisation (stated because results depend on it)
-----------------------------------------------------
Thresholds are ``h_k = k * dh`` (``rule="right"``, the usual sum h = dh, 2 dh, ...) or
``h_k = (k - 1/2) * dh`` (``rule="midpoint"``, second-order accurate), for k = 1, 2, ....  An
element reaches threshold ``h_k`` when ``x >= h_k``; values within ``1e-9 * dh`` below a threshold
count as reaching it, so that binary rounding (``30 * 0.1 != 3.0``) does not drop a level.  Only
positive values are enhanced; with ``two_sided=True`` the negative part is enhanced separately (as
``-x``) and returned with a negative sign, the common practice for two-sided t maps.  Positive and
negative elements are never joined into one cluster.

Algorithm
---------
One pass over the elements sorted by level (highest first) with union-find:

* at level k the elements of level k enter; an edge becomes active at the lower level of its two
  endpoints.  The unions of one level are done as a batch: each entering element is hooked to the
  current root of one existing neighbouring component, and the few remaining unions (entering
  elements touching several components, or each other) are resolved by vectorised min-label
  hooking with pointer jumping.  The cost is proportional to the number of elements and edges (plus
  a fixed cost per level), not to levels x elements as relabelling at every threshold would be.
* an existing neighbour that touches another existing neighbour examined before it is skipped:
  the edge between them became active at a higher level, so they are in one component already.
  On 3-D grids the neighbours are visited along a path through the 3x3x3 neighbourhood and read
  from shifted views of a padded level grid, in element order (so the reads walk forward through
  memory), and the pairs found are then moved to entering order by a counting scatter; on smooth
  maps this leaves about 1.5 root look-ups per entering element instead of about 10;
* every component root carries a lazy accumulator: the sum of ``size^E h^H dh`` over the levels it
  has lived through, brought up to date only when its size changes (``size^E (S[last] - S[k])``,
  ``S`` the prefix sums of ``h^H dh``);
* an element that joins a component remembers the root's accumulator at that moment (its offset),
  and a root absorbed by a larger one (union by size) remembers the absorber's accumulator at that
  moment (its base).  After the last level an element's TFCE is its root's final accumulator minus
  its offset, plus, along the chain of absorptions, each absorber's final accumulator minus the
  base recorded when it absorbed.

On 3-D grids the same union-find runs compiled when numba is installed (the optional extra ``fast``,
:mod:`groupmodel.inference.compiled`; ``GROUPMODEL_NO_COMPILED=1`` turns it off): same levels, thresholds
and weights, same results to rounding.  This module is its reference and the fallback.

Connectivity is a sparse adjacency over the in-mask elements (:class:`Adjacency`, in
:mod:`groupmodel.inference.graph`), which serves 3-D grids (:func:`grid_adjacency`, 6/18/26 neighbours)
and triangle meshes (:func:`mesh_adjacency`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..errors import InputError
from .fastpath import compiled_kernels
from .graph import Adjacency
from .tfce_pairs import grid_pairs, table_pairs

__all__ = [
    "DH_RULE", "DH_SIGNIFICANT_DIGITS", "Adjacency", "TfceParams", "default_step", "tfce", "tfce_levels", "tfce_max",
]

Rule = Literal["right", "midpoint"]

#: Values within this fraction of a step below a threshold count as reaching it (see module doc).
_LEVEL_SLACK = 1e-9
#: Significant digits of the default step: the largest observed value differs in its last bits between
#: chunk sizes, threads and machines (BLAS), so the step derived from it is rounded to a stable value.
DH_SIGNIFICANT_DIGITS = 6
#: The default step, in words (recorded with every TFCE map).
DH_RULE = f"largest observed value / 100, rounded to {DH_SIGNIFICANT_DIGITS} significant digits"
#: Step used when the observed map has no positive finite value.
_FALLBACK_DH = 0.1


def default_step(top: float) -> float:
    """The default TFCE step from the largest observed value: ``top / 100`` to ``DH_SIGNIFICANT_DIGITS``
    significant digits (0.1 when ``top`` is not a positive finite number).

    Rounding makes the step, and so every TFCE map, the same whichever last bits the maximum has
    (``0.10543769596335156`` and ``0.10543769596335176`` both give ``0.105438``).
    """
    if not (np.isfinite(top) and top > 0):
        return _FALLBACK_DH
    return float(f"{top / 100:.{DH_SIGNIFICANT_DIGITS}g}")


@dataclass(frozen=True)
class TfceParams:
    """TFCE settings, recorded with every TFCE map.

    Attributes
    ----------
    E : float
        Extent exponent (default 0.5, Smith and Nichols 2009).
    H : float
        Height exponent (default 2).
    dh : float or None
        Threshold step in units of the statistic.  None means "one hundredth of the largest
        enhanced value of the observed map, to 6 significant digits" (:func:`default_step`), fixed once
        from the observed (unpermuted) map and then used for every permutation, so that all maps are
        enhanced by the same function.
    rule : {"right", "midpoint"}
        Thresholds ``k dh`` or ``(k - 1/2) dh``, k = 1, 2, ...
    """

    E: float = 0.5
    H: float = 2.0
    dh: float | None = None
    rule: Rule = "right"

    def with_dh(self, dh: float) -> TfceParams:
        """The same settings with a fixed step."""
        return TfceParams(self.E, self.H, float(dh), self.rule)


def tfce_levels(x: np.ndarray, dh: float, rule: Rule = "right") -> np.ndarray:
    """Number of thresholds each value reaches (0 when it reaches none).

    Parameters
    ----------
    x : ndarray of float, shape (n,)
        Statistic values; NaN and non-positive values get level 0.
    dh : float
        Threshold step (> 0).
    rule : {"right", "midpoint"}

    Returns
    -------
    ndarray of int32, shape (n,)
        ``max{k : h_k <= x}`` with ``h_k = k dh`` or ``(k - 1/2) dh`` (0 if none).
    """
    _check_step(dh, rule)
    shift = 0.5 if rule == "midpoint" else 0.0
    with np.errstate(invalid="ignore"):
        scaled = np.asarray(x, dtype=np.float64) / dh + (shift + _LEVEL_SLACK)
        scaled = np.where(scaled > 0, scaled, 0.0)  # NaN -> 0
    return np.floor(scaled).astype(np.int32)


def _check_step(dh: float, rule: str) -> None:
    if not (isinstance(dh, (int, float, np.floating)) and np.isfinite(dh) and dh > 0):
        raise InputError(f"the TFCE step dh must be a positive number; got {dh!r} (in tfce); pass dh > 0")
    if rule not in ("right", "midpoint"):
        raise InputError(f"TFCE rule must be 'right' or 'midpoint'; got {rule!r} (in tfce)")


def tfce_max(
    x: np.ndarray,
    adjacency: Adjacency,
    dh: float,
    E: float = 0.5,
    H: float = 2.0,
    rule: Rule = "right",
    two_sided: bool = False,
) -> float:
    """The largest |TFCE| of a map (the null statistic of a rearrangement): ``abs(tfce(...)).max()``, 0 for an
    empty map.  On 3-D grids with the compiled kernels the levels are formed and the maximum taken inside the
    kernel (the same integers and the same union-find as :func:`tfce`), without the map in between."""
    grid = adjacency._cache.get("grid")
    kernels = compiled_kernels() if grid is not None else None
    x = np.asarray(x, dtype=np.float64).ravel()
    if kernels is None or x.size != adjacency.n:
        t = tfce(x, adjacency, dh, E, H, rule, two_sided)
        return float(np.abs(t).max()) if t.size else 0.0
    _check_step(dh, rule)
    shift = (0.5 if rule == "midpoint" else 0.0) + _LEVEL_SLACK
    levels, K = kernels.grid_levels(x, float(dh), shift, bool(two_sided))
    if K == 0:
        return 0.0
    S = _prefix_weights(int(K), dh, H, rule)
    return float(kernels.tfce_grid_max(levels, int(K), grid.gindex, grid.offsets, grid.earlier, grid.size, S,
                                       float(E)))


def _prefix_weights(K: int, dh: float, H: float, rule: Rule) -> np.ndarray:
    """``S[k] = sum_{j <= k} h_j^H dh`` for k = 0..K (S[0] = 0)."""
    k = np.arange(1, K + 1, dtype=np.float64)
    h = (k - 0.5) * dh if rule == "midpoint" else k * dh
    out = np.zeros(K + 1)
    np.cumsum(h**H * dh, out=out[1:])
    return out


def tfce(
    x: np.ndarray,
    adjacency: Adjacency,
    dh: float,
    E: float = 0.5,
    H: float = 2.0,
    rule: Rule = "right",
    two_sided: bool = False,
) -> np.ndarray:
    """TFCE of a statistic map.

    Parameters
    ----------
    x : ndarray of float, shape (n,)
        Statistic over the in-mask elements of ``adjacency``; NaN counts as 0.
    adjacency : Adjacency
        Neighbourhood graph over the same n elements.
    dh : float
        Threshold step (> 0), in units of ``x``.
    E, H : float
        Extent and height exponents (Smith and Nichols 2009: 0.5 and 2).
    rule : {"right", "midpoint"}
        Threshold grid, see the module docstring.
    two_sided : bool
        False: enhance the positive part only (values below the first threshold get 0).
        True: also enhance the negative part (as ``-x``) and return it with a negative sign.

    Returns
    -------
    ndarray of float64, shape (n,)
        TFCE values, in units of ``elements^E * x^(H+1)``.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    n = adjacency.n
    if x.size != n:
        raise InputError(
            f"the map has {x.size} values but the adjacency has {n} elements (in tfce); "
            "pass the in-mask values in the order used to build the adjacency"
        )
    out = np.zeros(n)
    levels = tfce_levels(x, dh, rule)
    if two_sided:
        levels -= tfce_levels(-x, dh, rule)
    K = int(np.abs(levels).max()) if n else 0
    if K == 0:
        return out
    S = _prefix_weights(K, dh, H, rule)
    grid = adjacency._cache.get("grid")
    kernels = compiled_kernels() if grid is not None else None
    if kernels is not None:  # the same union-find, compiled (optional extra "fast"); this module is its reference
        g = grid
        return kernels.tfce_grid(levels, K, g.gindex, g.offsets, g.earlier, g.size, S, float(E))
    order = _entering_order(levels, K)
    pairs = _level_pairs(adjacency, order, levels, two_sided)
    forest = _Forest(n, K)
    for k in range(K, 0, -1):
        if order.row_hi[k] == order.row_lo[k]:
            continue
        new = order.act[order.row_lo[k] : order.row_hi[k]]
        rows, roots_of, roots = _touched_roots(forest, pairs, k)
        lab_new, lab_roots = _batch_union(forest, order.act, pairs, k, new, rows, roots_of, roots)
        _merge(forest, k, new, roots, lab_new, lab_roots, S, E)
    out = _element_values(forest, order.act, S, E, K)
    if two_sided:
        np.negative(out, out=out, where=order.signed[:n] < 0)
    return out


@dataclass(frozen=True)
class _Order:
    """Active elements in entering order: level descending, element index ascending within a level.

    Attributes
    ----------
    signed : ndarray of int16 or int32, shape (n + 1,)
        Signed level of each element; slot n is the sentinel that pads the neighbour table (0).
    act, alev : ndarray
        Active elements in entering order, and their absolute levels.
    row_lo, row_hi : ndarray of int64, shape (K + 2,)
        Rows of level k occupy ``act[row_lo[k]:row_hi[k]]``.
    """

    signed: np.ndarray
    act: np.ndarray
    alev: np.ndarray
    row_lo: np.ndarray
    row_hi: np.ndarray


def _entering_order(levels: np.ndarray, K: int) -> _Order:
    n = levels.size
    ltype = np.int16 if K < np.iinfo(np.int16).max else np.int32
    signed = np.zeros(n + 1, dtype=ltype)  # slot n: the sentinel that pads the neighbour table
    signed[:n] = levels
    absolute = np.abs(signed[:n])
    active = np.flatnonzero(absolute)
    alev = absolute[active]
    order = np.argsort(-alev, kind="stable")
    act, alev = active[order], alev[order]
    counts = np.bincount(alev, minlength=K + 1)
    row_hi = np.zeros(K + 2, dtype=np.int64)
    row_hi[1 : K + 1] = np.cumsum(counts[:0:-1])[::-1]
    row_lo = np.zeros(K + 2, dtype=np.int64)
    row_lo[1 : K + 1] = row_hi[1 : K + 1] - counts[1:]
    return _Order(signed, act, alev, row_lo, row_hi)


@dataclass(frozen=True)
class _Pairs:
    """The old and new neighbour pairs of every entering element, and where each level's pairs lie.

    ``old_row``/``old_nb`` and ``new_row``/``new_nb`` as returned by :func:`table_pairs`; ``row_start``
    marks where a row's run of old neighbours starts (for de-duplicating (row, root) pairs);
    ``old_lo[k]:old_hi[k]`` and ``new_lo[k]:new_hi[k]`` are the pairs of level k.
    """

    old_row: np.ndarray
    old_nb: np.ndarray
    new_row: np.ndarray
    new_nb: np.ndarray
    row_start: np.ndarray
    old_lo: np.ndarray
    old_hi: np.ndarray
    new_lo: np.ndarray
    new_hi: np.ndarray


def _level_pairs(adjacency: Adjacency, order: _Order, levels: np.ndarray, two_sided: bool) -> _Pairs:
    """All neighbourhoods at once.

    Relative to its row's sign, a neighbour is "old" (in an existing component) if its level is higher,
    and "new" if equal; an equal-level pair is kept once.  An old neighbour that touches another old
    neighbour is already in the same component (their edge became active at a higher level), so one
    neighbour per touching group is enough.
    """
    n = adjacency.n
    grid = adjacency._cache.get("grid")
    if grid is not None:
        level_grid = np.zeros(grid.size, dtype=order.signed.dtype)
        level_grid[grid.gindex] = levels
        old_row, old_nb, new_row, new_nb = grid_pairs(grid, level_grid, order.signed[:n], order.act)
    else:
        old_row, old_nb, new_row, new_nb = table_pairs(adjacency, order.signed, order.act, order.alev, two_sided)
    row_start = np.ones(old_row.size, dtype=bool)
    np.not_equal(old_row[1:], old_row[:-1], out=row_start[1:])
    return _Pairs(
        old_row, old_nb, new_row, new_nb, row_start,
        np.searchsorted(old_row, order.row_lo), np.searchsorted(old_row, order.row_hi),
        np.searchsorted(new_row, order.row_lo), np.searchsorted(new_row, order.row_hi),
    )


class _Forest:
    """Union-find state, indexed by element (slot n unused).  A root is one of its elements."""

    def __init__(self, n: int, K: int) -> None:
        ident = np.arange(n + 1, dtype=np.intp)
        self.up = ident.copy()  # absorbed root -> its absorber or a later root of the same component
        self.lab = ident.copy()  # scratch labels of one level's batch union (restored after each level)
        self.slot = np.zeros(n + 1, dtype=np.intp)  # scratch
        self.best = np.zeros(n + 1, dtype=np.int64)  # scratch
        self.leaf = ident.copy()  # root the element joined (itself until it enters)
        self.offset = np.zeros(n + 1)  # that root's accumulator when the element joined
        self.acc = np.zeros(n + 1)  # lazy accumulators of roots
        self.size = np.zeros(n + 1)
        self.last = np.zeros(n + 1, dtype=np.int64)  # level of the last accumulator update
        self.base = np.zeros(n + 1)  # absorber's accumulator at the absorption
        self.absorbed_at: list[tuple[np.ndarray, np.ndarray] | None] = [None] * (K + 1)
        self.n1 = np.int64(n + 1)


def _touched_roots(f: _Forest, pairs: _Pairs, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The current roots the old neighbours of level k belong to: (row, root) pairs, and the distinct roots."""
    up, slot = f.up, f.slot
    o0, o1 = pairs.old_lo[k], pairs.old_hi[k]
    rows = pairs.old_row[o0:o1]
    roots_of = f.leaf[pairs.old_nb[o0:o1]]
    if roots_of.size:
        # Keep one entry per (row, recorded root): neighbours of one element mostly share it.
        keep = pairs.row_start[o0:o1].copy()
        keep[1:] |= roots_of[1:] != roots_of[:-1]
        rows, roots_of = rows[keep], roots_of[keep]
        # Follow absorptions to the current roots, then compress the paths looked up.
        nxt = up[roots_of]
        stale = (nxt != roots_of).nonzero()[0]
        if stale.size:
            looked_up, recorded = stale, roots_of[stale]
            while stale.size:
                roots_of[stale] = nxt[stale]
                nxt[stale] = up[nxt[stale]]
                stale = stale[nxt[stale] != roots_of[stale]]
            up[recorded] = roots_of[looked_up]
            # Absorbed roots recorded by different neighbours now coincide: de-duplicate again.
            keep = pairs.row_start[o0:o1][keep]
            keep[1:] |= roots_of[1:] != roots_of[:-1]
            rows, roots_of = rows[keep], roots_of[keep]
    # Distinct roots touched at this level.
    pos = np.arange(roots_of.size, dtype=np.intp)
    slot[roots_of] = pos
    roots = roots_of[slot[roots_of] == pos]
    return rows, roots_of, roots


def _batch_union(
    f: _Forest,
    act: np.ndarray,
    pairs: _Pairs,
    k: int,
    new: np.ndarray,
    rows: np.ndarray,
    roots_of: np.ndarray,
    roots: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Component labels of the entering elements and of the touched roots after the unions of level k.

    Each entering element is hooked to one root it touches, then the rest (elements touching several
    roots, and entering elements touching each other) is resolved by min-label hooking with pointer jumping.
    """
    lab = f.lab
    a_old = act[rows]
    lab[a_old] = roots_of
    n0, n1_ = pairs.new_lo[k], pairs.new_hi[k]
    a = np.concatenate([a_old, act[pairs.new_row[n0:n1_]]])
    b = np.concatenate([roots_of, pairs.new_nb[n0:n1_]])
    nodes = np.concatenate([new, roots])
    la, lb = lab[a], lab[b]
    cross = (la != lb).nonzero()[0]
    while cross.size:
        a, b, la, lb = a[cross], b[cross], la[cross], lb[cross]
        np.minimum.at(lab, np.maximum(la, lb), np.minimum(la, lb))
        while True:  # pointer jumping until every node points at a root
            ln = lab[nodes]
            lln = lab[ln]
            if (ln == lln).all():
                break
            lab[nodes] = lln
        la, lb = lab[a], lab[b]
        cross = (la != lb).nonzero()[0]
    lab_new = lab[new]
    lab_roots = lab[roots]
    lab[nodes] = nodes
    return lab_new, lab_roots


def _merge(
    f: _Forest,
    k: int,
    new: np.ndarray,
    roots: np.ndarray,
    lab_new: np.ndarray,
    lab_roots: np.ndarray,
    S: np.ndarray,
    E: float,
) -> None:
    """Per component: the continuing root is its largest old root (union by size), else the entering
    element that labels it; accumulators brought up to date, absorptions and joins recorded."""
    slot, size, acc, last = f.slot, f.size, f.acc, f.last
    slot[lab_new] = lab_new
    if roots.size:
        acc[roots] += size[roots] ** E * (S[last[roots]] - S[k])
        key = size[roots].astype(np.int64) * f.n1 + roots
        f.best[lab_roots] = -1
        np.maximum.at(f.best, lab_roots, key)
        keeper = (f.best[lab_roots] % f.n1).astype(np.intp)
        slot[lab_roots] = keeper
        gone = (roots != keeper).nonzero()[0]
        if gone.size:
            g, t = roots[gone], keeper[gone]
            np.add.at(size, t, size[g])
            f.up[g] = t
            f.base[g] = acc[t]
            f.absorbed_at[k] = (g, t)
        last[keeper] = k
    joined = slot[lab_new]
    np.add.at(size, joined, 1.0)
    last[joined] = k
    f.leaf[new] = joined
    f.offset[new] = acc[joined]  # 0 for roots born at this level


def _element_values(f: _Forest, act: np.ndarray, S: np.ndarray, E: float, K: int) -> np.ndarray:
    """Every element's TFCE from the final accumulators, offsets and inherited contributions."""
    n = f.leaf.size - 1
    acc, size = f.acc, f.size
    # Final update of the surviving roots down to level 0.
    alive = act[(f.up[act] == act) & (size[act] > 0)]
    acc[alive] += size[alive] ** E * (S[f.last[alive]] - S[0])
    # Contributions inherited through absorptions, from the latest (lowest level) upward.
    inherited = np.zeros(n + 1)
    for k in range(1, K + 1):
        absorbed = f.absorbed_at[k]
        if absorbed is not None:
            g, t = absorbed
            inherited[g] = inherited[t] + acc[t] - f.base[g]
    # All elements at once, in element order (reads walk forward through memory); an inactive
    # element is its own leaf with no accumulator, offset or inheritance, so it gets 0.
    joined = f.leaf[:n]
    out = acc[joined]
    out -= f.offset[:n]
    out += inherited[joined]
    return out
