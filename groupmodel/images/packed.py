"""Rows packed as they are read: each image keeps only its candidates still in play, and the packed rows are
turned into the ``(n, n_keep)`` matrix in place.

A candidate voxel is *in play* after image ``s`` (the ``s``-th row stored) when it was finite in every image
so far and nonzero in one of them.  Only those values are stored, so the background (zero everywhere, the
bulk of a brain grid) is never copied and the whole-grid buffer is never touched.  The analysis mask is the
set in play after the last image; a kept voxel not yet in play at image ``s`` was finite and zero in every
image up to ``s``, so its value there is 0.  Two small integer arrays (the image where each candidate first
became nonzero, and where it first became NaN/inf) describe which candidates every row holds.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

#: "Never" in the first-nonzero / first-nonfinite arrays.
NEVER = np.iinfo(np.int32).max


@dataclass(frozen=True, eq=False)
class PackedRows:
    """Where each stored row is, and how to expand it to the analysis mask's columns.

    ``offsets[s]``, ``lengths[s]``: the ``s``-th stored row in the flat buffer; ``row_of[s]``: its observation.
    ``ever``: candidate positions ever in play; ``first_nonzero``/``first_nonfinite`` for them (stored-row
    numbers, NEVER if never); ``gather_ever``: positions in ``ever`` of the kept voxels, in the mask's C order;
    ``from_stable``: for rows ``s >= stable`` (which hold exactly the kept voxels in candidate order), the
    gather to the mask's C order (None: already in that order).
    """

    offsets: np.ndarray
    lengths: np.ndarray
    row_of: np.ndarray
    n_keep: int
    ever: np.ndarray
    first_nonzero: np.ndarray
    first_nonfinite: np.ndarray
    gather_ever: np.ndarray
    stable: int
    from_stable: np.ndarray | None

    @property
    def n(self) -> int:
        return int(self.offsets.size)

    def expand(self, s: int, packed: np.ndarray) -> np.ndarray:
        """The kept voxels of stored row ``s`` (its ``lengths[s]`` values) in the mask's C order."""
        if s >= self.stable:
            return packed if self.from_stable is None else packed[self.from_stable]
        present = (self.first_nonzero <= s) & (self.first_nonfinite > s)
        rank = np.cumsum(present, dtype=np.int64) - 1
        take = present[self.gather_ever]
        out = np.zeros(self.n_keep, dtype=packed.dtype)
        out[take] = packed[rank[self.gather_ever[take]]]
        return out


def plan_rows(offsets: list[int], lengths: list[int], row_of: list[int], first_nonzero: np.ndarray,
              first_nonfinite: np.ndarray, gather: np.ndarray) -> PackedRows:
    """The plan of packed rows, from the reading's record and ``gather`` (candidate positions of the kept
    voxels in the mask's C order)."""
    ever = np.flatnonzero(first_nonzero < first_nonfinite)
    fz, ff = first_nonzero[ever], first_nonfinite[ever]
    gather_ever = np.searchsorted(ever, gather)
    kept_sorted = np.sort(gather)
    # rows from `stable` on hold exactly the kept voxels: every kept voxel is in play by then, and every other
    # voxel ever in play has left (became NaN/inf) by then
    last_in = int(fz[gather_ever].max()) if gather.size else 0
    gone = ff[ff < NEVER]
    stable = max(last_in, int(gone.max()) if gone.size else 0)
    from_stable = None if np.array_equal(kept_sorted, gather) else np.searchsorted(kept_sorted, gather)
    return PackedRows(np.asarray(offsets, np.int64), np.asarray(lengths, np.int64), np.asarray(row_of, np.int64),
                      int(gather.size), ever, fz, ff, gather_ever, stable, from_stable)


def compaction_order(plan: PackedRows) -> list[int]:
    """An order of the stored rows in which writing row ``s`` to ``[s*n_keep, (s+1)*n_keep)`` never overwrites a
    packed row not yet read.

    Row ``s``'s target overlaps row ``s+1``'s packed values when the packed rows before ``s+1`` are shorter in
    total than ``s+1`` target rows (then ``s+1`` goes first), and row ``s+1``'s target overlaps row ``s``'s
    packed values when they are longer (then ``s`` goes first); overlaps further away imply the ones between.
    """
    n, k = plan.n, plan.n_keep
    after: list[list[int]] = [[] for _ in range(n)]  # the neighbours that must wait for this row
    waits = [0] * n
    for b in range(1, n):
        lead = int(plan.offsets[b]) - b * k
        if lead < 0:
            after[b].append(b - 1)
            waits[b - 1] += 1
        elif lead > 0:
            after[b - 1].append(b)
            waits[b] += 1
    order: list[int] = []
    placed = [False] * n
    for s in range(n):
        ready = [s] if waits[s] == 0 and not placed[s] else []
        while ready:
            cur = ready.pop()
            placed[cur] = True
            order.append(cur)
            for nxt in after[cur]:
                waits[nxt] -= 1
                if waits[nxt] == 0:
                    ready.append(nxt)
    return order


def compact_packed(flat: np.ndarray, plan: PackedRows, release: Callable[[], None] | None = None) -> None:
    """In place: stored row ``s``, expanded, goes to ``flat[r*n_keep:(r+1)*n_keep]`` with ``r = row_of[s]``."""
    k = plan.n_keep
    for i, s in enumerate(compaction_order(plan)):
        off, length = int(plan.offsets[s]), int(plan.lengths[s])
        row = np.array(plan.expand(s, flat[off : off + length]), copy=True)
        flat[s * k : (s + 1) * k] = row
        if release is not None and i % 16 == 15:
            release()
    _permute_rows(flat, plan, release)


def _permute_rows(flat: np.ndarray, plan: PackedRows, release: Callable[[], None] | None) -> None:
    """Move the slot of stored row ``s`` to observation ``row_of[s]``, following cycles (one spare row)."""
    k = plan.n_keep
    dest = plan.row_of
    done = np.zeros(plan.n, dtype=bool)
    moved = 0
    for s in range(plan.n):
        if done[s] or dest[s] == s:
            continue
        carry = np.array(flat[s * k : (s + 1) * k], copy=True)
        cur = s
        while True:
            t = int(dest[cur])
            done[cur] = True
            nxt = np.array(flat[t * k : (t + 1) * k], copy=True)
            flat[t * k : (t + 1) * k] = carry
            moved += 1
            if release is not None and moved % 16 == 15:
                release()
            if t == s:
                break
            carry, cur = nxt, t
