"""Per-participant check of a voxelwise fit: each observation's mean absolute residual across the mask.

A bad image (wrong contrast, a scaling error, a failed registration) shows as one observation whose residuals
are large everywhere.  The sums are a pure per-chunk accumulation (:func:`chunk_sums`): chunks add up, so the
result does not depend on the chunk size.

An observation is called unusual when its mean absolute residual lies more than ``UNUSUAL_Z`` robust
standard deviations (1.4826 x the median absolute deviation) above the median of all observations.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Robust z above which an observation's mean absolute residual is called unusual.
UNUSUAL_Z = 5.0


#: Elements of an (n, block) working array: blocks of voxels small enough to stay in cache, so that no
#: (n, v) float64 copy of a chunk is made.
_BLOCK_ELEMENTS = 1 << 16


def chunk_sums(design: np.ndarray, y: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """Sum over the voxels of one chunk of each observation's |residual|: shape (n,).

    ``design`` (n, p), ``y`` (n, v) and ``beta`` (p, v) from the fit of the chunk; voxels whose residuals
    are not finite are left out.  Worked through in blocks of voxels (no (n, v) temporary).
    """
    x = np.asarray(design, dtype=np.float64)
    n, v = np.shape(y)
    total = np.zeros(n)
    step = max(64, _BLOCK_ELEMENTS // max(n, 1))
    for lo in range(0, v, step):
        hi = min(lo + step, v)
        resid = np.array(y[:, lo:hi], dtype=np.float64)
        resid -= x @ beta[:, lo:hi]
        np.abs(resid, out=resid)
        finite = np.isfinite(resid).all(axis=0)
        total += resid[:, finite].sum(axis=1)
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
        self.abs_resid_sum += chunk_sums(design, y, beta)
        self.n_voxels += y.shape[1]

    def add_sums(self, sums: np.ndarray, n_voxels: int) -> None:
        """Add one chunk's :func:`chunk_sums` over ``n_voxels`` (add the chunks in order for the same bits)."""
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


__all__ = ["UNUSUAL_Z", "ParticipantCheck", "chunk_sums", "robust_z"]
