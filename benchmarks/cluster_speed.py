"""Permutation inference on a Dask LocalCluster of 1 and 2 workers against the local engine on the same work.

What it does (all data invented and seeded, as in ``permutation_speed.py``):

1. Makes the permutation benchmark's study (100 participants x about 230,000 voxels, design of 6 columns,
   the group difference as a two-sided t) and writes one uncompressed float32 NIfTI image per participant
   into a temporary folder, which the workers read themselves (as on a shared file system).
2. Times max-statistic voxel FWE with J permutations (default 5,000):

   * the local engine (``run_permutations``) with 1 and 2 threads, on the loaded matrix;
   * the cluster driver (``run_on_cluster``) on a LocalCluster of 1 and 2 worker processes of one thread
     each, including the workers' reading of their chunks from the images (the cluster itself is started
     before the clock);

   alternating the two, ``--repeats`` times each (medians are printed), since the load of a shared
   machine changes under a long run; and, once per worker count, the time the workers take to find the
   analysis mask (``cluster_mask``: each scans groups of the images, the client holds no data matrix) against
   reading the mask and the matrix here (``load_masked``), and whether the masks are the same;

   and prints the time per permutation, the scaling from 1 to 2 workers, the overhead of N workers
   against N local threads (goal: within 15%), the tasks and the measured cost per task.  The p maps of
   every run are checked to be identical.

Nothing is asserted; the load average is printed (other processes on the machine slow everything down).

Usage::

    python benchmarks/cluster_speed.py                  # 5,000 permutations on ~230,000 voxels
    python benchmarks/cluster_speed.py --perms 1000     # a smaller run on a loaded machine
    python benchmarks/cluster_speed.py --quick          # small grid, a few seconds of work
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from permutation_speed import FULL, QUICK, make_data  # noqa: E402

from groupmodel.analysis.cluster_fit import cluster_mask  # noqa: E402
from groupmodel.images import check_images, load_masked  # noqa: E402
from groupmodel.images.columns import ColumnReader  # noqa: E402
from groupmodel.images.sources import ImageRef, ImageSource  # noqa: E402
from groupmodel.inference.distributed import ClusterWork, run_on_cluster  # noqa: E402
from groupmodel.inference.driver import run_permutations  # noqa: E402
from groupmodel.inference.settings import ContrastTest, Execution, Rearrangements  # noqa: E402
from groupmodel.runtime.cluster import open_scheduler  # noqa: E402


def write_study(folder: Path, cfg: dict, smooth: float) -> tuple[ImageSource, Path, np.ndarray]:
    """One .nii per participant (float32) and the mask; the checked source, the mask path, the design."""
    mask, X, Y = make_data(cfg, smooth)
    refs = []
    for i in range(Y.shape[0]):
        vol = np.zeros(mask.shape, np.float32)
        vol[mask] = Y[i]
        path = folder / f"sub-{i + 1:03d}.nii"
        nib.save(nib.Nifti1Image(vol, np.eye(4)), path)
        refs.append(ImageRef(i, f"sub-{i + 1:03d}", path))
    nib.save(nib.Nifti1Image(mask.astype(np.uint8), np.eye(4)), folder / "mask.nii")
    source, _ = check_images(ImageSource(tuple(refs), "pattern", "benchmark images"))
    return source, folder / "mask.nii", X


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="small grid and few permutations")
    ap.add_argument("--perms", type=int, default=None, help="permutations (5000)")
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2], help="worker counts (1 2)")
    ap.add_argument("--smooth", type=float, default=1.5)
    ap.add_argument("--repeats", type=int, default=2, help="alternating local and cluster runs per count (2)")
    args = ap.parse_args()
    cfg = QUICK if args.quick else FULL
    J = args.perms or (500 if args.quick else 5000)
    print(f"load average before: {os.getloadavg()}")
    with tempfile.TemporaryDirectory() as tmp:
        source, mask_path, X = write_study(Path(tmp), cfg, args.smooth)
        t_load, data = _timed(lambda: load_masked(source, mask_path, 4 * 2**30))
        reader = ColumnReader.of(source, data)
        print(f"the mask and data matrix read here (load_masked): {t_load:.1f} s")
        n, V = data.data.shape
        print(f"{n} participants x {V} voxels, {J} permutations, images in {tmp} (uncompressed NIfTI)")
        L = np.zeros((1, X.shape[1]))
        L[0, 1] = 1.0
        test = ContrastTest(X, L, "t", "two-sided", "group")
        rearr = Rearrangements(n_perm=J, seed=1)
        local: dict[int, list[float]] = {w: [] for w in args.workers}
        remote: dict[int, list[float]] = {w: [] for w in args.workers}
        reference = run_permutations(test, data.data, rearr, execution=Execution(threads=1))
        for workers in args.workers:
            ex = open_scheduler(f"local:{workers}")
            try:
                ex.client.wait_for_workers(workers)
                t_mask, found = _timed(lambda ex=ex: cluster_mask(ex, source, str(mask_path)))
                print(f"{workers} worker(s): the mask found by the workers (cluster_mask, no matrix on the client) in "
                      f"{t_mask:.1f} s; the same mask as load_masked: {np.array_equal(found.mask, data.mask)}")
                for _ in range(args.repeats):  # local and cluster alternating: the load changes under us
                    t0, c0 = time.perf_counter(), time.process_time()
                    run_permutations(test, data.data, rearr, execution=Execution(threads=workers))
                    local[workers].append(time.perf_counter() - t0)
                    local_cpu = time.process_time() - c0
                    counted: list[int] = []
                    w0 = sum(ex.on_every_worker(time.process_time).values())
                    t0 = time.perf_counter()
                    res = run_on_cluster(ex, reader, test, rearr, work=ClusterWork(cache_bytes=2**30),
                                         progress=lambda done, total, c=counted: c.append(total))
                    remote[workers].append(time.perf_counter() - t0)
                    worker_cpu = sum(ex.on_every_worker(time.process_time).values()) - w0
                    same = np.array_equal(res.p_perm, reference.p_perm) and np.array_equal(res.p_fwe, reference.p_fwe)
                    print(f"{workers} worker(s) / thread(s): local {local[workers][-1]:.1f} s ({local_cpu:.1f} s CPU), "
                          f"cluster {remote[workers][-1]:.1f} s ({worker_cpu:.1f} s CPU in the workers; "
                          f"{counted[-1]} tasks); p maps identical: {same}; load {os.getloadavg()[0]:.1f}")
            finally:
                ex.close()
        for w in args.workers:
            lo, re_ = float(np.median(local[w])), float(np.median(remote[w]))
            print(f"{w} worker(s): local engine {1e3 * lo / J:.2f} ms, cluster {1e3 * re_ / J:.2f} ms per permutation "
                  f"(medians); overhead {100 * (re_ / lo - 1):+.1f}%")
        if 1 in remote and 2 in remote:
            r1, r2 = float(np.median(remote[1])), float(np.median(remote[2]))
            l1, l2 = float(np.median(local[1])), float(np.median(local[2]))
            print(f"scaling 1 -> 2: cluster {r1 / r2:.2f}x, local threads {l1 / l2:.2f}x")
        data.close()
    print(f"load average after: {os.getloadavg()}")


if __name__ == "__main__":
    main()
