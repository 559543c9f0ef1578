"""Accuracy of the OLS engine on NIST StRD one-way ANOVA, and its speed on a brain-sized chunk.

Run with ``python benchmarks/nist_lre.py``.  Prints

* per NIST dataset (files shipped in scipy's test data): certified F, groupmodel's F, the LRE
  (log relative error, number of correct digits) of F and of the residual SD, the ceiling that
  exact rational arithmetic on the float64 inputs attains, and the LRE of an uncentred
  normal-equations fit for comparison;
* the wall time of ``fit_chunk`` on a synthetic 100 x 230,000 float32 chunk with 6 design columns
  and 6 tests (4 t, 2 F), and how much of it the tail computations take.
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

import numpy as np

from groupmodel.engine import tails
from groupmodel.engine.ols import Test, fit_chunk, prepare

# The NIST reader, LRE and exact-arithmetic ceiling are the reference tests' own (one copy of each).
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "reference"))
from nist_strd import EASY, HARD, NIST_DIR, exact_oneway, lre, read_nist  # noqa: E402

NIST_SETS = EASY + HARD


def designs(groups: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Intercept + sum-to-zero coding and the F of its k-1 columns."""
    levels = np.unique(groups)
    k = levels.size
    idx = np.searchsorted(levels, groups)
    x = np.column_stack([np.ones(groups.size), np.vstack([np.eye(k - 1), -np.ones(k - 1)])[idx]])
    rows = np.column_stack([np.zeros(k - 1), np.eye(k - 1)])
    return x, rows


def normal_equations(x: np.ndarray, y: np.ndarray, rows: np.ndarray) -> tuple[float, float]:
    """The textbook uncentred fit: b = (X'X)^-1 X'y; F from L (X'X)^-1 L'. For comparison only."""
    xtx_inv = np.linalg.inv(x.T @ x)
    b = xtx_inv @ (x.T @ y)
    rss = float(y @ y - b @ (x.T @ y))  # the cancelling sum-of-squares identity
    df = x.shape[0] - x.shape[1]
    s2 = rss / df
    lb = rows @ b
    f = float(lb @ np.linalg.solve(rows @ xtx_inv @ rows.T, lb)) / (rows.shape[0] * s2)
    return f, math.sqrt(s2) if s2 > 0 else float("nan")


def nist_table() -> None:
    if not NIST_DIR.is_dir():
        print(f"NIST StRD data not found at {NIST_DIR}; skipping the accuracy table")
        return
    head = (
        f"{'dataset':9s} {'certified F':>18s} {'groupmodel F':>22s} {'LRE F':>6s} {'LRE SD':>7s} "
        f"{'exact F/SD':>11s} {'normal eq. F/SD':>16s}"
    )
    print(head)
    print("-" * len(head))
    for name in NIST_SETS:
        data = read_nist(name)
        f_cert, sd_cert, groups, y = data.f_certified, data.sd_certified, data.groups, data.y
        x, rows = designs(groups)
        res = fit_chunk(prepare(x, [Test("groups", rows, "F")]), y)
        f = float(res["groups"].statistic[0])
        sd = math.sqrt(float(res.residual_variance[0]))
        f_ex, sd_ex = exact_oneway(groups, y)
        f_ne, sd_ne = normal_equations(x, y, rows)
        exact = f"{lre(f_ex, f_cert):5.1f}/{lre(sd_ex, sd_cert):<5.1f}"
        normal = f"{lre(f_ne, f_cert):9.1f}/{lre(sd_ne, sd_cert):<5.1f}"
        ours = f"{lre(f, f_cert):6.1f} {lre(sd, sd_cert):7.1f}"
        print(f"{name:9s} {f_cert:18.15g} {f:22.15g} {ours} {exact} {normal}")
    print("(LRE capped at 15; 'exact' = exact rational arithmetic on the float64 inputs: the ceiling)")


def timing(n: int = 100, v: int = 230_000, repeats: int = 3) -> None:
    rng = np.random.default_rng(0)
    codes = np.repeat(np.arange(3), [30, 30, 40])
    age = rng.normal(40, 10, n)
    x = np.column_stack(
        [np.ones(n), codes == 1, codes == 2, age - age.mean(), rng.normal(size=n), rng.normal(size=n)]
    ).astype(float)
    tests = [
        Test("b_vs_a", [0, 1, 0, 0, 0, 0], "t"),
        Test("c_vs_b", [0, -1, 1, 0, 0, 0], "t", "greater"),
        Test("age", [0, 0, 0, 1, 0, 0], "t"),
        Test("mean_a", [1, 0, 0, 0, 0, 0], "t"),
        Test("groups", [[0, 1, 0, 0, 0, 0], [0, 0, 1, 0, 0, 0]], "F"),
        Test("covariates", [[0, 0, 0, 1, 0, 0], [0, 0, 0, 0, 1, 0], [0, 0, 0, 0, 0, 1]], "F"),
    ]
    y = (rng.normal(size=(n, v)) + 100.0).astype(np.float32)
    prep = prepare(x, tests)
    best, best_cpu = math.inf, math.inf
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        res = fit_chunk(prep, y)
        best = min(best, time.perf_counter() - t0)
        best_cpu = min(best_cpu, time.process_time() - c0)
    # The share of the tails (incomplete beta per voxel and test) in that time, per test.
    per_test = []
    for test in tests:
        r = res[test.name]
        c0 = time.process_time()
        if test.kind == "t":
            tails.t_tests(r.statistic, r.df2, test.tail)
        else:
            tails.f_tests(r.statistic, r.df1, r.df2)
        per_test.append((test.name, time.process_time() - c0))
    t_tails = sum(t for _, t in per_test)
    print(
        f"fit_chunk on {n} x {v} float32, {x.shape[1]} columns, {len(tests)} tests (best of {repeats}): "
        f"{best:.3f} s wall, {best_cpu:.3f} s CPU"
    )
    print(
        f"  of which p/log p/z: {t_tails:.3f} s CPU ("
        + ", ".join(f"{name} {t:.3f}" for name, t in per_test)
        + f"); fit and statistics: {best_cpu - t_tails:.3f} s CPU"
    )
    print("  (CPU time includes BLAS threads; run with OPENBLAS_NUM_THREADS=1 on a busy machine)")


def main() -> int:
    nist_table()
    print()
    timing()
    return 0


if __name__ == "__main__":
    sys.exit(main())
