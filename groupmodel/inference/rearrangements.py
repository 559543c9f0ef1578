"""Sets of rearrangements of the rows of a linear model: permutations, sign flips, or both.

A rearrangement j maps the (residualised) data ``W`` (n rows) to ``W*`` with

    W*[i] = flips[j, i] * W[perm[j, i]],

that is, row i of the rearranged data is data row ``perm[j, i]``, multiplied by +1 or -1.
Rearrangement 0 is always the identity.

* ``"permute"``: row permutations, valid when the errors are exchangeable (Winkler et al. 2014).
* ``"flip"``: sign flips, valid when the errors are symmetric about 0; the test of a mean (one-sample
  or a combination of means), which a permutation of rows cannot move.
* ``"both"``: a permutation followed by sign flips (exchangeable and symmetric errors).

Exchangeability blocks: an integer label per row.  By default rows are permuted only within their
block; with ``whole_blocks=True`` whole blocks (of equal size) are permuted as units, keeping the
order inside each block, and sign flips are drawn per block.

Counting and enumeration: rows of equal class (``classes``: rows whose design side is identical,
e.g. the interest part of a two-group design) are indistinguishable for permutation, so two groups
of 5 and 6 rows have 462 distinct permutations (11!/(5! 6!)); sign flips count 2^n (2^blocks for
whole blocks); "both" counts the product.  When the number of distinct
rearrangements is at most the number asked for, all of them are enumerated exactly once
(``exhaustive=True``); otherwise J - 1 random rearrangements are drawn (with replacement, so a
repeat of the identity is possible, which keeps the test valid) from
``numpy.random.default_rng(seed)`` after the identity.  The random set depends only on
(n, blocks, whole_blocks, method, J, seed).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from ..errors import InputError

__all__ = [
    "Method",
    "PermutationSet",
    "count_rearrangements",
    "permutation_set",
]

Method = Literal["permute", "flip", "both"]
_METHODS = ("permute", "flip", "both")


@dataclass(frozen=True)
class PermutationSet:
    """A fixed, ordered set of rearrangements; rearrangement 0 is the identity.

    Attributes
    ----------
    perm : ndarray of int32, shape (J, n), or None
        ``perm[j, i]`` is the data row placed at row i (None: no permutation, method "flip").
    flips : ndarray of int8, shape (J, n), or None
        Signs (+1/-1) applied after permuting (None: method "permute").
    method : {"permute", "flip", "both"}
    exhaustive : bool
        True when the set is every distinct rearrangement, each once.
    n_possible : int
        Number of distinct rearrangements (exact integer; may be astronomically large).
    seed : int or None
        Seed of the random draws (None for an exhaustive set).
    blocks : ndarray of int64, shape (n,), or None
    whole_blocks : bool
    """

    perm: np.ndarray | None
    flips: np.ndarray | None
    method: str
    exhaustive: bool
    n_possible: int
    seed: int | None
    blocks: np.ndarray | None = None
    whole_blocks: bool = False

    @property
    def size(self) -> int:
        """J, the number of rearrangements including the identity."""
        ref = self.perm if self.perm is not None else self.flips
        return int(ref.shape[0])

    @property
    def n(self) -> int:
        """Number of rows."""
        ref = self.perm if self.perm is not None else self.flips
        return int(ref.shape[1])

    def batch(self, start: int, stop: int) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Rearrangements ``start:stop`` as (perm, flips), either possibly None."""
        perm = None if self.perm is None else self.perm[start:stop]
        flips = None if self.flips is None else self.flips[start:stop]
        return perm, flips


def _check_blocks(n: int, blocks: np.ndarray | None, whole_blocks: bool) -> np.ndarray | None:
    if blocks is None:
        if whole_blocks:
            raise InputError(
                "whole-block permutation needs block labels; got none (in permutation_set); "
                "pass one integer block label per row"
            )
        return None
    blocks = np.asarray(blocks)
    if blocks.shape != (n,):
        raise InputError(
            f"one block label per row was expected ({n}); got shape {blocks.shape} "
            "(in permutation_set); pass an integer label for every row of the design"
        )
    if not np.issubdtype(blocks.dtype, np.integer):
        if np.issubdtype(blocks.dtype, np.floating) and np.all(np.isfinite(blocks)) and np.all(
            blocks == np.round(blocks)
        ):
            blocks = blocks.astype(np.int64)
        else:
            raise InputError(
                f"block labels must be integers; got dtype {blocks.dtype} (in permutation_set); "
                "code the blocks as integers"
            )
    blocks = blocks.astype(np.int64)
    if whole_blocks:
        _, counts = np.unique(blocks, return_counts=True)
        if np.unique(counts).size > 1:
            raise InputError(
                f"whole-block permutation needs blocks of equal size; got sizes {sorted(set(counts.tolist()))} "
                "(in permutation_set); permute within blocks instead, or make the blocks equal"
            )
    return blocks


def _block_rows(blocks: np.ndarray | None, n: int) -> list[np.ndarray]:
    """Row indices of each block (ascending), blocks in ascending label order."""
    if blocks is None:
        return [np.arange(n)]
    labels = np.unique(blocks)
    return [np.flatnonzero(blocks == b) for b in labels]


def _multinomial(counts: list[int]) -> int:
    total, out = 0, 1
    for c in counts:
        total += c
        out *= math.comb(total, c)
    return out


def _block_types(groups: list[np.ndarray], classes: np.ndarray) -> list[tuple]:
    """Each block's sequence of row classes (whole blocks are interchangeable iff equal)."""
    return [tuple(classes[g].tolist()) for g in groups]


def count_rearrangements(
    n: int,
    method: Method,
    blocks: np.ndarray | None = None,
    whole_blocks: bool = False,
    classes: np.ndarray | None = None,
) -> int:
    """Number of distinct rearrangements (exact integer).

    Parameters
    ----------
    n : int
        Number of rows.
    method : {"permute", "flip", "both"}
    blocks : ndarray of int, shape (n,), optional
    whole_blocks : bool
    classes : ndarray of int, shape (n,), optional
        Rows of equal class are indistinguishable for permutation (default: all distinct).

    Returns
    -------
    int
        Permutations: product over blocks of multinomial(class counts in the block), or for whole
        blocks multinomial(counts of identical blocks); sign flips: 2^n (2^number of blocks for
        whole blocks); "both": the product.
    """
    if method not in _METHODS:
        raise InputError(f"method must be one of {_METHODS}; got {method!r} (in count_rearrangements)")
    blocks = _check_blocks(n, blocks, whole_blocks)
    classes = np.arange(n) if classes is None else np.asarray(classes)
    groups = _block_rows(blocks, n)
    n_perm = 1
    if method in ("permute", "both"):
        if whole_blocks:
            n_perm = _multinomial(_count_equal(_block_types(groups, classes)))
        else:
            for g in groups:
                _, counts = np.unique(classes[g], return_counts=True)
                n_perm *= _multinomial(counts.tolist())
    n_flip = 1
    if method in ("flip", "both"):
        n_flip = 2 ** (len(groups) if whole_blocks else n)
    return n_perm * n_flip


def _count_equal(items: list[tuple]) -> list[int]:
    counts: dict[tuple, int] = {}
    for it in items:
        counts[it] = counts.get(it, 0) + 1
    return list(counts.values())


def _arrangements(labels: list) -> list[tuple]:
    """All distinct orderings of a multiset, as tuples (the given order among them)."""
    values = sorted(set(labels), key=lambda v: labels.index(v))
    counts = [labels.count(v) for v in values]
    n = len(labels)
    out: list[tuple] = []

    def place(free: tuple[int, ...], which: int, current: list) -> None:
        if which == len(values) - 1:
            for p in free:
                current[p] = values[which]
            out.append(tuple(current))
            return
        for chosen in itertools.combinations(free, counts[which]):
            for p in chosen:
                current[p] = values[which]
            chosen_set = set(chosen)
            place(tuple(p for p in free if p not in chosen_set), which + 1, current)

    place(tuple(range(n)), 0, [None] * n)
    return out


def _perm_from_arrangement(design_rows: np.ndarray, arrangement: tuple, classes: np.ndarray) -> np.ndarray:
    """A permutation of ``design_rows`` realising an arrangement of classes over the data rows.

    Data row ``design_rows[k]`` is paired with a design row of class ``arrangement[k]`` (the
    design rows of each class taken in ascending order), and ``perm`` is the inverse pairing:
    ``perm[design row] = data row``.
    """
    by_class: dict = {}
    for r in design_rows:
        by_class.setdefault(classes[r], []).append(r)
    used: dict = {c: 0 for c in by_class}
    perm = {}
    for k, c in zip(design_rows, arrangement, strict=True):
        d = by_class[c][used[c]]
        used[c] += 1
        perm[d] = k
    return np.array([perm[r] for r in design_rows])


def _enumerate_perms(n: int, groups: list[np.ndarray], whole_blocks: bool, classes: np.ndarray) -> np.ndarray:
    """Every distinct permutation (rows of an (M, n) array); the identity first."""
    if whole_blocks:
        types = _block_types(groups, classes)
        arrangements = _arrangements(types)
        perms = []
        for arr in arrangements:
            # Data block slot s receives a design block of type arr[s] (blocks of a type in order).
            by_type: dict = {}
            for b, t in enumerate(types):
                by_type.setdefault(t, []).append(b)
            used = {t: 0 for t in by_type}
            perm = np.arange(n)
            for s, t in enumerate(arr):
                b = by_type[t][used[t]]
                used[t] += 1
                perm[groups[b]] = groups[s]  # design block b takes the rows of data block s
            perms.append(perm)
        out = np.array(perms)
    else:
        per_block = []
        for g in groups:
            labels = classes[g].tolist()
            per_block.append([_perm_from_arrangement(g, arr, classes) for arr in _arrangements(labels)])
        rows = []
        for combo in itertools.product(*per_block):
            perm = np.arange(n)
            for g, pg in zip(groups, combo, strict=True):
                perm[g] = pg
            rows.append(perm)
        out = np.array(rows)
    return _identity_first(out)


def _identity_first(rows: np.ndarray) -> np.ndarray:
    ident = np.arange(rows.shape[1]) if rows.dtype != np.int8 else np.ones(rows.shape[1], np.int8)
    hit = np.flatnonzero((rows == ident).all(axis=1))
    if hit.size != 1:
        raise AssertionError("the enumeration must contain the identity exactly once")
    order = np.concatenate([hit, np.delete(np.arange(rows.shape[0]), hit)])
    return rows[order]


def _enumerate_flips(n: int, groups: list[np.ndarray], whole_blocks: bool) -> np.ndarray:
    units = len(groups) if whole_blocks else n
    signs = np.array(list(itertools.product((1, -1), repeat=units)), dtype=np.int8).reshape(-1, units)
    if not whole_blocks:
        return signs
    out = np.empty((signs.shape[0], n), dtype=np.int8)
    for b, g in enumerate(groups):
        out[:, g] = signs[:, [b]]
    return out


def _random_perms(rng: np.random.Generator, n: int, J: int, groups: list[np.ndarray], whole_blocks: bool) -> np.ndarray:
    if whole_blocks:
        nb = len(groups)
        order = rng.permuted(np.tile(np.arange(nb), (J, 1)), axis=1)
        stacked = np.stack(groups)  # (blocks, rows per block)
        perm = np.empty((J, n), dtype=np.int64)
        for b, g in enumerate(groups):
            perm[:, g] = stacked[order[:, b]]
        return perm
    perm = np.empty((J, n), dtype=np.int64)
    for g in groups:
        perm[:, g] = g[rng.permuted(np.tile(np.arange(g.size), (J, 1)), axis=1)]
    return perm


def _random_flips(rng: np.random.Generator, n: int, J: int, groups: list[np.ndarray], whole_blocks: bool) -> np.ndarray:
    units = len(groups) if whole_blocks else n
    signs = (1 - 2 * rng.integers(0, 2, size=(J, units))).astype(np.int8)
    if not whole_blocks:
        return signs
    out = np.empty((J, n), dtype=np.int8)
    for b, g in enumerate(groups):
        out[:, g] = signs[:, [b]]
    return out


def _all_rearrangements(
    n: int, groups: list[np.ndarray], whole_blocks: bool, classes: np.ndarray, do_perm: bool, do_flip: bool
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Every distinct rearrangement (permutations, flips, or their Cartesian product), the identity first."""
    perms = _enumerate_perms(n, groups, whole_blocks, classes) if do_perm else None
    flips = _enumerate_flips(n, groups, whole_blocks) if do_flip else None
    if perms is not None and flips is not None:
        # Cartesian product, identity (first perm, all-plus flips) first.
        P, F = perms.shape[0], flips.shape[0]
        perms = np.repeat(perms, F, axis=0)
        flips = np.tile(flips, (P, 1))
    return perms, flips


def _random_rearrangements(
    rng: np.random.Generator, n: int, J: int, groups: list[np.ndarray], whole_blocks: bool, do_perm: bool,
    do_flip: bool,
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The identity, then J random rearrangements (the permutations drawn before the flips)."""
    perms = flips = None
    if do_perm:
        perms = np.vstack([np.arange(n)[None, :], _random_perms(rng, n, J, groups, whole_blocks)])
    if do_flip:
        flips = np.vstack([np.ones((1, n), np.int8), _random_flips(rng, n, J, groups, whole_blocks)])
    return perms, flips


def permutation_set(
    n: int,
    n_perm: int,
    method: Method,
    *,
    blocks: np.ndarray | None = None,
    whole_blocks: bool = False,
    seed: int = 0,
    classes: np.ndarray | None = None,
) -> PermutationSet:
    """The rearrangements used for a permutation test.

    Parameters
    ----------
    n : int
        Number of rows (observations).
    n_perm : int
        J, the number of rearrangements wanted, identity included (>= 2).  If at most J distinct
        rearrangements exist, all of them are used instead (exhaustive).
    method : {"permute", "flip", "both"}
    blocks : ndarray of int, shape (n,), optional
        Exchangeability block of each row.
    whole_blocks : bool
        Permute (and flip) whole blocks instead of rows within blocks.
    seed : int
        Seed for ``numpy.random.default_rng``.
    classes : ndarray of int, shape (n,), optional
        Rows with equal class have identical interest parts (see :func:`count_rearrangements`).

    Returns
    -------
    PermutationSet
    """
    if method not in _METHODS:
        raise InputError(
            f"method must be one of {_METHODS}; got {method!r} (in permutation_set); "
            "use 'permute' for exchangeable errors or 'flip' for the one-sample case"
        )
    if int(n_perm) < 2:
        raise InputError(f"at least 2 rearrangements are needed; got n_perm={n_perm} (in permutation_set)")
    if n < 1:
        raise InputError(f"at least one row is needed; got n={n} (in permutation_set)")
    n_perm = int(n_perm)
    blocks = _check_blocks(n, blocks, whole_blocks)
    classes = np.arange(n) if classes is None else np.asarray(classes)
    if classes.shape != (n,):
        raise InputError(f"classes must have shape ({n},); got {classes.shape} (in permutation_set)")
    groups = _block_rows(blocks, n)
    total = count_rearrangements(n, method, blocks, whole_blocks, classes)
    do_perm = method in ("permute", "both")
    do_flip = method in ("flip", "both")
    if total <= n_perm:
        perms, flips = _all_rearrangements(n, groups, whole_blocks, classes, do_perm, do_flip)
        exhaustive, used_seed = True, None
    else:
        rng = np.random.default_rng(seed)
        perms, flips = _random_rearrangements(rng, n, n_perm - 1, groups, whole_blocks, do_perm, do_flip)
        exhaustive, used_seed = False, int(seed)
    return PermutationSet(
        perm=None if perms is None else perms.astype(np.int32),
        flips=flips,
        method=method,
        exhaustive=exhaustive,
        n_possible=int(total),
        seed=used_seed,
        blocks=blocks,
        whole_blocks=bool(whole_blocks),
    )
