"""Speed of permutation inference (Freedman-Lane, max statistic, TFCE) on brain-sized data.

What it does (all data invented and seeded):

1. Makes 100 participants x about 230,000 voxels (an ellipsoid "brain" in a 91x109x91 grid; each
   participant's map is Gaussian noise smoothed with a Gaussian kernel, sigma 1.5 voxels), and a
   design of 6 columns: intercept, two groups of 50, and 4 covariates.  The contrast is the group
   difference (t, two-sided), so the nuisance has 5 columns; 4 of them move under permutation and
   the engine stacks m = 5 rows per rearrangement.
2. Times, in one run:

   * the naive refit: residualise, permute, ``numpy.linalg.lstsq`` on all voxels (a few
     permutations, per permutation);
   * the matrix-product floor: the engine's stacked product (B m, n) @ (n, V) for a batch of
     B = 100 rearrangements into preallocated outputs, the fastest of several ways (tiles of the
     engine's width and wider ones with BLAS's own threads; one thread per core with single-threaded
     BLAS, as the engine runs), best of 3, measured before and after the engine run; per
     permutation.  The floor of the full-design product (B p rows, as in REFERENCES.md) is printed
     for comparison;
   * the engine (``run_permutations``) for max-statistic voxel FWE with J permutations (default
     5,000), with the numpy element-wise pass and the compiled one (extra ``fast``) alternating
     (``--rounds`` runs each, the floor measured again after each round): wall and CPU time per
     permutation, their ratios to the floor (goal <= 1.2), and whether both paths gave the same bits;
   * TFCE: CPU time per map of the workers' task (largest |TFCE| of a two-sided null map; one process; the
     compiled kernels when numba is installed, else numpy; ``tfce_speed.py`` compares the two), and the
     engine with TFCE (CPU of the main process and of the workers printed) for
     a smaller number of permutations with worker processes, scaled to 5,000 (said so).

Nothing is asserted; the figures are printed, with the load average (other processes on the
machine slow everything down).  ``--quick`` runs a small version in well under a minute.

Usage::

    python benchmarks/permutation_speed.py                 # full run (several minutes)
    python benchmarks/permutation_speed.py --quick
    python benchmarks/permutation_speed.py --perms 1000 --tfce-perms 100 --jobs 2
    python benchmarks/permutation_speed.py --tfce-perms 5000   # TFCE measured in full (minutes more)
    python benchmarks/permutation_speed.py --skip-naive --skip-tfce --perms 2000 --rounds 3   # max statistic only
    python benchmarks/permutation_speed.py --skip-maxstat --tfce-perms 5000                  # TFCE only
"""

from __future__ import annotations

import argparse
import os
import resource
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import ndimage

from groupmodel.inference.driver import run_permutations
from groupmodel.inference.fastpath import ENV_NO_COMPILED, compiled_kernels, compiled_scan
from groupmodel.inference.freedman_lane import plan_contrast, residualise, stack_rows
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.kernel import tile_width
from groupmodel.inference.rearrangements import permutation_set
from groupmodel.inference.results import TfceResult
from groupmodel.inference.settings import ContrastTest, Execution, MapSettings, Rearrangements
from groupmodel.inference.tfce import TfceParams, tfce_max
from groupmodel.runtime.cores import available_cores, single_threaded_blas

SEED = 20240606
FULL = {"shape": (91, 109, 91), "semi_axes": (36.0, 45.0, 34.0), "n": 100}
QUICK = {"shape": (30, 36, 30), "semi_axes": (12.0, 15.0, 11.5), "n": 40}


def brain_mask(shape: tuple[int, int, int], semi_axes: tuple[float, float, float]) -> np.ndarray:
    """Boolean ellipsoid centred in the grid."""
    idx = np.indices(shape, dtype=np.float32)
    r2 = sum(((idx[d] - (shape[d] - 1) / 2) / semi_axes[d]) ** 2 for d in range(3))
    return r2 <= 1.0


def make_data(cfg: dict, smooth: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mask, design (n, 6) and data (n, V) float64."""
    rng = np.random.default_rng(SEED)
    mask = brain_mask(cfg["shape"], cfg["semi_axes"])
    n = cfg["n"]
    group = np.r_[np.zeros(n // 2), np.ones(n - n // 2)]
    cov = rng.standard_normal((n, 4))
    cov[:, 0] += 0.5 * group  # a nuisance correlated with the effect of interest
    X = np.column_stack([np.ones(n), group, cov - cov.mean(axis=0)])
    Y = np.empty((n, int(mask.sum())))
    for i in range(n):
        vol = rng.standard_normal(mask.shape)
        if smooth > 0:
            vol = ndimage.gaussian_filter(vol, smooth)
        Y[i] = vol[mask] / vol[mask].std()
    return mask, X, Y


def _tiled_product(A: np.ndarray, W: np.ndarray, lo: int, hi: int, tile: int) -> None:
    out = np.empty((A.shape[0], tile))
    for s in range(lo, hi, tile):
        e = min(hi, s + tile)
        np.matmul(A, W[:, s:e], out=out[:, : e - s])


def product_floor(A: np.ndarray, W: np.ndarray, repeats: int = 3) -> tuple[float, float, str]:
    """Best wall time of the product A @ W alone, and its CPU time and how it was done (seconds).

    The product is tried in tiles of the engine's width and of wider tiles with BLAS's own threads,
    and split over one thread per core with single-threaded BLAS (as the engine does), into
    preallocated outputs; the fastest of all is the floor.
    """
    V = W.shape[1]
    cores = available_cores()
    ways: dict[str, Callable[[], None]] = {}
    for tile in sorted({tile_width(A.shape[0]), 1024, 4096}):
        ways[f"BLAS threads, tiles of {tile}"] = lambda tile=tile: _tiled_product(A, W, 0, V, tile)

    def split() -> None:
        tile = tile_width(A.shape[0])
        per = -(-V // cores)
        with single_threaded_blas(), ThreadPoolExecutor(cores) as pool:
            for f in [pool.submit(_tiled_product, A, W, s, min(V, s + per), tile) for s in range(0, V, per)]:
                f.result()

    ways[f"{cores} threads x 1 BLAS thread"] = split
    best, best_cpu, how = np.inf, np.inf, ""
    for _ in range(repeats):
        for name, way in ways.items():
            t0, c0 = time.perf_counter(), time.process_time()
            way()
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            if wall < best:
                best, best_cpu, how = wall, cpu, name
    return best, best_cpu, how


def naive_refit(X: np.ndarray, L: np.ndarray, Y: np.ndarray, perms: np.ndarray) -> float:
    """Seconds per permutation of residualise / permute / lstsq refit / t on all voxels."""
    from scipy import linalg

    Z = X @ linalg.null_space(L)
    R = Y - Z @ np.linalg.lstsq(Z, Y, rcond=None)[0]
    c = L @ np.linalg.pinv(X.T @ X) @ L.T
    df = X.shape[0] - np.linalg.matrix_rank(X)
    t0 = time.perf_counter()
    for p in perms:
        Ys = R[p]
        beta = np.linalg.lstsq(X, Ys, rcond=None)[0]
        s2 = ((Ys - X @ beta) ** 2).sum(axis=0) / df
        _ = (L @ beta)[0] / np.sqrt(s2 * c[0, 0])
    return (time.perf_counter() - t0) / len(perms)


def _children_cpu() -> float:
    """CPU seconds of the finished worker processes of this process."""
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return kids.ru_utime + kids.ru_stime


def max_statistic(args: argparse.Namespace, X: np.ndarray, L: np.ndarray, Y: np.ndarray, A: np.ndarray,
                  W: np.ndarray, full_rows: np.ndarray, J: int) -> None:
    """The engine's max-statistic run on each element-wise path, alternating, against the product floor."""
    (fb, fb_cpu, how_b), (fp, _, _) = product_floor(A, W), product_floor(full_rows, W)
    floors = [(fb, fb_cpu)]
    engine: dict[str, list[tuple[float, float]]] = {"numpy": [], "compiled": []}
    paths = ["numpy", "compiled"] if compiled_scan() is not None else ["numpy"]
    res = {}
    # Load (or compile) every path's code before timing: a small run with a batch after the observed one.
    run_permutations(ContrastTest(X, L), Y[:, :2000], Rearrangements(n_perm=150, seed=1),
                     execution=Execution(batch_size=50))
    for _ in range(args.rounds):  # alternating, so that the load of other processes hits every path alike
        for path in paths:
            os.environ[ENV_NO_COMPILED] = "1" if path == "numpy" else "0"
            t0, c0 = time.perf_counter(), time.process_time()
            res[path] = run_permutations(ContrastTest(X, L), Y, Rearrangements(n_perm=J, seed=1))
            engine[path].append(((time.perf_counter() - t0) / J, (time.process_time() - c0) / J))
        wall, cpu, how_a = product_floor(A, W)
        floors.append((wall, cpu))
    os.environ.pop(ENV_NO_COMPILED, None)
    floor = float(np.mean([f[0] for f in floors])) / 100
    floor_cpu = float(np.mean([f[1] for f in floors])) / 100
    print(f"product floor (B m = {A.shape[0]} rows; fastest of several tilings and threadings, measured "
          f"{len(floors)} times between the engine runs): first {10 * fb:.2f} ms ({how_b}), last "
          f"{10 * floors[-1][0]:.2f} ms ({how_a}), mean {1e3 * floor:.2f} ms per permutation "
          f"(CPU {1e3 * floor_cpu:.2f} ms)")
    print(f"full-design product floor (B p = {full_rows.shape[0]} rows): {10 * fp:.2f} ms per permutation")
    for path in paths:
        runs = engine[path]
        walls = [w for w, _ in runs]
        med, med_cpu = float(np.median(walls)), float(np.median([c for _, c in runs]))
        print(f"engine, {path} element-wise pass ({available_cores()} threads, tiles of "
              f"{tile_width(A.shape[0])} voxels), max-statistic voxel FWE, {J} permutations x {len(runs)} runs: "
              f"{1e3 * med:.2f} ms per permutation (median; runs {', '.join(f'{1e3 * w:.2f}' for w in walls)}), "
              f"CPU {1e3 * med_cpu:.2f} ms; ratio to floor {med / floor:.2f} wall, {med_cpu / floor_cpu:.2f} CPU "
              f"(goal <= 1.2); ratio to the full-design floor {med / (fp / 100):.2f}")
    if len(paths) == 2:
        same = all(np.array_equal(getattr(res["numpy"], f), getattr(res["compiled"], f), equal_nan=True)
                   for f in ("stat", "p_perm", "p_fwe", "max_null"))
        print(f"   numpy and compiled passes give identical statistics, p maps and maxima: {same}")
    last = res[paths[-1]]
    print(f"   smallest FWE p {np.nanmin(last.p_fwe):.4f}, 95th percentile of max |t| "
          f"{np.quantile(last.max_null, 0.95):.3f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="small grid and few permutations")
    ap.add_argument("--perms", type=int, default=None, help="permutations for the max-statistic run (5000)")
    ap.add_argument("--tfce-perms", type=int, default=None, help="permutations for the TFCE run (200)")
    ap.add_argument("--tfce-maps", type=int, default=None, help="maps for the per-map TFCE time (10)")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes for TFCE (2)")
    ap.add_argument("--smooth", type=float, default=1.5, help="smoothing sigma in voxels (1.5)")
    ap.add_argument("--skip-naive", action="store_true")
    ap.add_argument("--rounds", type=int, default=2, help="engine runs per path, alternating (2)")
    ap.add_argument("--skip-tfce", action="store_true", help="only the max-statistic figures")
    ap.add_argument("--skip-maxstat", action="store_true", help="only the TFCE figures")
    args = ap.parse_args()
    cfg = QUICK if args.quick else FULL
    J = args.perms or (300 if args.quick else 5000)
    JT = args.tfce_perms or (60 if args.quick else 200)
    n_maps = args.tfce_maps or (3 if args.quick else 10)

    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} (1 min)")
    t0 = time.perf_counter()
    mask, X, Y = make_data(cfg, args.smooth)
    n, V = Y.shape
    L = np.array([[0, 1, 0, 0, 0, 0.0]])
    print(f"data: {n} observations x {V} voxels, design {X.shape[1]} columns "
          f"(made in {time.perf_counter() - t0:.1f} s)")

    plan = plan_contrast(X, L)
    pset = permutation_set(n, 101, "permute", seed=1, classes=plan.classes)
    W, _ = residualise(plan, Y)
    A = stack_rows(plan, *pset.batch(0, 100))
    full_rows = np.repeat(np.linalg.qr(X)[0].T[None], 100, axis=0).reshape(-1, n)
    print(f"rows per rearrangement in the stacked product: m = {plan.m} (design p = {X.shape[1]})")

    if not (args.skip_naive or args.skip_maxstat):
        naive = naive_refit(X, L, Y, pset.perm[1:4])
        print(f"naive lstsq refit: {naive:.3f} s per permutation")

    if not args.skip_maxstat:
        max_statistic(args, X, L, Y, A, W, full_rows, J)
    if args.skip_tfce:
        print(f"load average at the end: {os.getloadavg()[0]:.2f}")
        return
    # TFCE: per-map CPU time on null maps, then the engine with workers.
    adj = grid_adjacency(mask)
    maps = np.stack([Y[i] * 1.0 for i in range(n_maps)])  # smooth null maps, unit SD
    dh = np.abs(maps).max() / 100
    cpu = []
    for m in maps:
        t0 = time.process_time()
        tfce_max(m * 3.0, adj, dh * 3.0, two_sided=True)  # what the engine's workers do per map
        cpu.append(time.process_time() - t0)
    per_map = float(np.median(cpu))
    path = "compiled" if compiled_kernels() is not None else "numpy"
    print(f"TFCE ({path} path; two-sided, E 0.5, H 2, dh = max/100, 26-connectivity) on {V} voxels: "
          f"{1e3 * per_map:.0f} ms CPU per map (median of {n_maps}, one process); "
          f"x 5000 = {5000 * per_map / 60:.1f} CPU-minutes")
    # Fixed cost (worker start-up, observed map): a run with one batch of 2 rearrangements.
    t0 = time.perf_counter()
    with_tfce, jobs = MapSettings(adjacency=adj, tfce=TfceParams()), Execution(n_jobs=args.jobs)
    run_permutations(ContrastTest(X, L), Y, Rearrangements(n_perm=2, seed=1), with_tfce, jobs)
    fixed = time.perf_counter() - t0
    t0, c0, k0 = time.perf_counter(), time.process_time(), _children_cpu()
    rt = run_permutations(ContrastTest(X, L), Y, Rearrangements(n_perm=JT, seed=1), with_tfce, jobs)
    wall = time.perf_counter() - t0
    main_cpu, workers_cpu = time.process_time() - c0, _children_cpu() - k0
    scaled = fixed + max(wall - fixed, 0.0) * 5000 / JT
    print(f"engine with TFCE, {JT} permutations, {args.jobs} worker processes: {wall:.1f} s wall, of which "
          f"about {fixed:.1f} s fixed (start-up, observed map; dh {rt.whole_map(TfceResult).params.dh:.4f})")
    print(f"   CPU: main process {main_cpu:.0f} s, worker processes {workers_cpu:.0f} s (load average now "
          f"{os.getloadavg()[0]:.2f}; on idle cores the wall time would be about the larger of the main process's "
          "share and (main + workers) / cores)")
    if JT >= 5000:
        print(f"   {JT} permutations measured: {wall / 60:.1f} minutes (goal for 5000: < 2.5)")
    elif wall > 2 * fixed:
        print(f"   scaled to 5000 permutations: {scaled / 60:.1f} minutes (goal < 2.5; measured on {JT} "
              "permutations and scaled linearly beyond the fixed cost)")
    else:
        print("   run too short next to the fixed cost to scale; use more --tfce-perms")
    print(f"load average at the end: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
