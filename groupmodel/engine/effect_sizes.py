"""Effect sizes and confidence intervals: pure functions over arrays (one entry per voxel), chunk by chunk.

* :func:`t_interval` -- the two-sided ``level`` confidence interval of a t contrast,
  ``L b -/+ t_{1-alpha/2, df2} * se``.
* :func:`cohens_d` -- the contrast estimate divided by the residual SD, ``L b / sigma``; meaningful for a
  comparison of two (cell or marginal) means, which :func:`compares_two_means` recognises from the weights
  over cell means.
* :func:`partial_eta_squared` -- ``F df1 / (F df1 + df2)`` (for a t test ``F = t**2``, ``df1 = 1``).
* :func:`partial_eta_squared_interval` -- its two-sided ``level`` interval by inverting the noncentral F
  (Steiger 2004, Psychological Methods 9(2):164-182): the noncentrality ``lambda_lo`` with
  ``P(F' <= F_obs | lambda_lo) = 1 - alpha/2`` and ``lambda_hi`` with ``P(F' <= F_obs | lambda_hi) = alpha/2``
  (0 where even ``lambda = 0`` gives a smaller probability), each turned into
  ``lambda / (lambda + df1 + df2 + 1)``.

The noncentral F cdf is ``scipy.special.ncfdtr`` (the same as ``scipy.stats.ncf.cdf``); the roots are found
with ``scipy.optimize.brentq``.  Root finding per voxel costs about 0.1 ms per bound, so for maps the
noncentrality bound is read off a cubic spline through ``brentq`` roots on a fixed grid of F values that
depends only on (df1, df2, level) -- never on the data or the chunk -- with the spline in
``(log(F - F0), log lambda)``, where ``F0`` is the F at which the bound leaves 0.  On that grid (40
points a decade from ``F0 + 1e-6 F0`` to ``F0 + 1e6``) the spline agrees with direct root finding to
about 1e-9 in partial eta squared (checked in tests/reference/test_effect_sizes_reference.py).  F beyond
the grid is solved directly, voxel by voxel; where ``df1 F > 1e8`` (beyond the range where ``ncfdtr`` is
reliable) the bound is the large-noncentrality limit ``lambda = df1 F chi2.isf(prob, df2) / df2``.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import stats
from scipy.interpolate import CubicSpline
from scipy.optimize import brentq
from scipy.special import ncfdtr

__all__ = [
    "DEFAULT_CI_LEVEL",
    "Interval",
    "cohens_d",
    "compares_two_means",
    "noncentrality_bound",
    "partial_eta_squared",
    "partial_eta_squared_interval",
    "t_interval",
]

#: Confidence level of every interval unless set otherwise.
DEFAULT_CI_LEVEL = 0.95
#: Weights over cells count as a two-mean comparison when they sum to 0 and their positive part to 1 within this.
TWO_MEANS_ATOL = 1e-9
#: Grid of the spline: points per decade of ``F - F0`` and its range (relative below, absolute above).
_GRID_PER_DECADE = 40
_SPLINE_LOCK = threading.Lock()
_GRID_REL_LO = 1e-6
_GRID_ABS_HI = 1e6
#: Above this df1 F the bound is taken from the large-noncentrality limit (see _root); its error there is
#: about 1e-11 in partial eta squared or less (checked against brentq at 1e7, where it is 10x larger).
_ASYMPTOTE_LAMBDA = 1e8
#: Relative and absolute tolerance of every brentq root (noncentrality units).
_ROOT_XTOL = 1e-12
_ROOT_RTOL = 1e-12


@dataclass(frozen=True)
class Interval:
    """Lower and upper bounds, one entry per voxel."""

    lower: np.ndarray
    upper: np.ndarray


def _alpha(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence level must be between 0 and 1, got {level!r}")
    return 1.0 - level


def t_interval(effect: np.ndarray, se: np.ndarray, df2: float, level: float = DEFAULT_CI_LEVEL) -> Interval:
    """The two-sided ``level`` interval ``effect -/+ t_{1-alpha/2, df2} se`` (NaN where ``se`` is 0 or NaN)."""
    effect = np.asarray(effect, dtype=np.float64)
    se = np.where(np.asarray(se, dtype=np.float64) > 0, se, np.nan)
    half = stats.t.ppf(1.0 - _alpha(level) / 2.0, df2) * se
    return Interval(effect - half, effect + half)


def cohens_d(effect: np.ndarray, residual_variance: np.ndarray) -> np.ndarray:
    """``effect / sqrt(residual variance)``: the difference of two means in residual SDs (NaN where the
    variance is 0 or NaN)."""
    sigma2 = np.asarray(residual_variance, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(effect, dtype=np.float64) / np.sqrt(np.where(sigma2 > 0, sigma2, np.nan))


def compares_two_means(cell_weights: np.ndarray | None) -> bool:
    """Whether one row of weights over cell means is a difference of two means: the weights sum to 0 and
    their positive part sums to 1 (so the negative part sums to -1).  That is one cell minus another, or an
    average of cells (a marginal mean, with any weights) minus another average; anything else (a single
    mean, a slope, several rows, a difference scaled other than 1) is not."""
    if cell_weights is None:
        return False
    w = np.asarray(cell_weights, dtype=np.float64)
    if w.ndim == 2:
        if w.shape[0] != 1:
            return False
        w = w[0]
    if w.ndim != 1 or not np.all(np.isfinite(w)):
        return False
    return bool(abs(w.sum()) <= TWO_MEANS_ATOL and abs(w[w > 0].sum() - 1.0) <= TWO_MEANS_ATOL)


def partial_eta_squared(statistic: np.ndarray, df1: float, df2: float) -> np.ndarray:
    """``F df1 / (F df1 + df2)`` from F (``t**2`` for a t test, with ``df1 = 1``)."""
    f = np.asarray(statistic, dtype=np.float64)
    return f * df1 / (f * df1 + df2)


def partial_eta_squared_interval(statistic: np.ndarray, df1: float | np.ndarray, df2: float | np.ndarray,
                                 level: float = DEFAULT_CI_LEVEL, *, grid: bool = True) -> Interval:
    """The two-sided ``level`` interval of partial eta squared from the noncentral F (Steiger 2004).

    ``grid`` False solves every value by ``brentq``; True reads most values off the fixed spline (see the
    module doc), which suits maps.  ``df1`` and ``df2`` may be per-voxel arrays (e.g. approximate df); then
    every value is solved directly.  NaN F gives NaN bounds.
    """
    f = np.asarray(statistic, dtype=np.float64)
    alpha = _alpha(level)
    n_total = np.asarray(df1, dtype=np.float64) + np.asarray(df2, dtype=np.float64) + 1.0
    bounds = []
    for prob in (1.0 - alpha / 2.0, alpha / 2.0):
        lam = noncentrality_bound(f, df1, df2, prob, grid=grid)
        bounds.append(lam / (lam + n_total))
    return Interval(bounds[0], bounds[1])


def noncentrality_bound(statistic: np.ndarray, df1: float | np.ndarray, df2: float | np.ndarray, prob: float, *,
                        grid: bool = True) -> np.ndarray:
    """The noncentrality ``lambda >= 0`` with ``ncf.cdf(F, df1, df2, lambda) = prob`` for each F; 0 where
    ``ncf.cdf(F, df1, df2, 0) <= prob`` already (no positive lambda fits), NaN for NaN F.  The spline
    (``grid``) is used only for scalar df."""
    f = np.asarray(statistic, dtype=np.float64)
    d1 = np.broadcast_to(np.asarray(df1, dtype=np.float64), f.shape)
    d2 = np.broadcast_to(np.asarray(df2, dtype=np.float64), f.shape)
    out = np.full(f.shape, np.nan)
    finite = np.isfinite(f) & np.isfinite(d1) & np.isfinite(d2)
    # the F at which lambda leaves 0 (once for scalar df: the same value at every voxel)
    f0 = np.asarray(stats.f.ppf(prob, df1, df2) if np.ndim(df1) == 0 and np.ndim(df2) == 0
                    else stats.f.ppf(prob, d1, d2), dtype=np.float64)
    with np.errstate(invalid="ignore"):
        out[finite & (f <= f0)] = 0.0
        todo = finite & (f > f0)
    if not np.any(todo):
        return out
    if grid and np.ndim(df1) == 0 and np.ndim(df2) == 0:
        out[todo] = _from_spline(f[todo], float(df1), float(df2), prob)
    else:
        out[todo] = [_root(x, a, b, prob) for x, a, b in zip(f[todo], d1[todo], d2[todo], strict=True)]
    return out


def _from_spline(f: np.ndarray, df1: float, df2: float, prob: float) -> np.ndarray:
    """Bounds of F values above F0 off the spline; below its grid proportional to F - F0 (the derivative at
    F0 is finite and positive), above it by brentq."""
    spline, f0, d_lo, d_hi = _spline(df1, df2, prob)
    d = f - f0
    out = np.empty(d.shape)
    inner = (d >= d_lo) & (d <= d_hi)
    out[inner] = np.exp(spline(np.log(d[inner])))
    low = d < d_lo
    out[low] = np.exp(spline(np.log(d_lo))) * d[low] / d_lo
    high = d > d_hi
    out[high] = [_root(x, df1, df2, prob) for x in f[high]]
    return out


def _root(f: float, df1: float, df2: float, prob: float) -> float:
    """brentq for ``ncf.cdf(f; lambda) = prob`` on a bracket found by doubling (the cdf falls with lambda)."""

    def g(lam: float) -> float:
        return float(ncfdtr(df1, df2, lam, f)) - prob

    if df1 * f > _ASYMPTOTE_LAMBDA:
        # F' is then (lambda / df1) / (chi2_df2 / df2) up to a relative O(lambda^-1/2) spread of the
        # numerator, so lambda = df1 F x / df2 with P(chi2_df2 >= x) = prob; ncfdtr fails (NaN) above ~1e10.
        return float(df1 * f * stats.chi2.isf(prob, df2) / df2)
    if g(0.0) <= 0.0:
        return 0.0
    hi = max(10.0, 2.0 * df1 * f)
    while g(hi) > 0.0:
        hi *= 2.0
    return float(brentq(g, 0.0, hi, xtol=_ROOT_XTOL, rtol=_ROOT_RTOL, maxiter=500))


def _spline(df1: float, df2: float, prob: float) -> tuple[CubicSpline, float, float, float]:
    """:func:`_built_spline`, built once when threads ask for the same one at the same time."""
    with _SPLINE_LOCK:
        return _built_spline(df1, df2, prob)


@lru_cache(maxsize=64)
def _built_spline(df1: float, df2: float, prob: float) -> tuple[CubicSpline, float, float, float]:
    """The cubic spline of ``log lambda`` over ``log(F - F0)`` through brentq roots on a fixed grid, ``F0``
    and the grid's range of ``F - F0``.  Depends on (df1, df2, prob) only."""
    f0 = float(stats.f.ppf(prob, df1, df2))
    d_lo = _GRID_REL_LO * max(f0, 1e-3)
    d_hi = _GRID_ABS_HI
    n = int(np.ceil(np.log10(d_hi / d_lo) * _GRID_PER_DECADE)) + 1
    d = np.geomspace(d_lo, d_hi, n)
    lam = np.array([_root(f0 + x, df1, df2, prob) for x in d])
    return CubicSpline(np.log(d), np.log(lam)), f0, d_lo, d_hi
