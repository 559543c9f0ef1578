"""Speed of the voxelwise fit with a within-participant factor, against the nibabel-load + numpy floor.

What it does (all data invented and seeded):

1. Makes a study in a temporary folder: 50 participants (two groups) x 3 sessions of float32 ``.nii.gz`` images
   of 91x109x91 voxels (an ellipsoid "brain", zero outside), ``participants.tsv``, ``observations.tsv`` and a
   spec with ``group*session`` and 4 hypotheses (group, session, group x session, post - pre).
2. Times, in rotating order (median of ``--repeats``):

   * ``groupmodel``: :func:`groupmodel.analysis.voxel_fit.fit_images` (read, mask, every hypothesis in its
     stratum with its maps and the Greenhouse-Geisser maps; no files written);
   * ``reference``: the same arithmetic by hand -- nibabel loads every image into one array, numpy forms each
     participant's average and orthonormal session contrasts and fits them with the between design
     (F, p for each hypothesis; GG epsilon for the 2-df tests).

   and prints both times and their ratio (goal <= 1.3), with the machine's load average.

Nothing is asserted; the figures are printed.  ``--quick`` runs a 30x36x30 grid.

Usage::

    python benchmarks/within_speed.py [--quick] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np
from scipy import stats

SESSIONS = ("s0", "s1", "s2")


def make_study(root: Path, shape: tuple[int, int, int], n: int = 50) -> list[Path]:
    rng = np.random.default_rng(7)
    idx = np.indices(shape, dtype=float)
    brain = sum(((idx[d] - (shape[d] - 1) / 2) / (0.45 * shape[d])) ** 2 for d in range(3)) <= 1
    (root / "maps").mkdir()
    lines, obs, paths = ["participant_id\tgroup"], ["participant_id\tsession"], []
    for i in range(n):
        pid = f"sub-{i:02d}"
        lines.append(f"{pid}\t{'a' if i < n // 2 else 'b'}")
        person = rng.standard_normal(shape, dtype=np.float32)
        for s in SESSIONS:
            img = np.where(brain, person + rng.standard_normal(shape, dtype=np.float32), 0).astype(np.float32)
            path = root / "maps" / f"{pid}_{s}.nii.gz"
            nib.save(nib.Nifti1Image(img, np.eye(4)), path)
            obs.append(f"{pid}\t{s}")
            paths.append(path)
    (root / "participants.tsv").write_text("\n".join(lines) + "\n")
    (root / "observations.tsv").write_text("\n".join(obs) + "\n")
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
            "hypotheses": {"group": {"main": "group"}, "session": {"main": "session"},
                           "gxs": {"interaction": ["group", "session"]},
                           "gain": {"compare": {"session": ["s2", "s0"]}}},
            "images": "maps/{participant_id}_{session}.nii.gz"}
    (root / "model.json").write_text(json.dumps(spec))
    return paths


def run_groupmodel(root: Path) -> None:
    from groupmodel.analysis.voxel_fit import fit_images

    fit_images(root / "model.json", progress=False)


def run_reference(paths: list[Path], n: int) -> None:
    data = np.stack([np.asarray(nib.load(p).dataobj, dtype=np.float32).ravel() for p in paths])
    mask = np.isfinite(data).all(axis=0) & (data != 0).any(axis=0)
    y = data[:, mask].astype(np.float64).reshape(n, len(SESSIONS), -1)
    x = np.column_stack([np.ones(n), np.where(np.arange(n) < n // 2, 1.0, -1.0)])
    contrasts = np.linalg.qr(np.array([[1.0, -1, 0], [1, 1, -2]]).T)[0]
    pinv = np.linalg.pinv(x)
    for weights in (np.full((3, 1), 1 / 3), contrasts, np.array([[-1.0], [0], [1]])):
        z = np.einsum("nkv,kc->ncv", y, weights)
        c = z.shape[1]
        coef = np.einsum("pn,ncv->pcv", pinv, z)
        resid = z - np.einsum("np,pcv->ncv", x, coef)
        sse = (resid**2).sum(axis=(0, 1))
        for row in (np.array([0.0, 1.0]), np.array([1.0, 0.0])):
            d = np.einsum("p,pcv->cv", row, coef)
            m = row @ pinv @ pinv.T @ row
            f = ((d**2).sum(axis=0) / m / c) / (sse / ((n - 2) * c))
            stats.f.sf(f, c, (n - 2) * c)
        if c > 1:
            s = np.einsum("ncv,ndv->cdv", resid, resid)
            np.einsum("ccv->v", s) ** 2 / (c * np.einsum("cdv,cdv->v", s, s))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    shape = (30, 36, 30) if args.quick else (91, 109, 91)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        paths = make_study(root, shape)
        times: dict[str, list[float]] = {"groupmodel": [], "reference": []}
        for r in range(args.repeats):
            order = ["groupmodel", "reference"] if r % 2 == 0 else ["reference", "groupmodel"]
            for name in order:
                t0 = time.perf_counter()
                run_groupmodel(root) if name == "groupmodel" else run_reference(paths, 50)
                times[name].append(time.perf_counter() - t0)
    gm, ref = statistics.median(times["groupmodel"]), statistics.median(times["reference"])
    print(f"grid {shape}, 50 participants x {len(SESSIONS)} sessions; load average {os.getloadavg()}")
    print(f"groupmodel {gm:.2f} s, reference {ref:.2f} s, ratio {gm / ref:.2f} (goal <= 1.3)")


if __name__ == "__main__":
    main()
