"""A reordering of design rows as one simple permutation where it is one, and in words.

The design rows carry labels (their cell, and their covariate value where a column tells it); the participants
in table order carry the same labels.  The simplest permutation taking one to the other is sought among:
two rows swapped, a block of rows moved (a rotation of a stretch of rows; a block shifted by one row is a
rotation by one), a reversed block, the table stably sorted by one or more factors, several swaps; otherwise
rows keep their place where their label allows and the others take the remaining places in order.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import permutations

import numpy as np

__all__ = ["Family", "cycles_of", "family_text", "ids_span", "runs_text", "simplest_family", "span"]

#: How far beyond the first and last misplaced row a moved or reversed block is looked for.
BLOCK_SLACK = 6
#: At most this many numbers are printed when the reordering is listed row by row.
MAX_LISTED_ROWS = 60


@dataclass(frozen=True)
class Family:
    """What kind of permutation: ``swap``, ``swaps``, ``rotate``, ``reverse``, ``sorted`` or ``other``."""

    kind: str
    start: int = 0
    stop: int = 0
    shift: int = 0
    pairs: tuple[tuple[int, int], ...] = ()
    factors: tuple[str, ...] = ()
    blocks: tuple[tuple[int, int, str], ...] = field(default_factory=tuple)


def simplest_family(row: np.ndarray, pos: np.ndarray, keys: dict[str, tuple[np.ndarray, np.ndarray]]
                    ) -> tuple[np.ndarray, Family]:
    """The simplest permutation and its family.

    ``keys`` maps factor -> (level index per design row, level index per position), for sorts.
    """
    n = row.size
    ident = np.arange(n)
    if np.array_equal(row, pos):
        return ident, Family("none")
    cands: list[tuple[int, int, np.ndarray, Family]] = []
    local = _local(row, pos)
    if local is not None:
        cands.append((_moved(local[0]), 0, *local))
    for order, fam in _sorts(row, pos, keys):
        cands.append((_moved(order), 1, order, fam))
        break
    general = _general(row, pos)
    cycles = _cycles(general)
    if all(len(c) == 2 for c in cycles):
        pairs = tuple(sorted((min(c), max(c)) for c in cycles))
        cands.append((_moved(general), 2, general, Family("swaps", pairs=pairs)))
    cands.append((_moved(general), 3, general, Family("other")))
    # A named family (a swap, a moved or reversed block, a sort) before a list of rows, then the fewest rows moved.
    best = min(cands, key=lambda c: (c[1] >= 2, c[0], c[1]))
    return best[2], best[3]


def _moved(order: np.ndarray) -> int:
    return int((order != np.arange(order.size)).sum())


def _general(row: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Rows keep their place where the labels agree; the others take the free places of their label in order."""
    n = row.size
    order = np.full(n, -1)
    stay = row == pos
    order[stay] = np.flatnonzero(stay)
    free: dict[int, list[int]] = {}
    for k in np.flatnonzero(~stay):
        free.setdefault(int(pos[k]), []).append(int(k))
    for i in np.flatnonzero(~stay):
        order[i] = free[int(row[i])].pop(0)
    return order


def _cycles(order: np.ndarray) -> list[list[int]]:
    seen = np.zeros(order.size, dtype=bool)
    out = []
    for i in range(order.size):
        if seen[i] or order[i] == i:
            continue
        cyc = []
        j = i
        while not seen[j]:
            seen[j] = True
            cyc.append(j)
            j = int(order[j])
        out.append(cyc)
    return out


def _local(row: np.ndarray, pos: np.ndarray) -> tuple[np.ndarray, Family] | None:
    """Two rows swapped, a moved (rotated) block or a reversed block around the misplaced rows."""
    n = row.size
    bad = np.flatnonzero(row != pos)
    p, q = int(bad[0]), int(bad[-1])
    if bad.size == 2 and row[p] == pos[q] and row[q] == pos[p]:
        order = np.arange(n)
        order[p], order[q] = q, p
        return order, Family("swap", pairs=((p, q),))
    best: tuple[tuple[int, int, int], np.ndarray, Family] | None = None
    for a in range(p, max(0, p - BLOCK_SLACK) - 1, -1):
        for e in range(q + 1, min(n, q + 1 + BLOCK_SLACK) + 1):
            m = e - a
            mid_r, mid_p = row[a:e], pos[a:e]
            for k in np.flatnonzero(mid_p == mid_r[0]):
                k = int(k)
                if k == 0 or not np.array_equal(mid_r, np.roll(mid_p, -k)):
                    continue
                order = np.arange(n)
                order[a:e] = a + (np.arange(m) + k) % m
                key = (min(k, m - k), m, 0)
                if best is None or key < best[0]:
                    best = (key, order, Family("rotate", a, e, k))
            if m >= 3 and np.array_equal(mid_r, mid_p[::-1]):
                order = np.arange(n)
                order[a:e] = np.arange(e - 1, a - 1, -1)
                key = (m, m, 1)
                if best is None or key < best[0]:
                    best = (key, order, Family("reverse", a, e))
    return (best[1], best[2]) if best is not None else None


def _sorts(row: np.ndarray, pos: np.ndarray, keys: dict[str, tuple[np.ndarray, np.ndarray]]):
    """The table stably sorted by one factor, then two, ... (levels in the order the design shows them)."""
    names = list(keys)
    for k in range(1, len(names) + 1):
        for fs in permutations(names, k):
            rank_row, rank_pos, ok = _sort_ranks(fs, keys)
            if not ok:
                continue
            order = np.argsort(rank_pos, kind="stable")
            if np.array_equal(rank_pos[order], rank_row) and np.array_equal(pos[order], row):
                yield order, Family("sorted", factors=tuple(fs), blocks=_blocks(rank_row, fs, keys))


def _sort_ranks(fs: tuple[str, ...], keys: dict[str, tuple[np.ndarray, np.ndarray]]
                ) -> tuple[np.ndarray, np.ndarray, bool]:
    """Ranks of the factor-level tuples in the order they first appear down the design; ok when sorted."""
    row_t = list(zip(*(keys[f][0].tolist() for f in fs), strict=True))
    pos_t = list(zip(*(keys[f][1].tolist() for f in fs), strict=True))
    first = list(dict.fromkeys(row_t))
    rank = {t: r for r, t in enumerate(first)}
    rank_row = np.array([rank[t] for t in row_t])
    if np.any(np.diff(rank_row) < 0):
        return rank_row, rank_row, False
    # Sorted by the first factor, then the next: every prefix of the tuple in contiguous blocks too.
    for j in range(1, len(fs)):
        pre = [t[:j] for t in row_t]
        runs = [t for t, nxt in zip(pre, pre[1:] + [None], strict=True) if t != nxt]
        if len(runs) != len(set(runs)):
            return rank_row, rank_row, False
    if any(t not in rank for t in pos_t):
        return rank_row, rank_row, False
    return rank_row, np.array([rank[t] for t in pos_t]), True


def _blocks(rank_row: np.ndarray, fs: tuple[str, ...], keys: dict[str, tuple[np.ndarray, np.ndarray]]
            ) -> tuple[tuple[int, int, str], ...]:
    out = []
    start = 0
    for i in range(1, rank_row.size + 1):
        if i == rank_row.size or rank_row[i] != rank_row[start]:
            out.append((start, i, "/".join(str(int(keys[f][0][start])) for f in fs)))
            start = i
    return tuple(out)


# --------------------------------------------------------------------------------------------------
# Words
# --------------------------------------------------------------------------------------------------
def span(a: int, b: int) -> str:
    """0-based [a, b) as 1-based ``rows 4-8`` / ``row 4``."""
    return f"row {a + 1}" if b - a == 1 else f"rows {a + 1}-{b}"


def runs_text(numbers: list[int]) -> str:
    """1-based numbers with ascending runs collapsed (``1-3, 7, 4-6``), at most MAX_LISTED_ROWS shown."""
    parts: list[str] = []
    shown = 0
    i = 0
    while i < len(numbers) and shown < MAX_LISTED_ROWS:
        j = i
        while j + 1 < len(numbers) and numbers[j + 1] == numbers[j] + 1:
            j += 1
        parts.append(str(numbers[i]) if i == j else f"{numbers[i]}-{numbers[j]}")
        shown += j - i + 1
        i = j + 1
    text = ", ".join(parts)
    return text + (f" and {len(numbers) - i} more" if i < len(numbers) else "")


def ids_span(ids: list[str]) -> str:
    return ids[0] if len(ids) == 1 else f"{ids[0]} to {ids[-1]}" if len(ids) > 2 else f"{ids[0]} and {ids[1]}"


def family_text(fam: Family, order: np.ndarray, ids_at: list[str], level_names: dict[str, tuple[str, ...]]
                ) -> str:
    """What happened, in words.  ``ids_at[k]`` is the participant at expected position k."""
    if fam.kind == "rotate":
        a, e, k = fam.start, fam.stop, fam.shift
        m = e - a
        first = f"design {span(a, a + m - k)} hold the participants {ids_span(ids_at[a + k:e])}"
        second = f"design {span(a + m - k, e)} hold{'s' * (k == 1)} {ids_span(ids_at[a:a + k])}"
        small = min(k, m - k)
        if m == 2:
            lead = f"rows {a + 1} and {a + 2} look swapped"
        elif small == 1:
            lead = f"a block of rows is shifted by one ({span(a, e)})"
        else:
            lead = f"a block of {small} rows was moved ({span(a, e)} are in another order)"
        return f"{lead}: {first}, {second}"
    if fam.kind == "reverse":
        return (f"design {span(fam.start, fam.stop)} are in reverse order: they hold "
                f"{ids_span(ids_at[fam.stop - 1:fam.start - 1 if fam.start else None:-1])}")
    if fam.kind == "sorted":
        by = ", then ".join(fam.factors)
        parts = []
        for a, b, codes in fam.blocks:
            lv = "/".join(level_names[f][int(c)] for f, c in zip(fam.factors, codes.split("/"), strict=True))
            parts.append(f"{span(a, b)} {lv}")
        return f"the rows are sorted by {by} ({', '.join(parts)}), in table order within each group"
    if fam.kind in ("swap", "swaps"):
        return "; ".join(f"rows {i + 1} and {j + 1} look swapped" for i, j in fam.pairs)
    moved = np.flatnonzero(order != np.arange(order.size))
    return f"{moved.size} rows are out of place ({', '.join(str(i + 1) for i in moved[:MAX_LISTED_ROWS])}" + (
        " ...)" if moved.size > MAX_LISTED_ROWS else ")")


def cycles_of(order: np.ndarray) -> list[list[int]]:
    """The cycles of a permutation (rows that stay are left out)."""
    return _cycles(order)

