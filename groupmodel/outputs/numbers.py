"""Weights and design values as a person reads them: without round-off noise.

The arithmetic that builds weights and design rows leaves noise in the last bits: ``1.1e-16`` where the
value is 0, ``0.9999999999999999`` where it is 1, ``-0.0``.  Every writer of weights and design values
(design.tsv/json, contrasts.tsv/json, map sidecars, the pictures) passes them through :func:`tidy` first:
a value within ``RTOL`` x (the largest |value| of its row or column) of a simple fraction ``a/b``
(``b <= MAX_DENOMINATOR``) is written as that fraction's float, and ``-0.0`` as ``0.0``.  Only what is
written changes; the fit never sees these values.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np

#: Largest denominator of a "simple" fraction (fractions.Fraction.limit_denominator).
MAX_DENOMINATOR = 1000
#: How close (relative to the largest |value| of the row or column) a value must be to a simple fraction.
RTOL = 1e-12


def _snap(x: float, tol: float) -> float:
    if not np.isfinite(x):
        return x
    near = float(Fraction(x).limit_denominator(MAX_DENOMINATOR))
    return (near if abs(x - near) <= tol else x) + 0.0  # + 0.0 turns -0.0 into 0.0


def _maybe_simple(x: np.ndarray, tol: float) -> np.ndarray:
    """Which values may lie within ``tol`` of a fraction with denominator <= MAX_DENOMINATOR (a quick sieve).

    Such a fraction is a convergent of the value's continued fraction (Legendre: ``|x - a/b| < 1/(2 b^2)``),
    so the convergents with denominators up to MAX_DENOMINATOR are tried, all values at once; the
    exact snap (:func:`_snap`) then runs on the few that pass.
    """
    ax = np.abs(x)
    found = ax <= tol
    h1, h2 = np.ones_like(ax), np.zeros_like(ax)
    k1, k2 = np.zeros_like(ax), np.ones_like(ax)
    r = ax.copy()
    live = np.isfinite(ax) & ~found
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        while live.any():
            a = np.floor(r)
            h1, h2 = a * h1 + h2, h1
            k1, k2 = a * k1 + k2, k1
            live &= k1 <= MAX_DENOMINATOR
            # a margin over tol: the sieve may pass a few values the exact test then leaves alone
            found |= live & (np.abs(ax - h1 / k1) <= 4 * tol + 4 * np.spacing(ax))
            frac = r - a
            live &= frac > 0
            r = np.where(live, 1 / np.where(live, frac, 1), 0)
    return found


def _tidy_vector(values: np.ndarray) -> np.ndarray:
    finite = values[np.isfinite(values)]
    tol = RTOL * (float(np.abs(finite).max()) if finite.size else 0.0)
    uniques, inverse = np.unique(values, return_inverse=True)
    snapped = uniques + 0.0  # + 0.0 turns -0.0 into 0.0
    for i in np.flatnonzero(_maybe_simple(uniques, tol)):
        snapped[i] = _snap(float(uniques[i]), tol)
    return snapped[inverse.reshape(values.shape)]


def tidy(values: np.ndarray | list[float], axis: int | None = None) -> np.ndarray:
    """``values`` with round-off noise off each value (a new float64 array of the same shape).

    Parameters
    ----------
    values : array_like of float
    axis : int, optional
        The scale of the tolerance is the largest |value| of each slice along ``axis``: ``1`` for rows of
        weights (each hypothesis row on its own), ``0`` for design columns; ``None``: the whole array.
    """
    arr = np.array(values, dtype=np.float64)
    if arr.size == 0:
        return arr
    if axis is None or arr.ndim < 2:
        return _tidy_vector(arr.ravel()).reshape(arr.shape)
    moved = np.moveaxis(arr, axis, -1)
    out = np.empty_like(moved)
    for idx in np.ndindex(moved.shape[:-1]):
        out[idx] = _tidy_vector(moved[idx])
    return np.moveaxis(out, -1, axis)
