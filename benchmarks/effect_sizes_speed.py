"""Time of the effect sizes and intervals on a brain-sized chunk, against the OLS fit itself.

Run with ``python benchmarks/effect_sizes_speed.py``.  On a synthetic 100 x 230,000 float64 chunk (seeded)
with 6 design columns and 6 tests (4 t, 2 F) it prints

* the wall time of ``fit_chunk``;
* the time of the t intervals, Cohen's d and partial eta squared for every test, and of the noncentral-F
  interval of partial eta squared read off the spline (the grid built once per (df1, df2, level), timed
  apart);
* the time of solving the same interval by brentq for every voxel, measured on 2,000 voxels and scaled;
* the largest difference between the two on those voxels.

Nothing is asserted; the figures are printed.
"""

from __future__ import annotations

import time

import numpy as np

from groupmodel.engine import effect_sizes as es
from groupmodel.engine.ols import Test, fit_chunk, prepare

N, V = 100, 230_000


def main() -> None:
    rng = np.random.default_rng(0)
    group = np.repeat([0, 1, 2], [34, 33, 33])
    x = np.column_stack([np.ones(N), group == 1, group == 2, rng.integers(0, 2, N), rng.normal(0, 1, (N, 2))])
    tests = [Test("g12", [0, 1, -1, 0, 0, 0], "t"), Test("g1", [0, 1, 0, 0, 0, 0], "t"),
             Test("sex", [0, 0, 0, 1, 0, 0], "t"), Test("age", [0, 0, 0, 0, 1, 0], "t"),
             Test("groups", [[0, 1, 0, 0, 0, 0], [0, 0, 1, 0, 0, 0]], "F"),
             Test("covs", [[0, 0, 0, 0, 1, 0], [0, 0, 0, 0, 0, 1]], "F")]
    y = rng.normal(0, 1, (N, V)) + np.outer(group == 1, rng.gamma(0.3, 0.5, V))
    prepared = prepare(x, tests)
    t0 = time.perf_counter()
    res = fit_chunk(prepared, y)
    t_fit = time.perf_counter() - t0
    print(f"fit_chunk, {N} x {V:,}: {t_fit:.2f} s")

    t0 = time.perf_counter()
    for df1 in sorted({r.df1 for r in res.tests.values()}):
        for prob in (0.975, 0.025):
            es._spline(df1, res.df_resid, prob)
    print(f"splines for df1 in {{1, 2}}, df2 = {res.df_resid}: {time.perf_counter() - t0:.2f} s (once)")

    t0 = time.perf_counter()
    for r in res.tests.values():
        f = r.statistic**2 if r.kind == "t" else r.statistic
        if r.kind == "t":
            es.t_interval(r.effect, r.se, r.df2)
            es.cohens_d(r.effect, res.residual_variance)
        es.partial_eta_squared(f, r.df1, r.df2)
        es.partial_eta_squared_interval(f, r.df1, r.df2)
    t_grid = time.perf_counter() - t0
    print(f"effect sizes and intervals of 6 tests (spline): {t_grid:.2f} s")

    sample = slice(0, 2000)
    worst = 0.0
    t0 = time.perf_counter()
    for r in res.tests.values():
        f = (r.statistic**2 if r.kind == "t" else r.statistic)[sample]
        direct = es.partial_eta_squared_interval(f, r.df1, r.df2, grid=False)
        spline = es.partial_eta_squared_interval(f, r.df1, r.df2, grid=True)
        worst = max(worst, float(np.nanmax(np.abs(direct.lower - spline.lower))),
                    float(np.nanmax(np.abs(direct.upper - spline.upper))))
    t_direct = (time.perf_counter() - t0) * V / 2000
    print(f"the same intervals by brentq at every voxel (scaled from 2,000 voxels): {t_direct:.0f} s")
    print(f"largest |spline - brentq| in partial eta squared on those voxels: {worst:.2g}")


if __name__ == "__main__":
    main()
