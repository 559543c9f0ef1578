"""Per-participant check of a voxelwise fit: each observation's mean absolute residual across the mask.

A bad image (wrong contrast, a scaling error, a failed registration) shows as one observation whose residuals
are large everywhere.  The sums are a pure per-chunk accumulation (:func:`block_sums`, added in order by
:func:`add_blocks`): chunks add up, so the result does not depend on the chunk size.

An observation is called unusual when its mean absolute residual lies more than ``UNUSUAL_Z`` robust
standard deviations (1.4826 x the median absolute deviation) above the median of all observations.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

#: Robust z above which an observation's mean absolute residual is called unusual.
UNUSUAL_Z = 5.0


#: Elements of an (n, block) working array: blocks of voxels small enough to stay in cache, so that no
#: (n, v) float64 copy of a chunk is made.
_BLOCK_ELEMENTS = 1 << 16


def sums_step(n: int) -> int:
    """Voxels per block of :func:`block_sums` for ``n`` observations: a chunk cut at multiples of it gives the
    same blocks, so the same sums bit for bit."""
    return max(64, _BLOCK_ELEMENTS // max(n, 1))


#: Blocks of :func:`sums_step` voxels handed out together by :func:`residual_blocks`.
_STEPS_PER_BLOCK = 16


def residual_blocks(design: np.ndarray, y: np.ndarray, beta: np.ndarray) -> Iterator[tuple[int, np.ndarray]]:
    """``(i, R)``: the OLS residuals ``R = Y - X B`` (n, w) in float64 of the voxels from ``i`` blocks of
    :func:`sums_step` onwards, a few such blocks at a time (no (n, v) temporary).  ``design`` (n, p), ``y`` (n, v),
    ``beta`` (p, v)."""
    x = np.asarray(design, dtype=np.float64)
    n, v = np.shape(y)
    step = sums_step(n)
    width = step * _STEPS_PER_BLOCK
    for lo in range(0, v, width):
        hi = min(lo + width, v)
        resid = np.array(y[:, lo:hi], dtype=np.float64)
        resid -= x @ beta[:, lo:hi]
        yield lo // step, resid


def abs_sums(resid: np.ndarray) -> np.ndarray:
    """Each observation's sum of |residual| over each block of :func:`sums_step` voxels of ``resid`` (n, w):
    shape (blocks, n), leaving out voxels whose residuals are not finite; ``resid`` is overwritten with its
    absolute values."""
    n, w = resid.shape
    step = sums_step(n)
    np.abs(resid, out=resid)
    finite = np.isfinite(resid).all(axis=0)
    out = np.zeros((-(-w // step), n))
    for i, lo in enumerate(range(0, w, step)):
        keep = finite[lo:lo + step]
        out[i] = resid[:, lo:lo + step][:, keep].sum(axis=1)
    return out


def block_sums(design: np.ndarray, y: np.ndarray, beta: np.ndarray,
               each: Callable[[np.ndarray], None] | None = None) -> np.ndarray:
    """Each observation's sum of |residual| over each block of :func:`sums_step` voxels: shape (blocks, n)
    (:func:`residual_blocks`, :func:`abs_sums`); ``each`` is first shown every block of residuals, so that other
    work on the residuals needs no pass of its own."""
    n, v = np.shape(y)
    out = np.zeros((-(-v // sums_step(n)), n))
    for i, resid in residual_blocks(design, y, beta):
        if each is not None:
            each(resid)
        sums = abs_sums(resid)
        out[i:i + len(sums)] = sums
    return out


def add_blocks(blocks: np.ndarray, total: np.ndarray | None = None) -> np.ndarray:
    """``total`` (zeros by default) plus the rows of :func:`block_sums`, added one after another in order."""
    total = np.zeros(blocks.shape[1]) if total is None else total
    for row in blocks:
        total += row
    return total


@dataclass
class ParticipantCheck:
    """Sums accumulated over the chunks of a fit."""

    abs_resid_sum: np.ndarray  # (n,)
    n_voxels: int = 0

    @classmethod
    def empty(cls, n: int) -> ParticipantCheck:
        return cls(np.zeros(n), 0)

    def add(self, design: np.ndarray, y: np.ndarray, beta: np.ndarray) -> None:
        """Add one chunk (n, v) from its design (n, p) and coefficients (p, v)."""
        self.add_sums(add_blocks(block_sums(design, y, beta)), y.shape[1])

    def add_sums(self, sums: np.ndarray, n_voxels: int) -> None:
        """Add one chunk's sums (:func:`add_blocks` of its :func:`block_sums`) over ``n_voxels`` (add the chunks in
        order for the same bits)."""
        self.abs_resid_sum += sums
        self.n_voxels += n_voxels

    def means(self) -> np.ndarray:
        """Each observation's mean absolute residual over the voxels added."""
        return self.abs_resid_sum / max(self.n_voxels, 1)


def robust_z(values: np.ndarray) -> np.ndarray:
    """(value - median) / (1.4826 x median absolute deviation); zeros when the deviation is 0."""
    v = np.asarray(values, dtype=float)
    if v.size == 0:
        return v
    centre = float(np.median(v))
    spread = 1.4826 * float(np.median(np.abs(v - centre)))
    return (v - centre) / spread if spread > 0 else np.zeros_like(v)


__all__ = ["UNUSUAL_Z", "ParticipantCheck", "abs_sums", "add_blocks", "block_sums", "residual_blocks", "robust_z",
           "sums_step"]
