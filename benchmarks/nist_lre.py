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
import re
import sys
import time
from fractions import Fraction
from pathlib import Path

import numpy as np
import scipy.stats

from groupmodel import tails
from groupmodel.ols import Test, fit_chunk, prepare

NIST_DIR = Path(scipy.stats.__file__).parent / "tests" / "data" / "nist_anova"
NIST_SETS = ["AtmWtAg", "SiRstv"] + [f"SmLs0{i}" for i in range(1, 10)]


def lre(value: float, certified: float) -> float:
    """Log relative error, capped at 15 (NIST practice); -inf-safe for wildly wrong values."""
    if value == certified:
        return 15.0
    if not math.isfinite(value):
        return 0.0
    return max(0.0, min(15.0, -math.log10(abs(value - certified) / abs(certified))))


def read_nist(path: Path) -> tuple[float, float, np.ndarray, np.ndarray]:
    """Certified F and residual SD (header lines 41-48) and (group, response) from line 61."""
    lines = path.read_text().splitlines()
    header = "\n".join(lines[40:48])
    f_cert = float(re.search(r"^Between \w+\s+\d+\s+\S+\s+\S+\s+(\S+)\s*$", header, re.M).group(1))
    sd_cert = float(re.search(r"Standard Deviation\s+(\S+)", header).group(1))
    data = np.loadtxt(path, skiprows=60)
    return f_cert, sd_cert, data[:, 0].astype(int), data[:, 1]


def exact_anova(groups: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """F and residual SD in exact rational arithmetic on the float64 inputs."""
    yf = [Fraction(v) for v in y.tolist()]
    n, levels = len(yf), np.unique(groups)
    grand = sum(yf, Fraction(0)) / n
    ssb = ssw = Fraction(0)
    for lv in levels:
        cell = [yf[i] for i in np.flatnonzero(groups == lv)]
        m = sum(cell, Fraction(0)) / len(cell)
        ssb += len(cell) * (m - grand) ** 2
        ssw += sum(((v - m) ** 2 for v in cell), Fraction(0))
    k = len(levels)
    return float((ssb / (k - 1)) / (ssw / (n - k))), math.sqrt(float(ssw / (n - k)))


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
        f_cert, sd_cert, groups, y = read_nist(NIST_DIR / f"{name}.dat")
        x, rows = designs(groups)
        res = fit_chunk(prepare(x, [Test("groups", rows, "F")]), y)
        f = float(res["groups"].statistic[0])
        sd = math.sqrt(float(res.residual_variance[0]))
        f_ex, sd_ex = exact_anova(groups, y)
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
