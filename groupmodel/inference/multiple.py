"""Parametric corrections for many tests: Benjamini-Hochberg FDR and Bonferroni.

Both work on the in-mask values of a map and are NaN-aware: the family is the set of finite
p values inside the mask (NaN p values, e.g. from constant voxels, are not tests), and every other
element of the result is NaN.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["bonferroni", "fdr_bh", "reject"]


def _family(p: np.ndarray, mask: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """The p values as float64 and the boolean selection of the family (finite, in mask)."""
    p = np.asarray(p, dtype=np.float64)
    family = np.isfinite(p)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != p.shape:
            raise InputError(
                f"the mask must have the shape of the p map {p.shape}; got {mask.shape} "
                "(in multiple-comparison correction); pass a mask over the same elements"
            )
        family &= mask
    values = p[family]
    if values.size and (values.min() < 0 or values.max() > 1):
        raise InputError(
            f"p values must lie in [0, 1]; got values from {values.min()} to {values.max()} "
            "(in multiple-comparison correction); pass p values, not statistics"
        )
    return p, family


def fdr_bh(p: np.ndarray, mask: np.ndarray | None = None) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p values (false discovery rate).

    Parameters
    ----------
    p : ndarray of float, any shape
        Uncorrected p values.
    mask : ndarray of bool, same shape, optional
        Elements that belong to the family (default: all).  NaN p values never belong.

    Returns
    -------
    ndarray of float64, same shape as ``p``
        ``min(1, min_{j >= i} p_(j) m / j)`` for the family's sorted p values (m tests); NaN
        outside the family.  Rejecting where the adjusted p is <= q controls the FDR at q under
        independence or positive dependence.  Equals ``scipy.stats.false_discovery_control(...,
        method="bh")`` on the family (same arithmetic).
    """
    p, family = _family(p, mask)
    out = np.full(p.shape, np.nan)
    values = p[family]
    m = values.size
    if m == 0:
        return out
    order = np.argsort(values)
    ranked = values[order]
    ranked = ranked * (m / np.arange(1, m + 1, dtype=np.float64))
    np.minimum.accumulate(ranked[::-1], out=ranked[::-1])
    adjusted = np.empty(m)
    adjusted[order] = np.clip(ranked, 0.0, 1.0)
    out[family] = adjusted
    return out


def bonferroni(p: np.ndarray, mask: np.ndarray | None = None) -> np.ndarray:
    """Bonferroni adjusted p values, ``min(1, p m)`` with m the family size.

    Parameters
    ----------
    p : ndarray of float, any shape
    mask : ndarray of bool, same shape, optional
        As for :func:`fdr_bh`.

    Returns
    -------
    ndarray of float64, same shape as ``p``; NaN outside the family.
    """
    p, family = _family(p, mask)
    out = np.full(p.shape, np.nan)
    m = int(family.sum())
    out[family] = np.minimum(1.0, p[family] * m)
    return out


def reject(adjusted: np.ndarray, alpha: float = 0.05) -> np.ndarray:
    """Where an adjusted p value is at or below ``alpha`` (False where NaN)."""
    adjusted = np.asarray(adjusted, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return adjusted <= alpha
