"""Do the residual variances of a factor's groups differ?  The rule shared by fits and ``groupmodel check``.

Each group's residual variance is ``RSS_g / rho_g`` (:mod:`groupmodel.engine.welch`); the check is Levene's test
as ``scipy.stats.levene`` computes it, centred on the group medians (the Brown-Forsythe form), applied to the OLS
residuals of the groups.  A factor is flagged where the largest group variance exceeds the smallest by more than
:data:`VARIANCE_RATIO_WARN` and Levene's p is below :data:`LEVENE_ALPHA`.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["LEVENE_ALPHA", "VARIANCE_RATIO_WARN", "VOXEL_SHARE_WARN", "count_unequal", "group_variances", "screen",
           "unequal", "widespread"]

#: Largest over smallest residual variance of a factor's groups above which a fit warns (with Levene's p).
VARIANCE_RATIO_WARN = 2.0
#: Levene's test (scipy.stats.levene, median-centred) must give p below this too.
LEVENE_ALPHA = 0.05
#: Over images, a warning when more than this share of the voxels (vertices) in the mask meet both conditions.
VOXEL_SHARE_WARN = 0.10


def group_variances(resid: np.ndarray, labels: np.ndarray, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residual variance of each group (k, v) and Levene's p (v,), NaN where some group has no spread.

    Parameters
    ----------
    resid : ndarray, shape (n, v)
        OLS residuals.
    labels : ndarray of int, shape (n,)
        Group 0 .. k-1 of every row.
    rho : ndarray, shape (k,)
        Each group's residual df (the sum of its diagonal of the residual-forming matrix).
    """
    variances = _variances(resid, labels, rho)
    return variances, np.where(np.all(variances > 0, axis=0), _levene_p(resid, labels, rho.size), np.nan)


def screen(resid: np.ndarray, labels: np.ndarray, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`group_variances` and :func:`unequal` for many voxels at once, with Levene's test (the costly part:
    a median per group and voxel) run only where the variance ratio already exceeds :data:`VARIANCE_RATIO_WARN`.

    Returns the variances (k, v), Levene's p (v,; NaN where it was not needed) and the voxels checked: those
    where every group has residual spread.  ``unequal(variances, p)`` is the same as with :func:`group_variances`.
    """
    variances = _variances(resid, labels, rho)
    checked = np.all(variances > 0, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        wanted = checked & (variances.max(axis=0) / variances.min(axis=0) > VARIANCE_RATIO_WARN)
    p = np.full(resid.shape[1], np.nan)
    if np.any(wanted):
        p[wanted] = _levene_p(resid[:, wanted], labels, rho.size)
    return variances, p, checked


def count_unequal(resid: np.ndarray, labels: np.ndarray, rho: np.ndarray) -> tuple[int, int]:
    """(voxels whose groups' variances differ, voxels checked) in residuals (n, v): :func:`screen` and
    :func:`unequal`, counted (added over chunks, then judged by :func:`widespread`)."""
    variances, p, checked = screen(resid, labels, rho)
    return int(np.count_nonzero(unequal(variances, p))), int(np.count_nonzero(checked))


def widespread(hit: int, tested: int) -> bool:
    """Whether voxels whose groups' variances differ are more than :data:`VOXEL_SHARE_WARN` of those tested (the
    voxelwise warning)."""
    return tested > 0 and hit > VOXEL_SHARE_WARN * tested


def _variances(resid: np.ndarray, labels: np.ndarray, rho: np.ndarray) -> np.ndarray:
    onehot = np.zeros((rho.size, resid.shape[0]))
    onehot[labels, np.arange(resid.shape[0])] = 1.0
    return (onehot @ (resid * resid)) / rho[:, None]


def _levene_p(resid: np.ndarray, labels: np.ndarray, k: int) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        p = stats.levene(*[resid[labels == g] for g in range(k)], center="median", axis=0).pvalue
    return np.atleast_1d(np.asarray(p, dtype=float))


def unequal(variances: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Where (v,) the variances differ by more than :data:`VARIANCE_RATIO_WARN`, with Levene's p below
    :data:`LEVENE_ALPHA`."""
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = variances.max(axis=0) / variances.min(axis=0)
        return (ratio > VARIANCE_RATIO_WARN) & (p < LEVENE_ALPHA)
