"""Speed and peak memory of ``groupmodel fit`` on images, against a minimal numpy reference.

What it does (all data invented and seeded):

1. Makes a synthetic study in a temporary folder: 100 float32 ``.nii.gz`` images of 91x109x91 voxels
   (an ellipsoid "brain" of about 230,000 voxels, zero outside), a participants table with a 3-level
   and a 2-level factor and an age covariate, and a spec with 6 hypotheses (2 F tests, 4 t tests).
2. Times, each in its own subprocess so that peak memories are separate:

   * ``groupmodel``: ``fit_images`` + ``write_voxel_fit`` (the API behind ``groupmodel fit``, including
     every map, sidecar, design file and picture; the pictures are drawn in a thread while maps are written);
   * ``groupmodel-no-pictures``: the same without pictures (``groupmodel fit --no-pictures``), the same work
     as the reference;
   * ``reference``: the minimal job by hand, the same arithmetic -- nibabel loads every image into one array,
     numpy QR OLS gives effects, SEs, t, F, p, z and -log10 p, the t intervals, Cohen's d, partial eta
     squared (its interval from groupmodel's noncentral-F function, which numpy and scipy do not offer
     vectorised), Benjamini-Hochberg and Bonferroni p, the mean image, the per-participant residual sums and
     the unequal-variance check (group variances, ``scipy.stats.levene`` where they differ by more than 2),
     and nibabel writes the same maps as float32 NIfTI (no sidecars, summary or report); the maps are
     compared with groupmodel's afterwards;

   in rotating order, and prints the median times, each stage's share, their ratio (goal <= 0.6 without
   pictures), the peak RSS values and the load average of the machine.  ``--no-isal`` measures the zlib
   fallback (isal is used when installed).
3. Times a per-voxel statsmodels loop (``OLS(...).fit()`` plus ``t_test``/``f_test`` for every
   hypothesis) on a sample of voxels, scales it to all voxels and prints the speed-up of groupmodel
   (goal >= 500x).
4. Fits 1,000 participants under ``--memory 512MB`` (same grid; the data matrix is about 0.9 GB, so
   it must go to disk) and prints the peak RSS, with the fixed overhead measured separately.

Nothing is asserted about time; the figures are printed.  ``--quick`` runs a small version (40 images on
a 30x36x30 grid, 200 participants under a 16 MB budget) in well under a minute.

Usage::

    python benchmarks/fit_speed.py            # full run (several minutes; ~5 GB of temporary files)
    python benchmarks/fit_speed.py --quick
    python benchmarks/fit_speed.py --keep /tmp/bench   # keep the study folders
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

SEED = 20240605
FULL = {"shape": (91, 109, 91), "semi_axes": (36.0, 45.0, 34.0), "n": 100, "n_large": 1000,
        "large_memory": "512MB", "sm_sample": 2000, "memory": "2GB"}
QUICK = {"shape": (30, 36, 30), "semi_axes": (12.0, 15.0, 11.5), "n": 40, "n_large": 200,
         "large_memory": "16MB", "sm_sample": 200, "memory": "2GB"}
AFFINE = np.array([[-2.0, 0, 0, 90], [0, 2.0, 0, -126], [0, 0, 2.0, -72], [0, 0, 0, 1]])

SPEC = {
    "participants": "participants.tsv",
    "factors": {
        "group": {"levels": ["a", "b", "c"], "coding": "effect"},
        "sex": {"levels": ["f", "m"], "coding": "effect"},
    },
    "covariates": {"age": {"center": "mean"}},
    "intercept": True,
    "terms": ["group*sex", "age"],
    "hypotheses": {
        "group": {"main": "group"},
        "group_by_sex": {"interaction": ["group", "sex"]},
        "b_vs_a": {"compare": {"group": ["b", "a"]}},
        "c_vs_a": {"compare": {"group": ["c", "a"]}, "tail": "greater"},
        "age": {"slope": "age"},
        "c_m_mean": {"mean": {"group": "c", "sex": "m"}},
    },
    "images": "maps/{participant_id}_effect.nii.gz",
}


# --------------------------------------------------------------------------------------------------
# The synthetic study
# --------------------------------------------------------------------------------------------------


def brain_mask(shape: tuple[int, int, int], semi_axes: tuple[float, float, float]) -> np.ndarray:
    """Boolean ellipsoid centred in the grid, shape ``shape``."""
    idx = np.indices(shape, dtype=np.float32)
    r2 = sum(((idx[d] - (shape[d] - 1) / 2) / semi_axes[d]) ** 2 for d in range(3))
    return r2 <= 1.0


def make_study(root: Path, n: int, shape: tuple[int, int, int],
               semi_axes: tuple[float, float, float]) -> Path:
    """Write participants.tsv, model.json and ``n`` float32 .nii.gz images; returns the spec path."""
    import nibabel as nib

    root.mkdir(parents=True, exist_ok=True)
    (root / "maps").mkdir(exist_ok=True)
    rng = np.random.default_rng([SEED, n])
    group = np.array(["a", "b", "c"])[rng.permutation(np.arange(n) % 3)]
    sex = np.array(["f", "m"])[rng.integers(0, 2, n)]
    age = np.round(rng.uniform(20, 70, n), 1)
    ids = [f"sub-{i + 1:04d}" for i in range(n)]
    lines = ["participant_id\tgroup\tsex\tage"] + [
        f"{p}\t{g}\t{s}\t{a:.1f}" for p, g, s, a in zip(ids, group, sex, age, strict=True)
    ]
    (root / "participants.tsv").write_text("\n".join(lines) + "\n")
    (root / "model.json").write_text(json.dumps(SPEC, indent=2))

    mask = brain_mask(shape, semi_axes)
    nv = int(mask.sum())
    # per-voxel effects: a group effect in one half of the brain, an age effect everywhere (weak)
    g_eff = np.where(np.arange(nv) < nv // 2, 0.8, 0.0).astype(np.float32)
    a_eff = np.float32(0.02)
    gnum = (group == "b") * 1.0 + (group == "c") * 2.0
    vol = np.zeros(shape, dtype=np.float32)
    for i in range(n):
        values = rng.standard_normal(nv, dtype=np.float32)
        values += np.float32(10.0) + g_eff * np.float32(gnum[i]) + a_eff * np.float32(age[i] - 45)
        vol[mask] = values
        img = nib.Nifti1Image(vol, AFFINE)
        img.header.set_xyzt_units("mm")
        nib.save(img, root / "maps" / f"{ids[i]}_effect.nii.gz")
    return root / "model.json"


# --------------------------------------------------------------------------------------------------
# Children (each run in its own process; prints one JSON line)
# --------------------------------------------------------------------------------------------------


def _maxrss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kB


class _AnonSampler:
    """Samples RssAnon (anonymous memory, i.e. excluding file pages such as a memmap's) every 10 ms."""

    def __init__(self) -> None:
        self.peak_kb = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _read(self) -> int:
        try:
            with open("/proc/self/status") as fh:
                for line in fh:
                    if line.startswith("RssAnon:"):
                        return int(line.split()[1])
        except OSError:
            pass
        return 0

    def _run(self) -> None:
        while not self._stop.is_set():
            self.peak_kb = max(self.peak_kb, self._read())
            self._stop.wait(0.01)

    def __enter__(self) -> _AnonSampler:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.peak_kb = max(self.peak_kb, self._read())


def _cpu_seconds() -> float:
    """User + system CPU time of this process (all threads): less sensitive to other load than wall time."""
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


class _StageTimer:
    """Adds up the wall time spent in named module functions (patched in place for one run)."""

    def __init__(self, targets: dict[str, tuple[Any, str]]) -> None:
        self.seconds = dict.fromkeys(targets, 0.0)
        self._targets = targets
        self._saved: list[tuple[Any, str, Any]] = []

    def __enter__(self) -> _StageTimer:
        for label, (module, name) in self._targets.items():
            func = getattr(module, name)
            self._saved.append((module, name, func))
            setattr(module, name, self._wrap(label, func))
        return self

    def _wrap(self, label: str, func: Any) -> Any:
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return func(*args, **kwargs)
            finally:
                self.seconds[label] += time.perf_counter() - t0

        return timed

    def __exit__(self, *exc: object) -> None:
        for module, name, func in self._saved:
            setattr(module, name, func)


def child_groupmodel(spec: Path, out: Path, memory: str, pictures: bool = True) -> dict[str, Any]:
    import groupmodel.analysis.chunk_fit
    import groupmodel.engine.tails
    import groupmodel.images
    import groupmodel.outputs.design_files
    from groupmodel.cli.parser import parse_memory
    from groupmodel.fit import fit_images, write_voxel_fit

    # Each stage is timed where its caller looks the function up.
    stages = {
        "check images": (groupmodel.images, "check_images"),
        "read images (load_masked)": (groupmodel.images, "load_masked"),
        "engine (fit_chunk, all chunks; summed over threads)": (groupmodel.analysis.chunk_fit, "fit_chunk"),
        "  of which t p/z (tails.t_tests)": (groupmodel.engine.tails, "t_tests"),
        "  of which F p/z (tails.f_tests)": (groupmodel.engine.tails, "f_tests"),
        "write NIfTI maps (write_map)": (groupmodel.images, "write_map"),
        "pictures (thread, with matplotlib import)": (groupmodel.outputs.design_files, "picture_bytes"),
    }
    base = _maxrss_mb()
    with _AnonSampler() as anon, _StageTimer(stages) as timer:
        c0 = _cpu_seconds()
        t0 = time.perf_counter()
        fit = fit_images(spec, memory_bytes=parse_memory(memory), progress=False)
        t1 = time.perf_counter()
        written = write_voxel_fit(fit, out, force=True, pictures=pictures)
        t2 = time.perf_counter()
        c1 = _cpu_seconds()
    n_maps = sum(1 for w in written if w.endswith((".nii.gz", ".nii")))
    return {"seconds": t2 - t0, "cpu_seconds": c1 - c0, "fit_seconds": t1 - t0, "write_seconds": t2 - t1,
            "stages": timer.seconds, "n_maps": n_maps,
            "n_voxels": fit.mask_report["voxels_in_mask"], "n_obs": fit.model.design.n_observations,
            "maxrss_mb": _maxrss_mb(), "baseline_rss_mb": base, "peak_anon_mb": anon.peak_kb / 1024.0}


def child_reference(spec: Path, out: Path) -> dict[str, Any]:
    """The minimal job by hand, the same arithmetic as groupmodel: load, QR OLS with t and F, p, z, -log10 p,
    the t intervals, Cohen's d, partial eta squared and its interval, Benjamini-Hochberg and Bonferroni p, the
    mean image, the per-participant residual sums and the unequal-variance check; write the same maps as
    float32 NIfTI (no sidecars, no summary, no report)."""
    import nibabel as nib
    from scipy import special, stats

    from groupmodel.analysis.effect_maps import has_cohens_d
    from groupmodel.engine.effect_sizes import partial_eta_squared_interval
    from groupmodel.model import build

    # The design and contrast rows come from groupmodel (not timed): the reference times the voxel work.
    model = build(spec)
    x = model.design.matrix
    hyps = list(model.hypotheses.values())
    with_d = {h.name: has_cohens_d(h) for h in hyps}
    design = model.design.observations
    factors = {name: design[name].astype(str).to_numpy() for name in model.design.factors}
    paths = [spec.parent / "maps" / f"{pid}_effect.nii.gz" for pid in model.design.participant_ids]
    base = _maxrss_mb()
    out.mkdir(parents=True, exist_ok=True)

    c0 = _cpu_seconds()
    t0 = time.perf_counter()
    first = nib.load(paths[0])
    shape, affine = first.shape, first.affine
    data = np.empty((len(paths), int(np.prod(shape))), dtype=np.float32)
    for i, p in enumerate(paths):
        data[i] = np.asanyarray(nib.load(p).dataobj).ravel()
    mask = np.all(np.isfinite(data), axis=0) & np.any(data != 0, axis=0)
    y = data[:, mask].astype(np.float64)
    del data
    t_loaded = time.perf_counter()
    n, k = x.shape
    q, r = np.linalg.qr(x)
    mean_input = y.mean(axis=0)
    yc = y - mean_input  # the design has an intercept: centring changes no effect but the mean term
    qty = q.T @ yc
    resid = yc - q @ qty
    df = n - k
    sigma2 = np.einsum("ij,ij->j", resid, resid) / df
    del yc
    beta = np.linalg.solve(r, qty)
    beta[0] += mean_input  # intercept column first: X^+ 1 = e_0
    rinv = np.linalg.inv(r)
    maps: dict[str, np.ndarray] = {}
    t_crit = stats.t.ppf(0.975, df)
    for h in hyps:
        w = h.weights
        eff = w @ beta
        cov = (w @ rinv) @ (w @ rinv).T
        if h.test == "t":
            se = np.sqrt(sigma2 * cov[0, 0])
            t = eff[0] / se
            if h.tail == "two-sided":
                p = 2 * stats.t.sf(np.abs(t), df)
            elif h.tail == "greater":
                p = stats.t.sf(t, df)
            else:
                p = stats.t.cdf(t, df)
            f, q_rows = t * t, 1
            z = np.where(t > 0, -special.ndtri(stats.t.sf(t, df)), special.ndtri(stats.t.cdf(t, df)))
            maps |= {f"{h.name}_effect": eff[0], f"{h.name}_se": se, f"{h.name}_t": t, f"{h.name}_z": z,
                     f"{h.name}_ci_lower": eff[0] - t_crit * se, f"{h.name}_ci_upper": eff[0] + t_crit * se}
            if with_d[h.name]:
                maps[f"{h.name}_cohens_d"] = eff[0] / np.sqrt(sigma2)
        else:
            ci = np.linalg.inv(cov)
            q_rows = w.shape[0]
            f = np.einsum("iv,ij,jv->v", eff, ci, eff) / (q_rows * sigma2)
            p = stats.f.sf(f, q_rows, df)
            maps |= {f"{h.name}_F": f, f"{h.name}_z": stats.norm.isf(p)}
        maps |= {f"{h.name}_p": p, f"{h.name}_mlog10p": -np.log10(p)}
        # partial eta squared; its interval by groupmodel's noncentral-F function (numpy and scipy have no
        # vectorised inverse in the noncentrality: the same arithmetic, called, not written again)
        maps[f"{h.name}_partial_eta_squared"] = f * q_rows / (f * q_rows + df)
        eta = partial_eta_squared_interval(f, q_rows, df, 0.95)
        maps[f"{h.name}_partial_eta_squared_ci_lower"] = eta.lower
        maps[f"{h.name}_partial_eta_squared_ci_upper"] = eta.upper
        # Benjamini-Hochberg and Bonferroni over the voxels
        order = np.argsort(p)
        ranked = p[order] * p.size / np.arange(1, p.size + 1)
        fdr = np.empty_like(p)
        fdr[order] = np.minimum(1.0, np.minimum.accumulate(ranked[::-1])[::-1])
        maps |= {f"{h.name}_p_fdr": fdr, f"{h.name}_p_bonferroni": np.minimum(1.0, p * p.size)}
    maps["residual_variance"] = sigma2
    maps["mean_input"] = mean_input
    # The checks: each participant's mean |residual|; each factor's group variances (RSS_g / rho_g) and
    # Levene's test where the largest is more than twice the smallest.
    participant_mean_abs = np.abs(resid).mean(axis=1)
    hat_diag = np.einsum("ij,ij->i", q, q)
    flagged = {}
    for name, values in factors.items():
        groups = [values == g for g in np.unique(values)]
        var = np.stack([(resid[g] ** 2).sum(axis=0) / (1.0 - hat_diag[g]).sum() for g in groups])
        wanted = var.max(axis=0) > 2.0 * var.min(axis=0)
        p_lev = stats.levene(*[resid[g][:, wanted] for g in groups], center="median", axis=0).pvalue
        flagged[name] = int(np.count_nonzero(p_lev < 0.05))
    del resid
    t_fitted = time.perf_counter()
    vol = np.zeros(shape, dtype=np.float32)
    mask = mask.reshape(shape)
    for name, values in maps.items():
        vol[mask] = values
        nib.save(nib.Nifti1Image(vol, affine), out / f"{name}.nii.gz")
    nib.save(nib.Nifti1Image(mask.astype(np.uint8), affine), out / "mask.nii.gz")
    t1 = time.perf_counter()
    stages = {"read images + mask": t_loaded - t0, "OLS, t, F, p, z, effect sizes, corrections, checks":
              t_fitted - t_loaded, "write NIfTI maps": t1 - t_fitted}
    return {"seconds": t1 - t0, "cpu_seconds": _cpu_seconds() - c0, "stages": stages, "n_maps": len(maps) + 1,
            "n_voxels": int(mask.sum()), "n_obs": n, "maxrss_mb": _maxrss_mb(), "baseline_rss_mb": base,
            "checks": {"participant_mean_abs_max": float(participant_mean_abs.max()), "flagged": flagged}}


def child_statsmodels(spec: Path, sample: int) -> dict[str, Any]:
    """Seconds per voxel of a per-voxel statsmodels loop (fit + every t_test/f_test)."""
    import warnings

    import nibabel as nib
    import statsmodels.api as sm

    from groupmodel.model import build

    model = build(spec)
    x = model.design.matrix
    hyps = list(model.hypotheses.values())
    paths = [spec.parent / "maps" / f"{pid}_effect.nii.gz" for pid in model.design.participant_ids]
    first = np.asanyarray(nib.load(paths[0]).dataobj)
    inside = np.flatnonzero(first.ravel() != 0)
    rng = np.random.default_rng(SEED)
    pick = np.sort(rng.choice(inside, size=min(sample, inside.size), replace=False))
    y = np.stack([np.asanyarray(nib.load(p).dataobj).ravel()[pick] for p in paths]).astype(np.float64)
    warnings.simplefilter("ignore")
    c0 = _cpu_seconds()
    t0 = time.perf_counter()
    for j in range(y.shape[1]):
        res = sm.OLS(y[:, j], x).fit()
        for h in hyps:
            if h.test == "t":
                res.t_test(h.weights)
            else:
                res.f_test(h.weights)
    t1 = time.perf_counter()
    n_vox = y.shape[1]
    cpu = _cpu_seconds() - c0
    # groupmodel's engine (fit_chunk: the same OLS, t and F tests with p and z) on every voxel in the mask, one
    # thread, the data in memory as the loop had them
    from groupmodel.engine.ols import fit_chunk, prepare
    from groupmodel.runtime.cores import single_threaded_blas

    data = np.stack([np.asanyarray(nib.load(p).dataobj).ravel()[inside] for p in paths])
    prepared = prepare(x, model.tests())
    with single_threaded_blas():
        e0 = time.perf_counter()
        fit_chunk(prepared, data)
        engine = time.perf_counter() - e0
    return {"seconds_per_voxel": (t1 - t0) / n_vox, "cpu_seconds_per_voxel": cpu / n_vox, "sample": int(n_vox),
            "engine_seconds": engine, "engine_voxels": int(inside.size)}


def child_overhead() -> dict[str, Any]:
    """RSS of an interpreter that has imported groupmodel and its dependencies (the fixed overhead)."""
    import groupmodel.fit  # noqa: F401
    import groupmodel.images  # noqa: F401

    return {"maxrss_mb": _maxrss_mb()}


def _isal_state() -> str:
    try:
        import isal
    except ImportError:
        return "not installed (zlib)"
    off = os.environ.get("GROUPMODEL_NO_ISAL", "") not in ("", "0")
    return f"{isal.__version__}" + (" installed but turned off (zlib)" if off else " in use")


def _median_run(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """The run of median wall time, with every time field replaced by its median over the runs."""
    mid = sorted(runs, key=lambda r: r["seconds"])[len(runs) // 2]
    out = dict(mid)
    for key in ("seconds", "cpu_seconds", "fit_seconds", "write_seconds"):
        if key in mid:
            out[key] = float(np.median([r[key] for r in runs]))
    out["stages"] = {k: float(np.median([r["stages"][k] for r in runs])) for k in mid["stages"]}
    return out


def compare_maps(ref_dir: Path, gm_dir: Path) -> tuple[int, int, float]:
    """Maps of groupmodel (found through its outputs.json) against the reference's maps of the same name:
    (maps compared, maps missing from the reference, largest difference relative to the map's largest
    |value|)."""
    import nibabel as nib

    index = json.loads((gm_dir / "outputs.json").read_text())
    compared = missing = 0
    worst = 0.0
    for e in index["files"]:
        if e.get("kind") != "map" or not e["path"].endswith(".nii.gz"):
            continue
        name = f"{e['hypothesis']}_{e['statistic']}" if e.get("hypothesis") else e["statistic"]
        ref = ref_dir / f"{name}.nii.gz"
        if not ref.exists():
            missing += 1
            continue
        a = np.asarray(nib.load(gm_dir / e["path"]).dataobj, dtype=float)
        b = np.asarray(nib.load(ref).dataobj, dtype=float)
        both = np.isfinite(a) & np.isfinite(b)
        scale = max(float(np.abs(b[both]).max(initial=0.0)), 1e-300)
        worst = max(worst, float(np.abs(a[both] - b[both]).max(initial=0.0)) / scale)
        compared += 1
    return compared, missing, worst


def run_child(*args: str, env: dict[str, str] | None = None) -> dict[str, Any]:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", *args]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise SystemExit(f"child {args[0]} failed with exit code {proc.returncode}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------------------------------------
# Main
# --------------------------------------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small version (seconds)")
    ap.add_argument("--keep", type=Path, help="make the studies in this folder and keep them")
    ap.add_argument("--repeats", type=int, default=3, help="timed runs of each side (medians are shown)")
    ap.add_argument("--skip-large", action="store_true", help="skip the 1,000-participant fit")
    ap.add_argument("--no-isal", action="store_true", help="decompress and compress with zlib even if isal is "
                    "installed (GROUPMODEL_NO_ISAL=1)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args.child:
        kind, *rest = args.child
        if kind in ("groupmodel", "groupmodel-no-pictures"):
            out = child_groupmodel(Path(rest[0]), Path(rest[1]), rest[2], pictures=kind == "groupmodel")
        elif kind == "reference":
            out = child_reference(Path(rest[0]), Path(rest[1]))
        elif kind == "statsmodels":
            out = child_statsmodels(Path(rest[0]), int(rest[1]))
        elif kind == "overhead":
            out = child_overhead()
        else:
            raise SystemExit(f"unknown child {kind}")
        print(json.dumps(out))
        return 0

    if args.no_isal:
        os.environ["GROUPMODEL_NO_ISAL"] = "1"  # inherited by the children
    cfg = QUICK if args.quick else FULL
    root = args.keep if args.keep else Path(tempfile.mkdtemp(prefix="groupmodel-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    import numpy  # noqa: F401  (report versions)

    print(f"groupmodel fit benchmark ({'quick' if args.quick else 'full'}); {os.cpu_count()} CPUs; "
          f"numpy {np.__version__}; isal {_isal_state()}; study folders in {root}")
    try:
        t0 = time.perf_counter()
        spec = make_study(root / "study", cfg["n"], cfg["shape"], cfg["semi_axes"])
        print(f"made {cfg['n']} images of {'x'.join(map(str, cfg['shape']))} float32 .nii.gz in "
              f"{time.perf_counter() - t0:.1f} s")

        kinds = ("groupmodel", "groupmodel-no-pictures", "reference")
        runs: dict[str, list[dict[str, Any]]] = {k: [] for k in kinds}
        load_before = os.getloadavg()[0]
        for i in range(max(1, args.repeats)):
            # rotate the order so that no side always runs on a colder page cache or a quieter machine
            for side in kinds[i % 3:] + kinds[: i % 3]:
                out = root / f"out_{side}"
                if side == "reference":
                    runs[side].append(run_child("reference", str(spec), str(out)))
                else:
                    runs[side].append(run_child(side, str(spec), str(out), cfg["memory"]))
        load_after = os.getloadavg()[0]
        overhead = run_child("overhead")
        med = {k: _median_run(v) for k, v in runs.items()}
        gm, ref = med["groupmodel"], med["reference"]
        print()
        print(f"{gm['n_obs']} observations, {gm['n_voxels']} voxels in the mask, 6 hypotheses, "
              f"{gm['n_maps']} NIfTI maps written by groupmodel, {ref['n_maps']} by the reference; "
              f"medians of {args.repeats} runs each, in rotating order; load average "
              f"{load_before:.1f} before, {load_after:.1f} after ({os.cpu_count()} CPUs)")
        for kind in kinds[:2]:
            r = med[kind]
            print(f"  {kind:24s} fit+write: {r['seconds']:.2f} s wall, {r['cpu_seconds']:.2f} s CPU (fit "
                  f"{r['fit_seconds']:.2f} s, write {r['write_seconds']:.2f} s); all runs "
                  f"{[round(x['seconds'], 2) for x in runs[kind]]} s; peak RSS {r['maxrss_mb']:.0f} MB "
                  f"(before fitting {r['baseline_rss_mb']:.0f} MB; anonymous {r['peak_anon_mb']:.0f} MB)")
            for label, sec in r["stages"].items():
                print(f"      {label:42s} {sec:6.2f} s  {100 * sec / r['seconds']:5.1f} % of the wall time")
        print(f"  reference   load+OLS+write: {ref['seconds']:.2f} s wall, {ref['cpu_seconds']:.2f} s CPU; all runs "
              f"{[round(r['seconds'], 2) for r in runs['reference']]} s; peak RSS {ref['maxrss_mb']:.0f} MB "
              f"(before fitting {ref['baseline_rss_mb']:.0f} MB)")
        for label, sec in ref["stages"].items():
            print(f"      {label:42s} {sec:6.2f} s")
        for kind in kinds[:2]:
            r = med[kind]
            print(f"  ratio {kind} / reference: {r['seconds'] / ref['seconds']:.2f} wall, "
                  f"{r['cpu_seconds'] / ref['cpu_seconds']:.2f} CPU (medians; goal <= 0.6 for the same work, "
                  f"i.e. without pictures)")
        print(f"  fixed overhead (interpreter + imports): {overhead['maxrss_mb']:.0f} MB")
        n_cmp, n_missing, worst = compare_maps(root / "out_reference", root / "out_groupmodel-no-pictures")
        print(f"  same maps: {n_cmp} groupmodel maps compared with the reference's ({n_missing} without a "
              f"counterpart); largest difference {worst:.2g} of the map's largest |value| (float32 files)")

        sm = run_child("statsmodels", str(spec), str(cfg["sm_sample"]))
        sm_total = sm["seconds_per_voxel"] * gm["n_voxels"]
        engine = sm["engine_seconds"] * gm["n_voxels"] / sm["engine_voxels"]
        print(f"  statsmodels per-voxel loop (OLS fit + 6 t_test/f_test; data already in memory): "
              f"{sm['seconds_per_voxel'] * 1e3:.2f} ms/voxel on {sm['sample']} voxels, scaled to "
              f"{gm['n_voxels']} voxels: {sm_total:.0f} s")
        print(f"      groupmodel engine (fit_chunk) on all {sm['engine_voxels']} nonzero voxels, one thread, data in "
              f"memory: {sm['engine_seconds']:.2f} s -> {sm_total / engine:.0f}x faster (goal >= 500x)")
        print(f"      groupmodel whole fit+write (also reads the images and writes the maps): "
              f"{sm_total / gm['seconds']:.0f}x faster")

        if not args.skip_large:
            shutil.rmtree(root / "out_groupmodel", ignore_errors=True)
            shutil.rmtree(root / "out_reference", ignore_errors=True)
            t0 = time.perf_counter()
            big = make_study(root / "study_large", cfg["n_large"], cfg["shape"], cfg["semi_axes"])
            print()
            print(f"made {cfg['n_large']} images in {time.perf_counter() - t0:.0f} s")
            large = run_child("groupmodel", str(big), str(root / "out_large"), cfg["large_memory"])
            data_mb = large["n_obs"] * large["n_voxels"] * 4 / 2**20
            print(f"  {large['n_obs']} observations x {large['n_voxels']} voxels (float32 data matrix "
                  f"{data_mb:.0f} MB) under --memory {cfg['large_memory']}: {large['seconds']:.1f} s wall, "
                  f"{large['cpu_seconds']:.1f} s CPU (fit {large['fit_seconds']:.1f} s, write "
                  f"{large['write_seconds']:.1f} s)")
            for label, sec in large["stages"].items():
                print(f"      {label:34s} {sec:6.2f} s")
            print(f"  peak RSS {large['maxrss_mb']:.0f} MB (includes the memmap's file pages); peak "
                  f"anonymous RSS (sampled every 10 ms) {large['peak_anon_mb']:.0f} MB; fixed overhead "
                  f"(interpreter + imports) {overhead['maxrss_mb']:.0f} MB")
    finally:
        if not args.keep:
            shutil.rmtree(root, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
