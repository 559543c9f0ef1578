"""Speed of TFCE per map: the numpy implementation against the compiled kernels (optional extra ``fast``).

What it does (data invented and seeded, as in ``permutation_speed.py``):

1. Makes null maps on the 91x109x91 ellipsoid "brain" of about 230,000 voxels: Gaussian noise smoothed
   with sigma 1.5 voxels, scaled to unit SD, times 3 (so that clusters form).
2. Times the graph set-up for the grid (``grid_adjacency``, 26 neighbours) and, for comparison, the edge
   list it no longer builds up front (``adjacency.u``).
3. Times the two-sided TFCE of each map (E 0.5, H 2, dh = max |x| / 100, 26 neighbours) with the numpy
   implementation and the compiled one, side by side and alternating (numpy, compiled, numpy, ...), so
   that the load of other processes on the machine hits both alike; prints the medians (CPU and wall)
   and checks that both give the same maps.
4. Times the per-map task of the engine's worker processes on the compiled path, alternating: as it was
   (``abs(tfce(map)).max()``: levels in numpy, the whole map returned) and as it is
   (:func:`~groupmodel.inference.tfce.tfce_max`: levels and the maximum inside the kernel), and what shipping
   a batch of maps to a worker costs per map (pickle and unpickle, as the process pool does).
5. Times, in fresh interpreters, numba's first compilation (an empty cache directory) and the load of the
   cached machine code (the same directory again): what a worker process pays on its first map.

Nothing is asserted; the figures are printed with the load average.  ``--quick`` runs a small grid.

Usage::

    python benchmarks/tfce_speed.py            # full size (about a minute)
    python benchmarks/tfce_speed.py --quick
    python benchmarks/tfce_speed.py --maps 21
"""

from __future__ import annotations

import argparse
import os
import pickle
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import ndimage

from groupmodel.inference.fastpath import ENV_NO_COMPILED, compiled_kernels
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.tfce import tfce, tfce_max

SEED = 20240606
FULL = {"shape": (91, 109, 91), "semi_axes": (36.0, 45.0, 34.0)}
QUICK = {"shape": (30, 36, 30), "semi_axes": (12.0, 15.0, 11.5)}

#: Run in a fresh interpreter: import the kernels and enhance one small map (compiles or loads the cache).
_FIRST_MAP = """
import time
t0 = time.perf_counter()
import numpy as np
from groupmodel.inference.fastpath import compiled_kernels
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.tfce import tfce, tfce_max
assert compiled_kernels() is not None
t1 = time.perf_counter()
mask = np.ones((6, 6, 6), bool)
tfce(np.linspace(-3, 3, 216), grid_adjacency(mask), 0.1, two_sided=True)
print(t1 - t0, time.perf_counter() - t1)
"""


def brain_mask(shape: tuple[int, int, int], semi_axes: tuple[float, float, float]) -> np.ndarray:
    """Boolean ellipsoid centred in the grid (as in permutation_speed.py)."""
    idx = np.indices(shape, dtype=np.float32)
    r2 = sum(((idx[d] - (shape[d] - 1) / 2) / semi_axes[d]) ** 2 for d in range(3))
    return r2 <= 1.0


def null_maps(mask: np.ndarray, count: int, smooth: float) -> np.ndarray:
    """Smoothed Gaussian noise maps over the mask, unit SD, shape (count, V)."""
    rng = np.random.default_rng(SEED)
    maps = np.empty((count, int(mask.sum())))
    for i in range(count):
        vol = ndimage.gaussian_filter(rng.standard_normal(mask.shape), smooth)
        maps[i] = vol[mask] / vol[mask].std()
    return maps


def _timed(fn: object, *args: object, **kw: object) -> tuple[object, float, float]:
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn(*args, **kw)  # type: ignore[operator]
    return out, time.process_time() - c0, time.perf_counter() - t0


def per_map(maps: np.ndarray, adj: object, dh: float) -> dict[str, np.ndarray]:
    """CPU and wall seconds of each map's TFCE on both paths, alternating; and the largest difference."""
    times = {"numpy_cpu": [], "numpy_wall": [], "compiled_cpu": [], "compiled_wall": [], "diff": []}
    for m in maps:
        x = m * 3.0
        os.environ[ENV_NO_COMPILED] = "1"
        ref, cpu, wall = _timed(tfce, x, adj, dh * 3.0, two_sided=True)
        times["numpy_cpu"].append(cpu)
        times["numpy_wall"].append(wall)
        os.environ[ENV_NO_COMPILED] = "0"
        fast, cpu, wall = _timed(tfce, x, adj, dh * 3.0, two_sided=True)
        times["compiled_cpu"].append(cpu)
        times["compiled_wall"].append(wall)
        scale = np.abs(ref).max()
        times["diff"].append(float(np.max(np.abs(fast - ref)) / scale) if scale else 0.0)
    return {k: np.asarray(v) for k, v in times.items()}


def task_per_map(maps: np.ndarray, adj: object, dh: float) -> dict[str, float]:
    """CPU seconds per map of the workers' task, as it was and as it is, alternating; and of shipping maps."""
    old, new, same = [], [], True
    for x in maps:
        c0 = time.process_time()
        a = float(np.abs(tfce(x, adj, dh, two_sided=True)).max())
        c1 = time.process_time()
        b = tfce_max(x, adj, dh, two_sided=True)
        c2 = time.process_time()
        old.append(c1 - c0)
        new.append(c2 - c1)
        same &= a == b
    c0 = time.process_time()
    for _ in range(3):
        pickle.loads(pickle.dumps(maps.copy(), protocol=pickle.HIGHEST_PROTOCOL))
    ship = (time.process_time() - c0) / (3 * len(maps))
    return {"old": float(np.median(old)), "new": float(np.median(new)), "same": same, "ship": ship}


def compile_times() -> tuple[float, float, float, float]:
    """(import, first map) seconds in a fresh interpreter with an empty numba cache, then with it filled."""
    root = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(root), os.environ.get("PYTHONPATH", "")]))
    env.pop(ENV_NO_COMPILED, None)
    with tempfile.TemporaryDirectory() as cache:
        env["NUMBA_CACHE_DIR"] = cache
        runs = []
        for _ in range(2):
            out = subprocess.run([sys.executable, "-c", _FIRST_MAP], env=env, capture_output=True, text=True,
                                 check=True)
            runs.append([float(v) for v in out.stdout.split()])
    return runs[0][0], runs[0][1], runs[1][0], runs[1][1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="small grid")
    ap.add_argument("--maps", type=int, default=11, help="maps timed on each path (11)")
    ap.add_argument("--smooth", type=float, default=1.5, help="smoothing sigma in voxels (1.5)")
    args = ap.parse_args()
    cfg = QUICK if args.quick else FULL
    if compiled_kernels() is None:
        sys.exit('the compiled kernels are not available: pip install "groupmodel[fast]" (numba)')
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} (1 min) at the start")
    mask = brain_mask(cfg["shape"], cfg["semi_axes"])
    maps = null_maps(mask, args.maps, args.smooth)
    V = maps.shape[1]

    setups, edges = [], []
    for _ in range(5):
        adj, _, wall = _timed(grid_adjacency, mask, 26)
        setups.append(wall)
        t0 = time.perf_counter()
        _ = adj.u  # type: ignore[attr-defined]
        edges.append(time.perf_counter() - t0)
    adj = grid_adjacency(mask, 26)
    print(f"grid set-up ({V} voxels, 26 neighbours): {1e3 * np.median(setups):.1f} ms (median of 5; "
          f"fastest {1e3 * np.min(setups):.1f} ms); "
          f"the edge list, now built only when asked for: {1e3 * np.median(edges):.0f} ms")

    dh = float(np.abs(maps).max() / 100)
    tfce(maps[0] * 3.0, adj, dh * 3.0, two_sided=True)  # compile or load the cache before timing
    t = per_map(maps, adj, dh)
    med = {k: float(np.median(v)) for k, v in t.items()}
    print(f"TFCE per map (two-sided, E 0.5, H 2, dh = max/100, 26 neighbours, {V} voxels), medians of "
          f"{len(maps)} maps, alternating:")
    print(f"   numpy:    {1e3 * med['numpy_cpu']:6.1f} ms CPU, {1e3 * med['numpy_wall']:6.1f} ms wall")
    print(f"   compiled: {1e3 * med['compiled_cpu']:6.1f} ms CPU, {1e3 * med['compiled_wall']:6.1f} ms wall  "
          f"({med['numpy_cpu'] / med['compiled_cpu']:.1f}x less CPU)")
    print(f"   largest difference between the paths: {t['diff'].max():.1e} of the map's largest |TFCE|")
    print(f"   x 5000 permutations: numpy {5000 * med['numpy_cpu'] / 60:.1f} CPU-minutes, compiled "
          f"{5000 * med['compiled_cpu'] / 60:.1f}")
    task = task_per_map(maps * 3.0, adj, dh * 3.0)
    print(f"the workers' per-map task (compiled, two-sided; medians of {len(maps)}, alternating): as it was "
          f"(levels in numpy, abs(tfce(map)).max()) {1e3 * task['old']:.1f} ms CPU; levels and maximum in the kernel "
          f"{1e3 * task['new']:.1f} ms CPU ({task['old'] / task['new']:.2f}x less; same maxima: {task['same']}); "
          f"shipping a batch to a worker (pickle + unpickle) {1e3 * task['ship']:.1f} ms CPU per map")
    imp0, first0, imp1, first1 = compile_times()
    print(f"numba in a fresh interpreter: first compilation {first0:.1f} s (import {imp0:.2f} s); "
          f"cached load {first1:.2f} s (import {imp1:.2f} s)")
    print(f"load average at the end: {os.getloadavg()[0]:.2f} (1 min)")


if __name__ == "__main__":
    main()
