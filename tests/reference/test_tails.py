"""groupmodel.tails against mpmath at 50 digits and against scipy.stats.

References: mpmath (regularised incomplete beta and the normal tail at 50 significant digits,
computed inside the tests), scipy.stats.t / scipy.stats.f where their float64 values are accurate,
and the printed mpmath values in /work/shared/REFERENCES.md ("Far-tail z of equal p") as a
second check.
"""

from __future__ import annotations

import functools
import math

import mpmath as mp
import numpy as np
import pytest
from scipy import stats

from groupmodel.engine import tails

DPS = 50
Z_RTOL = 1e-12


def _mp_z_from_log_sf(log_sf: mp.mpf) -> mp.mpf:
    """z with log P(Z > z) = log_sf at 50 digits (mpmath): Newton's method on log Q(z), kept inside
    a bracket that shrinks with every step (bisection whenever Newton would leave it)."""
    lo, hi = mp.mpf(-600), mp.mpf(600)  # wide enough for every case here (|z| < 200)
    # Start near the root: z ~ sqrt(-2 log p) in the upper tail, and the mirror image below.
    if log_sf < -2:
        z = mp.sqrt(-2 * log_sf)
    elif log_sf > mp.log(1 - mp.exp(-2)):
        z = -mp.sqrt(-2 * mp.log(-mp.expm1(log_sf)))
    else:
        z = mp.mpf(0)
    for _ in range(500):
        q = mp.ncdf(-z)
        g = mp.log(q) - log_sf
        if g > 0:
            lo = z
        else:
            hi = z
        step = g / (mp.npdf(z) / q)  # Newton: g' = -phi(z)/Q(z)
        if abs(step) <= mp.mpf(10) ** (-DPS + 5) * max(1, abs(z)):
            return z + step
        new = z + step
        z = new if lo < new < hi else (lo + hi) / 2
    raise AssertionError("mpmath root for z did not converge")


@functools.cache
def _mp_t_tails(t: float, df: float) -> tuple[mp.mpf, mp.mpf]:
    """(P(T > t), P(T <= t)) for T ~ t(df), mpmath at 50 digits on the float64 inputs."""
    with mp.workdps(DPS):
        tt, nu = mp.mpf(t), mp.mpf(df)
        x = nu / (nu + tt * tt)
        half_two_sided = mp.betainc(nu / 2, mp.mpf(1) / 2, 0, x, regularized=True) / 2  # P(T > |t|)
        # P(T <= |t|) from the other incomplete beta, so that it keeps digits near t = 0.
        y = tt * tt / (nu + tt * tt)
        near = (1 + mp.betainc(mp.mpf(1) / 2, nu / 2, 0, y, regularized=True)) / 2
        return (half_two_sided, near) if t >= 0 else (near, half_two_sided)


@functools.cache
def _mp_f_tails(f: float, df1: float, df2: float) -> tuple[mp.mpf, mp.mpf]:
    """(P(F > f), P(F <= f)) for F ~ F(df1, df2), mpmath at 50 digits."""
    with mp.workdps(DPS):
        ff, d1, d2 = mp.mpf(f), mp.mpf(df1), mp.mpf(df2)
        x = d2 / (d2 + d1 * ff)
        y = d1 * ff / (d2 + d1 * ff)
        sf = mp.betainc(d2 / 2, d1 / 2, 0, x, regularized=True)
        cdf = mp.betainc(d1 / 2, d2 / 2, 0, y, regularized=True)
        return sf, cdf


def _mp_z_t(t: float, df: float) -> float:
    with mp.workdps(DPS):
        sf, cdf = _mp_t_tails(t, df)
        # z = Phi^-1(P(T <= t)); solve on the smaller tail for accuracy.
        z = _mp_z_from_log_sf(mp.log(sf)) if sf <= cdf else -_mp_z_from_log_sf(mp.log(cdf))
        return float(z)


def _mp_z_f(f: float, df1: float, df2: float) -> float:
    with mp.workdps(DPS):
        sf, cdf = _mp_f_tails(f, df1, df2)
        z = _mp_z_from_log_sf(mp.log(sf)) if sf <= cdf else -_mp_z_from_log_sf(mp.log(cdf))
        return float(z)


def _rel(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = np.asarray(a, float), np.asarray(b, float)
    return np.abs(a - b) / np.maximum(np.abs(b), 1e-300)


T_GRID = [1e-8, 1e-3, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0, 40.0, 200.0, 1e3, 1e5]
DF_GRID = [1.0, 2.0, 3.0, 7.0, 10.0, 30.0, 100.0, 1000.0]


@pytest.mark.parametrize("df", DF_GRID)
def test_t_z_matches_mpmath_on_grid(df: float) -> None:
    # Reference: mpmath at 50 digits (incomplete beta + normal tail), both signs of t.
    t = np.array(T_GRID + [-v for v in T_GRID])
    _, _, z = tails.t_tests(t, df, "two-sided")
    ref = np.array([_mp_z_t(v, df) for v in t])
    assert np.all(_rel(z, ref) <= Z_RTOL), list(zip(t, z, ref, strict=True))


@pytest.mark.parametrize("df", DF_GRID)
def test_t_log_sf_matches_mpmath_on_grid(df: float) -> None:
    # Reference: mpmath at 50 digits. log p is checked to 1e-12 relative, or 1e-15 absolute
    # where log p is near 0 (p near 1, where only the absolute error of log p is meaningful).
    t = np.array(T_GRID + [-v for v in T_GRID])
    got = tails.log_sf_t(t, df)
    with mp.workdps(DPS):
        ref = np.array([float(mp.log(_mp_t_tails(v, df)[0])) for v in t])
    err = np.abs(got - ref)
    assert np.all(err <= np.maximum(1e-12 * np.abs(ref), 1e-15)), list(zip(t, got, ref, strict=True))


def test_t_moderate_z_values() -> None:
    # Reference: mpmath at 50 digits. t chosen so that z is near 0, 1 and 3 (the body of the
    # distribution, where a far-tail method must not lose accuracy).
    cases = [(0.0123, 12.0), (1.0, 5.0), (1.05, 40.0), (3.2, 60.0), (3.0, 1000.0), (-1.0, 5.0), (-3.2, 60.0)]
    for t, df in cases:
        _, _, z = tails.t_tests(np.array([t]), df)
        ref = _mp_z_t(t, df)
        assert _rel(z, ref)[0] <= Z_RTOL, (t, df, z, ref)


def test_very_large_df() -> None:
    # Reference: mpmath at 50 digits. Degrees of freedom of mega-analyses and beyond (around
    # df = 4000 tails.py switches how it hands the argument to scipy), where neither the body nor
    # the far-tail evaluation may lose accuracy.
    for t, df in [(1.0, 3998.0), (0.7, 4100.0), (40.0, 1e5), (40.0, 1e7), (3.0, 1e6)]:
        _, _, z = tails.t_tests(np.array([t]), df)
        ref = _mp_z_t(t, df)
        assert _rel(z, ref)[0] <= Z_RTOL, (t, df, z, ref)
    for f, d1, d2 in [(1.0, 3.0, 2000.0), (20.0, 1000.0, 1000.0), (5.0, 1e4, 1e4), (1.5, 50.0, 1e6)]:
        _, _, z = tails.f_tests(np.array([f]), d1, d2)
        ref = _mp_z_f(f, d1, d2)
        assert _rel(z, ref)[0] <= Z_RTOL, (f, d1, d2, z, ref)


F_CASES = [
    (f, d1, d2)
    for d1, d2 in [(1, 1), (1, 20), (2, 20), (3, 7), (5, 100), (10, 300), (2, 1000), (50, 60), (300, 10)]
    for f in (1e-6, 0.05, 0.5, 1.0, 3.0, 10.0, 500.0, 1e4, 1e8)
]


def test_f_z_matches_mpmath_on_grid() -> None:
    # Reference: mpmath at 50 digits; includes F < 1 (p near 1, z negative) and far tails.
    f = np.array([c[0] for c in F_CASES], dtype=float)
    d1 = np.array([c[1] for c in F_CASES], dtype=float)
    d2 = np.array([c[2] for c in F_CASES], dtype=float)
    _, log_p, z = tails.f_tests(f, d1, d2)
    ref_z = np.array([_mp_z_f(*c) for c in F_CASES])
    # Where z is within 1e-3 of 0 (F = 1 on (1, 1) has z = 0 exactly) the relative error of any
    # float64 p -> z map grows as 1e-16/|z|; there the check is on the absolute error instead.
    near0 = np.abs(ref_z) < 1e-3
    assert near0.sum() <= 2
    assert np.all(np.abs(z[near0] - ref_z[near0]) <= 1e-15)
    bad = (_rel(z, ref_z) > Z_RTOL) & ~near0
    assert not bad.any(), [(F_CASES[i], z[i], ref_z[i]) for i in np.flatnonzero(bad)]
    with mp.workdps(DPS):
        ref_lp = np.array([float(mp.log(_mp_f_tails(*c)[0])) for c in F_CASES])
    assert np.all(np.abs(log_p - ref_lp) <= np.maximum(1e-12 * np.abs(ref_lp), 1e-15))


def test_printed_far_tail_values() -> None:
    # Reference: REFERENCES.md "Far-tail z of equal p" [computed with mpmath at 50 digits].
    t_cases = [
        (40.0, 10.0, 7.0161373944776920),
        (200.0, 50.0, 18.231882859141759),
        (40.0, 1000.0, 30.904232123729010),
        (1e5, 100.0, 42.885429871146468),
    ]
    for t, df, z_ref in t_cases:
        p, log_p, z = tails.t_tests(np.array([t]), df, "greater")
        assert _rel(z, z_ref)[0] <= Z_RTOL
        assert np.isfinite(log_p[0])
    p, _, _ = tails.t_tests(np.array([40.0]), 10.0, "greater")
    assert _rel(p, 1.1404288715428773e-12)[0] <= 1e-12
    _, log_p, _ = tails.t_tests(np.array([1e5]), 100.0, "greater")
    assert abs(tails.mlog10p(log_p)[0] - (402 - math.log10(3.97946))) < 1e-5  # p 3.97946e-402
    f_cases = [
        (500.0, 2.0, 20.0, 8.5140184064198927),
        (2000.0, 10.0, 300.0, 34.952652654592958),
        (1e4, 2.0, 1000.0, 55.087803055530943),
    ]
    for f, d1, d2, z_ref in f_cases:
        _, _, z = tails.f_tests(np.array([f]), d1, d2)
        assert _rel(z, z_ref)[0] <= Z_RTOL
    p, log_p, _ = tails.f_tests(np.array([500.0]), 2.0, 20.0)
    assert _rel(p, 8.40036659072159e-18)[0] <= 1e-12
    # The same p exactly: 51^-10 (F(2, 20) has a closed-form tail (1 + 2F/20)^-10).
    assert abs(log_p[0] - (-10 * math.log(51.0))) <= 1e-13 * 10 * math.log(51.0)


def test_p_matches_scipy_where_scipy_is_accurate() -> None:
    # Reference: scipy.stats.t and scipy.stats.f (sf, cdf), restricted to p > 1e-250 where their
    # float64 values are not in the subnormal range.
    rng = np.random.default_rng(11)
    t = np.concatenate([rng.normal(0, 3, 300), rng.uniform(-30, 30, 300)])
    for df in (1.0, 4.0, 25.0, 200.0, 1000.0):
        for tail, ref in (
            ("greater", stats.t.sf(t, df)),
            ("less", stats.t.cdf(t, df)),
            ("two-sided", 2 * stats.t.sf(np.abs(t), df)),
        ):
            p, log_p, _ = tails.t_tests(t, df, tail)
            keep = ref > 1e-250
            assert np.all(_rel(p[keep], ref[keep]) <= 1e-12), (df, tail)
            assert np.allclose(np.exp(log_p), p, rtol=1e-15, atol=0)
    f = np.abs(rng.standard_cauchy(500)) * 5
    for d1, d2 in ((1, 10), (3, 40), (12, 500)):
        p, _, _ = tails.f_tests(f, d1, d2)
        ref = stats.f.sf(f, d1, d2)
        keep = ref > 1e-250
        assert np.all(_rel(p[keep], ref[keep]) <= 1e-12), (d1, d2)


def test_t_two_sided_z_reproduces_p() -> None:
    # Reference: the definition of z of equal probability; scipy.stats.norm for the normal tail.
    t = np.array([-7.5, -2.1, -0.3, 0.0, 0.4, 2.5, 9.0])
    p2, _, z = tails.t_tests(t, 13.0, "two-sided")
    assert np.all(np.sign(z) == np.sign(t))
    assert np.allclose(2 * stats.norm.sf(np.abs(z)), p2, rtol=1e-12, atol=0)
    pg, _, _ = tails.t_tests(t, 13.0, "greater")
    pl, _, _ = tails.t_tests(t, 13.0, "less")
    assert np.allclose(pg + pl, 1.0, rtol=0, atol=1e-15)
    assert np.allclose(stats.norm.sf(z), pg, rtol=1e-12, atol=0)


def test_z_from_log_sf_and_mlog10p() -> None:
    # Reference: scipy.stats.norm.isf in its accurate range; the definition -log10 p.
    p = np.array([0.4, 0.05, 1e-6, 1e-100])
    assert np.allclose(tails.z_from_log_sf(np.log(p)), stats.norm.isf(p), rtol=1e-13, atol=0)
    assert np.allclose(tails.mlog10p(np.log(p)), -np.log10(p), rtol=1e-14, atol=0)


def test_nan_and_edge_values() -> None:
    # Reference: common practice (NaN propagates; t = +-inf has p = 0 one-sided, z = +-inf).
    p, log_p, z = tails.t_tests(np.array([np.nan, np.inf, -np.inf, 0.0]), 8.0, "greater")
    assert np.isnan(p[0]) and np.isnan(log_p[0]) and np.isnan(z[0])
    assert p[1] == 0.0 and log_p[1] == -np.inf and z[1] == np.inf
    assert p[2] == 1.0 and z[2] == -np.inf
    assert p[3] == 0.5 and z[3] == 0.0
    p, log_p, z = tails.f_tests(np.array([np.nan, -1.0, 0.0, np.inf]), 2.0, 9.0)
    assert np.isnan(p[:2]).all() and np.isnan(z[:2]).all() and np.isnan(log_p[:2]).all()
    assert p[2] == 1.0 and z[2] == -np.inf
    assert p[3] == 0.0 and z[3] == np.inf
    assert np.isnan(tails.log_sf_t(np.array([1.0]), 0.0)).all()
    with pytest.raises(ValueError, match="tail"):
        tails.t_tests(np.array([1.0]), 3.0, "up")


def test_shapes_and_broadcasting() -> None:
    # Reference: scipy.stats.t.sf elementwise (shape handling only).
    t = np.linspace(-4, 4, 12).reshape(3, 4)
    df = np.array([2.0, 5.0, 9.0, 40.0])
    p, log_p, z = tails.t_tests(t, df, "greater")
    assert p.shape == log_p.shape == z.shape == (3, 4)
    assert np.allclose(p, stats.t.sf(t, df), rtol=1e-12)
