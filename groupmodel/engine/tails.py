"""Tail probabilities of t and F statistics: p, log p and the z of equal p, exact in the far tail.

Voxelwise maps routinely hold t values whose p underflows float64 (t = 40 on 1000 df has
p near 1e-210; t = 1e5 on 100 df has p near 1e-402).  ``scipy.stats.t.logsf`` is ``log(sf)`` and
returns ``-inf`` there, and a z map computed as ``Phi^-1(1 - p)`` saturates near 8.3 long before.
This module keeps everything in log space where it matters:

* Both tails reduce to the regularised incomplete beta function.  For ``T ~ t(df)`` and ``t >= 0``,
  ``P(|T| > t) = I_x(df/2, 1/2)`` with ``x = df / (df + t^2)``, and the complement
  ``P(|T| <= t) = I_y(1/2, df/2)`` with ``y = 1 - x = t^2 / (df + t^2)``.  For ``F ~ F(d1, d2)``,
  ``P(F > f) = I_x(d2/2, d1/2)`` with ``x = d2 / (d2 + d1 f)`` and ``P(F <= f) = I_y(d1/2, d2/2)``.
* ``x`` and ``y`` are both formed directly (never as ``1 - other``), and of the pair of
  complementary probabilities only the smaller is evaluated; the larger is ``log1p(-smaller)``.
  This keeps relative accuracy in both tails and costs one incomplete-beta call per value.  For
  large shape parameters (df above about 4000) an argument above 1/2 is handed to scipy as its
  complement (``betaincc`` on ``1 - x``), because rounding ``x`` near 1 would cost digits there.
* Where the smaller probability is below ``1e-280`` (scipy's value would lose digits in the
  subnormal range or underflow to 0), ``log I_x(a, b)`` is computed in log space from
  ``I_x(a, b) = x^a (1-x)^b / (a B(a, b)) * 2F1(a+b, 1; a+1; x)``: the prefactor in logs
  (``betaln`` for ``log B``), the hypergeometric factor (between 1 and a modest number there)
  in ordinary floats, and the log taken at the end.  The factor is summed as its continued
  fraction rather than its power series: both converge, but the series needs O(1/(1-x)) terms,
  which is thousands at df = 1e5 and more at larger df, the fraction O(sqrt(df)).
* The z of equal probability comes from ``scipy.special.ndtri_exp``, which maps a log p to z
  without forming p.  Near ``z = 0`` the t route instead uses ``z = sqrt(2) erfinv(P(|T| <= |t|))``,
  which keeps relative accuracy in z for tiny t where ``0.5 - p`` would cancel.

All functions are vectorised over the statistic; degrees of freedom may be scalars or arrays that
broadcast against it.  NaN in gives NaN out; degrees of freedom that are not positive give NaN.
Accuracy (checked against mpmath at 50 digits in ``tests/reference/test_tails.py``): relative error
of z below 1e-12 for t from 1e-8 to 1e5 (both signs) and df from 1 to 1000, for F on a grid of
(df1, df2) up to (300, 1000), and at spot checks with df up to 1e7.  Cost: about 0.1 s per
230,000 values on this kind of machine, almost all of it in ``scipy.special.betainc``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Literal

import numpy as np
from scipy import special

__all__ = [
    "f_tests",
    "log_sf_f",
    "log_sf_t",
    "mlog10p",
    "t_tests",
    "z_from_log_sf",
]

Tail = Literal["two-sided", "greater", "less"]

#: Below this value the incomplete beta function is computed in log space instead of by
#: ``scipy.special.betainc``: well above the subnormal range (2.2e-308), where relative accuracy
#: would start to fall.
_FAR_BELOW = 1e-280
#: Above this a + b, an argument x > 1/2 is passed to scipy as 1 - x (see _log_ibeta_pair); below
#: it the relative error of betainc(a, b, x) from rounding x stays under about 3e-13 (measured
#: against mpmath for the t and F distributions up to df = 4000).
_COMPLEMENT_ABOVE = 2000.0
#: The continued fraction stops once a step changes it by less than this factor.
_CF_RTOL = np.finfo(np.float64).eps
#: A safety cap on continued-fraction terms (about sqrt(max(a, b)) are needed; 1e4 covers degrees
#: of freedom beyond 1e8).  A value that reached it would be returned as NaN, never silently wrong.
_CF_MAX_TERMS = 10_000
_LOG2 = math.log(2.0)
_LN10 = math.log(10.0)


def _log_betainc_far(
    a: np.ndarray, b: np.ndarray, x: np.ndarray, log_x: np.ndarray, log_1mx: np.ndarray
) -> np.ndarray:
    """``log I_x(a, b)`` in log space, for tiny ``I_x`` (x below the mean of Beta(a, b)).

    ``I_x(a, b) = x^a (1-x)^b / (a B(a, b)) * h``, where ``h`` is the continued fraction of
    ``2F1(a+b, 1; a+1; x)`` (the hypergeometric series summed by the modified Lentz method, as in
    Numerical Recipes' ``betacf``).  The prefactor is formed in logs (``betaln`` for ``log B``),
    ``h`` in ordinary floats (it lies between 1 and about ``1/(1 - x (a+b)/(a+1))``), and the log
    is taken at the end.  The fraction needs O(sqrt(max(a, b))) terms where the plain power series
    would need O(1/(1 - x)), so it stays fast for very large degrees of freedom.

    Parameters
    ----------
    a, b : ndarray, shape (m,)
        Positive shape parameters.
    x, log_x, log_1mx : ndarray, shape (m,)
        ``x``, ``log x`` and ``log(1 - x)``, each computed accurately by the caller (``log_x``
        may be ``-inf`` for ``x = 0``).

    Returns
    -------
    ndarray, shape (m,)
        ``log I_x(a, b)``.
    """
    h_out = np.ones_like(x)
    tiny = 1e-300  # keeps Lentz's denominators away from 0
    # Work on compacted copies of the values still iterating; converged ones are written back
    # and dropped once they make up a quarter of the working set (dropping costs a pass over it).
    ids = np.flatnonzero(x > 0)  # x = 0: h = 1 and the prefactor is -inf
    aa, bb, xx = a[ids], b[ids], x[ids]
    d = 1.0 - (aa + bb) * xx / (aa + 1.0)
    d = 1.0 / np.where(np.abs(d) < tiny, tiny, d)
    c = np.ones(ids.size)
    h = d.copy()
    m = 0
    while ids.size and m < _CF_MAX_TERMS:
        m += 1
        for coef in (
            m * (bb - m) * xx / ((aa + 2 * m - 1.0) * (aa + 2 * m)),
            -(aa + m) * (aa + bb + m) * xx / ((aa + 2 * m) * (aa + 2 * m + 1.0)),
        ):
            d = 1.0 + coef * d
            d = 1.0 / np.where(np.abs(d) < tiny, tiny, d)
            c = 1.0 + coef / c
            c = np.where(np.abs(c) < tiny, tiny, c)
            step = c * d
            h *= step
        done = np.abs(step - 1.0) <= _CF_RTOL
        n_done = int(np.count_nonzero(done))
        if n_done and (n_done == ids.size or 4 * n_done >= ids.size):
            h_out[ids[done]] = h[done]
            keep = ~done
            ids, aa, bb, xx, c, d, h = ids[keep], aa[keep], bb[keep], xx[keep], c[keep], d[keep], h[keep]
    if ids.size:  # pragma: no cover - see _CF_MAX_TERMS
        h_out[ids] = np.nan
    with np.errstate(invalid="ignore"):
        # 0 * (-inf) cannot occur: a > 0, and log_1mx is finite for x < 1.
        log_prefactor = a * log_x + b * log_1mx - np.log(a) - special.betaln(a, b)
    return log_prefactor + np.log(h_out)


def _log_ibeta_pair(
    a: np.ndarray,
    b: np.ndarray,
    r: np.ndarray,
    log_r_at: Callable[[np.ndarray], np.ndarray],
) -> tuple[np.ndarray, np.ndarray]:
    """``log I_x(a, b)`` and ``log I_y(b, a) = log(1 - I_x(a, b))`` for ``x = 1/(1+r)``, ``y = r/(1+r)``.

    Both are returned to full relative accuracy: ``x`` and ``y`` are each formed directly from
    ``r``, and only the smaller of the two probabilities is evaluated.

    Parameters
    ----------
    a, b : ndarray
        Positive shape parameters, same shape as ``r``.
    r : ndarray
        Ratios ``y/x >= 0`` (``inf`` allowed: ``x = 0``).
    log_r_at : callable
        ``log_r_at(idx)`` returns ``log r`` at the flat indices ``idx``, finite even where ``r``
        itself overflowed; only called for the few values in the far tail.

    Returns
    -------
    log_ix, log_iy : ndarray
        Same shape as ``r``.  NaN wherever ``r``, ``a`` or ``b`` is NaN or not positive.
    """
    shape = r.shape
    a, b, r = np.ravel(a), np.ravel(b), np.ravel(r)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = 1.0 / (1.0 + r)
        # r/(1+r) is exact to rounding for r <= 1, 1/(1+1/r) for r > 1 (and r = inf).
        y = np.where(r <= 1.0, r / (1.0 + r), 1.0 / (1.0 + 1.0 / r))
    log_ix = np.full(shape, np.nan).ravel()
    log_iy = np.full(shape, np.nan).ravel()
    ok = (r >= 0) & (a > 0) & (b > 0)
    # Evaluate the side below the mean a/(a+b) of Beta(a, b): its probability is the smaller one
    # (up to the mean-median gap, where both are near 1/2 and either side is accurate).
    below = ok & (x * (a + b) <= a)
    above = ok & ~below
    for side, p1, p2, arg, other, out_small, out_large, flip in (
        (below, a, b, x, y, log_ix, log_iy, False),
        (above, b, a, y, x, log_iy, log_ix, True),
    ):
        idx = np.flatnonzero(side)
        if idx.size == 0:
            continue
        s1, s2, s_arg, s_other = p1[idx], p2[idx], arg[idx], other[idx]
        # An argument near 1 carries only the absolute accuracy of 1 - it, and I_x(a, b) on this
        # side has a relative sensitivity to x of about 2a + b: harmless for moderate a, but at
        # df = 1e6 betainc(a, 1/2, x) loses 5 digits where betaincc(1/2, a, 1 - x) loses none.
        # scipy's betaincc is ~10x slower than betainc, so it is used only where it matters.
        use_other = (s_arg > 0.5) & (s1 + s2 > _COMPLEMENT_ABOVE)
        small = np.empty(idx.size)
        small[~use_other] = special.betainc(s1[~use_other], s2[~use_other], s_arg[~use_other])
        small[use_other] = special.betaincc(s2[use_other], s1[use_other], s_other[use_other])
        with np.errstate(divide="ignore"):
            log_small = np.log(small)
        tiny = np.flatnonzero(small < _FAR_BELOW)
        if tiny.size:
            where = idx[tiny]
            # r = 0 (t = 0 or f = 0) has log r = -inf and the formula returns log 0 = -inf, as it
            # should; the infinities on the way are not worth a warning.
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
                rr, log_rr = r[where], log_r_at(where)
                inv = 1.0 / rr
                log_x = np.where(rr <= 1.0, -np.log1p(rr), -(log_rr + np.log1p(inv)))
                log_y = np.where(rr <= 1.0, log_rr - np.log1p(rr), -np.log1p(inv))
            if flip:
                log_x, log_y = log_y, log_x
            log_small[tiny] = _log_betainc_far(s1[tiny], s2[tiny], s_arg[tiny], log_x, log_y)
        out_small[idx] = log_small
        out_large[idx] = np.log1p(-small)
    return log_ix.reshape(shape), log_iy.reshape(shape)


def _t_log_tails(t: np.ndarray, df: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
    """``log P(|T| > |t|)`` and ``log P(|T| <= |t|)`` for ``T ~ t(df)``.

    Parameters
    ----------
    t : ndarray
        Statistics (any sign; only ``|t|`` is used).
    df : float or ndarray
        Degrees of freedom, broadcastable against ``t``.

    Returns
    -------
    log_two_sided, log_central : ndarray
        Same shape as ``t``.
    """
    at = np.abs(t)
    dfb = np.broadcast_to(np.asarray(df, dtype=np.float64), at.shape)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        r = at * at / dfb  # y/x = t^2/df; inf for |t| > 1e154, handled through log_r_at
    at_flat, df_flat = at.ravel(), dfb.ravel()

    def log_r_at(idx: np.ndarray) -> np.ndarray:
        return 2.0 * np.log(at_flat[idx]) - np.log(df_flat[idx])

    return _log_ibeta_pair(dfb / 2.0, np.full(at.shape, 0.5), r, log_r_at)


def _f_log_tails(
    f: np.ndarray, df1: np.ndarray | float, df2: np.ndarray | float
) -> tuple[np.ndarray, np.ndarray]:
    """``log P(F > f)`` and ``log P(F <= f)`` for ``F ~ F(df1, df2)``.

    Parameters
    ----------
    f : ndarray
        Statistics; negative values give NaN.
    df1, df2 : float or ndarray
        Numerator and denominator degrees of freedom, broadcastable against ``f``.

    Returns
    -------
    log_sf, log_cdf : ndarray
        Same shape as ``f``.
    """
    d1 = np.broadcast_to(np.asarray(df1, dtype=np.float64), f.shape)
    d2 = np.broadcast_to(np.asarray(df2, dtype=np.float64), f.shape)
    with np.errstate(over="ignore", invalid="ignore"):
        r = d1 * f / d2  # y/x with x = d2/(d2 + d1 f)
    f_flat, d1_flat, d2_flat = f.ravel(), d1.ravel(), d2.ravel()

    def log_r_at(idx: np.ndarray) -> np.ndarray:
        return np.log(d1_flat[idx]) + np.log(f_flat[idx]) - np.log(d2_flat[idx])

    return _log_ibeta_pair(d2 / 2.0, d1 / 2.0, r, log_r_at)


def log_sf_t(t: np.ndarray, df: float) -> np.ndarray:
    """Natural log of the upper tail ``P(T > t)`` of Student's t, exact far into the tail.

    Parameters
    ----------
    t : array_like
        t statistics, any shape.
    df : float or array_like
        Degrees of freedom (> 0), broadcastable against ``t``.

    Returns
    -------
    ndarray
        ``log P(T > t)``, same shape as ``t``; finite wherever ``t`` is finite, even where
        ``P(T > t)`` underflows float64.
    """
    t = np.asarray(t, dtype=np.float64)
    log_two, log_central = _t_log_tails(t, df)
    log_upper = log_two - _LOG2  # P(T > |t|)
    log_lower = np.log1p(np.exp(log_central)) - _LOG2  # P(T <= |t|) = (1 + P(|T| <= |t|)) / 2
    return np.where(t < 0, log_lower, log_upper)


def log_sf_f(f: np.ndarray, df1: float, df2: float) -> np.ndarray:
    """Natural log of the upper tail ``P(F > f)`` of the F distribution, exact far into the tail.

    Parameters
    ----------
    f : array_like
        F statistics (>= 0), any shape.
    df1, df2 : float or array_like
        Numerator and denominator degrees of freedom (> 0), broadcastable against ``f``.

    Returns
    -------
    ndarray
        ``log P(F > f)``, same shape as ``f``.
    """
    f = np.asarray(f, dtype=np.float64)
    return _f_log_tails(f, df1, df2)[0]


def z_from_log_sf(log_p: np.ndarray) -> np.ndarray:
    """The standard normal quantile with the same upper-tail probability.

    Parameters
    ----------
    log_p : array_like
        Natural log of an upper-tail probability (<= 0).

    Returns
    -------
    ndarray
        ``z`` with ``P(Z > z) = exp(log_p)``, i.e. ``-Phi^-1(exp(log_p))``, computed without
        forming ``exp(log_p)`` (``scipy.special.ndtri_exp``).  Positive for ``log_p < log(1/2)``.
    """
    return -special.ndtri_exp(np.asarray(log_p, dtype=np.float64))


def mlog10p(log_p: np.ndarray) -> np.ndarray:
    """``-log10 p`` from a natural-log p.

    Parameters
    ----------
    log_p : array_like
        Natural log of p.

    Returns
    -------
    ndarray
        ``-log_p / ln 10``.
    """
    return -np.asarray(log_p, dtype=np.float64) / _LN10


def t_tests(t: np.ndarray, df: float, tail: Tail = "two-sided") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """p, log p and z of equal probability for t statistics.

    Parameters
    ----------
    t : array_like
        t statistics, any shape.
    df : float or array_like
        Degrees of freedom (> 0), broadcastable against ``t``.
    tail : {"two-sided", "greater", "less"}
        Alternative hypothesis: ``p = P(|T| >= |t|)``, ``P(T >= t)`` or ``P(T <= t)``.

    Returns
    -------
    p, log_p : ndarray
        The p value for ``tail`` and its natural log (``log_p`` stays finite where ``p``
        underflows to 0).
    z : ndarray
        The signed z of equal one-sided probability, ``Phi^-1(P(T <= t))``: it has the sign of
        ``t``, its one-sided normal p equals the "greater" (``t > 0``) or "less" (``t < 0``) p, and
        ``2 * P(Z > |z|)`` equals the two-sided p.  It does not depend on ``tail``.
    """
    if tail not in ("two-sided", "greater", "less"):
        raise ValueError(f"tail must be 'two-sided', 'greater' or 'less'; got {tail!r}")
    t = np.asarray(t, dtype=np.float64)
    log_two, log_central = _t_log_tails(t, df)
    log_far = log_two - _LOG2  # P(T > |t|)
    if tail == "two-sided":
        log_p = log_two
    else:
        log_near = np.log1p(np.exp(log_central)) - _LOG2  # P(T <= |t|) = (1 + P(|T| <= |t|)) / 2
        # "greater": p = P(T > t) is the far tail when t > 0; "less" mirrors it.
        far = t > 0 if tail == "greater" else t < 0
        log_p = np.where(far, log_far, log_near)
    # Near t = 0 the central probability is small and erfinv keeps the relative accuracy of z that
    # Phi^-1(1/2 - small) would lose; elsewhere ndtri_exp of the far-tail log p.
    central = np.exp(log_central)
    body = central < 0.5
    z_abs = np.empty_like(central)
    z_abs[body] = math.sqrt(2.0) * special.erfinv(central[body])
    z_abs[~body] = z_from_log_sf(log_far[~body])
    z = np.copysign(z_abs, t)
    return np.exp(log_p), log_p, z


def f_tests(f: np.ndarray, df1: float, df2: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """p, log p and z of equal probability for F statistics (upper tail).

    Parameters
    ----------
    f : array_like
        F statistics (>= 0), any shape.
    df1, df2 : float or array_like
        Numerator and denominator degrees of freedom (> 0), broadcastable against ``f``.

    Returns
    -------
    p, log_p : ndarray
        ``P(F >= f)`` and its natural log.
    z : ndarray
        ``z`` with ``P(Z > z) = p``; positive for ``p < 1/2`` and negative (not clipped) for
        ``p > 1/2``.  Both signs keep relative accuracy: the smaller of ``p`` and ``1 - p`` is
        the one converted.
    """
    f = np.asarray(f, dtype=np.float64)
    log_sf, log_cdf = _f_log_tails(f, df1, df2)
    upper = log_sf <= -_LOG2
    z = np.empty_like(log_sf)
    z[upper] = -special.ndtri_exp(log_sf[upper])
    z[~upper] = special.ndtri_exp(log_cdf[~upper])  # p > 1/2 (or NaN): convert the smaller 1 - p
    return np.exp(log_sf), log_sf, z
