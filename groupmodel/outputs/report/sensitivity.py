"""How small an effect each hypothesis can detect with this design.

For a t test with weights ``l`` the standard error of ``l b`` is ``sigma * sqrt(l (X'X)^+ l')``: the square root
is the *standard error factor*, a property of the design alone.  The smallest effect detected with power
``POWER`` is ``delta * sigma * factor``, where ``delta`` is the noncentrality at which the noncentral t with
the residual degrees of freedom passes the critical value with that probability (both tails for a two-sided
test).  For an F test the answer is a noncentrality ``lambda`` of the noncentral F, given also as Cohen's
``f = sqrt(lambda / n)``.  ``sigma`` is the median residual SD over the mask (voxelwise), the residual SD
(table fit), or 1 (a design alone: effects in units of the residual SD).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

POWER = 0.8
ALPHA = 0.05


@dataclass(frozen=True)
class Sensitivity:
    """One hypothesis at one significance level."""

    alpha: float
    se_factor: tuple[float, ...]  # per row of the hypothesis
    noncentrality: float  # delta (t) or lambda (F) reaching POWER
    smallest_effect: float | None  # |l b| in data units (t tests; sigma x delta x factor)
    cohen_f: float | None  # F tests


def se_factors(design: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """``sqrt(diag(L (X'X)^+ L'))`` for the rows of ``weights`` (q, p)."""
    x = np.asarray(design, dtype=float)
    w = np.atleast_2d(np.asarray(weights, dtype=float))
    xtx_inv = np.linalg.pinv(x.T @ x)
    return np.sqrt(np.einsum("ij,jk,ik->i", w, xtx_inv, w))


def t_power(delta: float, df: float, alpha: float, tail: str) -> float:
    """Power of a t test with noncentrality ``delta`` (> 0, in the test's direction)."""
    if tail == "two-sided":
        c = stats.t.isf(alpha / 2, df)
        # the far tail is below alpha / 2; scipy's nct gives NaN for it deep in the tail: counted as 0 then
        far = float(stats.nct.cdf(-c, df, delta))
        return _upper(c, df, delta) + (far if math.isfinite(far) else 0.0)
    return _upper(stats.t.isf(alpha, df), df, delta)


def _upper(c: float, df: float, delta: float) -> float:
    up = float(stats.nct.sf(c, df, delta))
    return up if math.isfinite(up) else 1.0 - float(stats.nct.cdf(c, df, delta))


def f_power(lam: float, df1: float, df2: float, alpha: float) -> float:
    """Power of an F test with noncentrality ``lam``."""
    return float(stats.ncf.sf(stats.f.isf(alpha, df1, df2), df1, df2, lam))


def _solve(power_of: callable, start: float) -> float:  # type: ignore[valid-type]
    hi = start
    while power_of(hi) < POWER:
        hi *= 2
        if hi > 1e6:
            return math.inf
    return float(optimize.brentq(lambda d: power_of(d) - POWER, 0.0, hi, xtol=1e-10, rtol=1e-12))


def sensitivity(design: np.ndarray, weights: np.ndarray, test: str, tail: str, alpha: float,
                sigma: float | None) -> Sensitivity:
    """The smallest effect detectable with power POWER at level ``alpha`` (see the module)."""
    n, _ = np.shape(design)
    factors = se_factors(design, weights)
    df2 = n - np.linalg.matrix_rank(np.asarray(design, dtype=float))
    if test == "t":
        two = "two-sided" if tail == "two-sided" else "one"
        delta = _solve(lambda d: t_power(d, df2, alpha, two), 4.0)
        scale = 1.0 if sigma is None else sigma
        return Sensitivity(alpha, tuple(factors.tolist()), delta, delta * scale * float(factors[0]), None)
    q = np.linalg.matrix_rank(np.atleast_2d(weights))
    lam = _solve(lambda v: f_power(v, q, df2, alpha), 10.0)
    return Sensitivity(alpha, tuple(factors.tolist()), lam, None, math.sqrt(lam / n))


__all__ = ["ALPHA", "POWER", "Sensitivity", "f_power", "se_factors", "sensitivity", "t_power"]
