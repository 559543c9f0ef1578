"""Neighbour pairs for TFCE: for every element entering at its level, the neighbours already in a component
("old": higher level, relative to the element's sign) and the equal-level neighbours ("new", each pair once).

Two ways, with identical results: from the padded neighbour table of any graph (:func:`table_pairs`), and on
3-D grids by index arithmetic (:func:`grid_pairs`): the neighbours are visited along a path through the 3x3x3
neighbourhood and read from shifted views of a padded level grid, in element order (so the reads walk forward
through memory), and the pairs found are then moved to entering order by a counting scatter.  An old neighbour
that touches an old neighbour examined before it is skipped (they are joined already).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .graph import Adjacency, _GridLayout

__all__ = ["grid_pairs", "table_pairs"]

#: Elements whose neighbourhoods TFCE examines at a time.
_ROW_BLOCK = 16384


def table_pairs(
    adjacency: Adjacency, signed: np.ndarray, act: np.ndarray, alev: np.ndarray, two_sided: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Old and new neighbour pairs from the neighbour table (any graph), rows in entering order.

    Parameters
    ----------
    adjacency : Adjacency
    signed : ndarray of int, shape (n + 1,)
        Signed level of each element; slot n (the table's sentinel) is 0.
    act : ndarray of intp, shape (A,)
        Active elements in entering order; ``alev`` their absolute levels.
    two_sided : bool

    Returns
    -------
    old_row, old_nb, new_row, new_nb : ndarray of intp
        Row (position in ``act``) and neighbour element of each old pair (after skipping old
        neighbours joined to the one before them) and of each equal-level pair (kept once), sorted
        by row.
    """
    table, chains = adjacency.neighbour_table(), adjacency.neighbour_chain()
    sign = np.sign(signed[act]).astype(signed.dtype) if two_sided else None
    parts: list[tuple[np.ndarray, ...]] = []
    # Row blocks keep the (rows, D) temporaries small (cache-resident, no fresh pages per call).
    for r0 in range(0, act.size, _ROW_BLOCK):
        rows = slice(r0, min(act.size, r0 + _ROW_BLOCK))
        centre = act[rows]
        nb = np.take(table, centre, axis=0, mode="clip")
        nlev = np.take(signed, nb, mode="clip")
        if sign is not None:
            nlev *= sign[rows, None]
        own = alev[rows, None]
        is_old = nlev > own
        # Of a run of old neighbours that are neighbours of each other only the first is needed.
        is_old[:, 1:] &= ~(is_old[:, :-1] & np.take(chains, centre, axis=0)[:, 1:])
        flat_old = is_old.ravel().nonzero()[0]
        # Equal-level neighbours are rare: select them first, then keep each pair once.
        flat_new = (nlev == own).ravel().nonzero()[0]
        width = nb.shape[1]
        later = np.take(nb.ravel(), flat_new, mode="clip") > np.take(centre, flat_new // width, mode="clip")
        flat_new = flat_new[later]
        old_nb, new_nb = np.take(nb.ravel(), flat_old, mode="clip"), np.take(nb.ravel(), flat_new, mode="clip")
        parts.append((flat_old // width + r0, old_nb, flat_new // width + r0, new_nb))
    old_row, old_nb, new_row, new_nb = (np.concatenate([p[i] for p in parts]) for i in range(4))
    return old_row, old_nb, new_row, new_nb


def _popcount(x: np.ndarray) -> np.ndarray:
    """Number of set bits of each uint32 (``numpy.bitwise_count`` from numpy 2, else bit arithmetic)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(x)
    x = x - ((x >> np.uint32(1)) & np.uint32(0x55555555))
    x = (x & np.uint32(0x33333333)) + ((x >> np.uint32(2)) & np.uint32(0x33333333))
    x = (x + (x >> np.uint32(4))) & np.uint32(0x0F0F0F0F)
    return ((x * np.uint32(0x01010101)) >> np.uint32(24)).astype(np.uint8)


def grid_pairs(
    grid: _GridLayout, level_grid: np.ndarray, signed: np.ndarray, act: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The pairs of :func:`table_pairs` on a 3-D grid, found in element (grid) order.

    Working in element order makes every neighbour read a forward walk through the padded level
    grid (one ``take`` per offset, from a shifted view, no index arithmetic), instead of random
    reads in entering order; the pairs are then moved to entering order by a counting scatter.
    Equal-level pairs are kept from the element with the smaller index, which on the grid is the
    element seen through a positive offset.

    Parameters
    ----------
    grid : _GridLayout
    level_grid : ndarray of int, shape (grid.size,)
        Signed level of each padded-grid voxel (0 outside the mask).
    signed : ndarray of int, shape (n,)
        Signed level of each element (one-sided maps: levels >= 0).
    act : ndarray of intp, shape (A,)
        Active elements in entering order.

    Returns
    -------
    old_row, old_nb, new_row, new_nb : ndarray of intp
        As :func:`table_pairs`.
    """
    n = signed.size
    work = _GridWork.make(grid, level_grid, signed.dtype)
    parts: dict[str, list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = {"old": [], "new": []}
    per = {"old": np.zeros(n, dtype=np.intp), "new": np.zeros(n, dtype=np.intp)}  # pairs per element
    for e0 in range(0, n, _ROW_BLOCK):
        e1 = min(n, e0 + _ROW_BLOCK)
        old, new = _block_pairs(grid, work, signed, e0, e1)
        for kind, (bits, cols) in (("old", old), ("new", new)):
            pairs, per[kind][e0:e1] = _collect(grid, work, bits, e0, cols)
            parts[kind].append(pairs)
    # Position of each element in entering order; move the pairs there, keeping each element's
    # pairs together and in column order (a counting scatter, no sort).
    position = np.empty(n, dtype=np.intp)
    position[act] = np.arange(act.size)
    old_row, old_nb = _entering_rows(parts["old"], per["old"], act, position)
    new_row, new_nb = _entering_rows(parts["new"], per["new"], act, position)
    return old_row, old_nb, new_row, new_nb


@dataclass(frozen=True)
class _GridWork:
    """Views and work arrays of one scan of :func:`_grid_pairs` over blocks of elements."""

    shifted: list[np.ndarray]  # level_grid[g + offsets[c]] is shifted[c][g - lo]
    lo: int
    positive: np.ndarray  # columns of the positive offsets
    every: np.ndarray  # all columns
    below: np.ndarray  # below[c]: the bits of the columns before c
    nl: np.ndarray
    old: np.ndarray
    code: np.ndarray
    scratch: np.ndarray
    hit: np.ndarray

    @classmethod
    def make(cls, grid: _GridLayout, level_grid: np.ndarray, ltype: np.dtype) -> _GridWork:
        offsets = grid.offsets
        D = offsets.size
        lo = -int(offsets.min())
        hi = int(offsets.max())
        # A view per offset, no index arrays per column.
        shifted = [level_grid[lo + int(o) : level_grid.size - hi + int(o)] for o in offsets]
        below = (np.left_shift(np.uint32(1), np.arange(D, dtype=np.uint32)) - np.uint32(1)).astype(np.uint32)
        return cls(
            shifted, lo, np.flatnonzero(offsets > 0), np.arange(D), below,
            np.empty((D, _ROW_BLOCK), dtype=ltype), np.empty((D, _ROW_BLOCK), dtype=bool),
            np.empty(_ROW_BLOCK, dtype=np.uint32), np.empty(_ROW_BLOCK, dtype=np.uint32),
            np.empty(_ROW_BLOCK, dtype=bool),
        )


def _pack(bits: np.ndarray, out: np.ndarray, scratch: np.ndarray) -> None:
    """Bit c of out[e] = bits[c, e]."""
    out.fill(0)
    sw = scratch[: out.size]
    for c in range(bits.shape[0]):
        np.left_shift(bits[c], np.uint32(c), out=sw, dtype=np.uint32)
        np.bitwise_or(out, sw, out=out)


def _block_pairs(
    grid: _GridLayout, work: _GridWork, signed: np.ndarray, e0: int, e1: int
) -> tuple[tuple[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]:
    """The old and the equal-level ("new") pairs of elements [e0, e1), as (bits (C, w), columns) each."""
    w = e1 - e0
    g = grid.gindex[e0:e1] - work.lo
    lev = signed[e0:e1]
    own = np.abs(lev)
    NL, OLD = work.nl[:, :w], work.old[:, :w]
    for c in range(len(work.shifted)):
        np.take(work.shifted[c], g, out=NL[c])
    # Relative to the element's sign; inactive elements (sign 0) get no pairs.
    np.multiply(NL, np.sign(lev)[None, :], out=NL)
    np.greater(NL, own[None, :], out=OLD)
    # Skip an old neighbour when an earlier old neighbour (in path order) touches it: they are
    # joined already.  The old pattern of each element as a bit mask, tested per column.
    cw, sw, hw = work.code[:w], work.scratch[:w], work.hit[:w]
    _pack(OLD, cw, work.scratch)
    for c in range(1, len(work.shifted)):
        np.bitwise_and(cw, grid.earlier[c], out=sw)
        np.equal(sw, 0, out=hw)
        np.logical_and(OLD[c], hw, out=OLD[c])
    # Equal-level pairs, each once: seen from the earlier element, i.e. through positive offsets.
    eq = NL[work.positive] == own[None, :]
    eq &= (own > 0)[None, :]
    return (OLD, work.every), (eq, work.positive)


def _collect(
    grid: _GridLayout, work: _GridWork, bits: np.ndarray, e0: int, cols: np.ndarray
) -> tuple[tuple[np.ndarray, np.ndarray, np.ndarray], np.ndarray]:
    """The pairs marked in bits (C, w): (element, rank among its pairs, neighbour), and pairs per element."""
    w = bits.shape[1]
    cw = work.code[:w]
    _pack(bits, cw, work.scratch)
    per = _popcount(cw)
    # Pairs come in (column, element) order; an element's pairs are put back in column order
    # by their rank among its set bits.
    flat = bits.ravel().nonzero()[0]
    col = flat // w
    e_loc = flat - col * w
    rank = _popcount(np.bitwise_and(cw[e_loc], work.below[col]))
    centre = grid.gindex[e0 + e_loc]
    return (e_loc + e0, rank, grid.element[centre + grid.offsets[cols[col]]]), per


def _entering_rows(
    parts: list[tuple[np.ndarray, np.ndarray, np.ndarray]], per: np.ndarray, act: np.ndarray, position: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Rows (positions in entering order) and neighbours of the pairs, moved to entering order."""
    n = per.size
    el = np.concatenate([p[0] for p in parts])
    per_act = per[act]
    first = np.zeros(n, dtype=np.intp)
    first[act] = np.cumsum(per_act) - per_act  # start of each element's pairs in entering order
    dest = first[el]
    dest += np.concatenate([p[1] for p in parts])
    row = np.empty(el.size, dtype=np.intp)
    row[dest] = position[el]
    nb = np.empty(el.size, dtype=np.intp)
    nb[dest] = np.concatenate([p[2] for p in parts])
    return row, nb
