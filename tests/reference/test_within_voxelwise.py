"""Voxelwise fit with a within-participant factor: maps equal the table-level fit at sampled voxels (which is
checked against scipy and statsmodels in test_within_reference.py), and do not depend on the chunk size.

Reference: ``scipy.stats.ttest_rel`` for the paired t map at every voxel; the table-level fit of the same values.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from groupmodel.analysis.table_fit import fit_table
from groupmodel.analysis.voxel_fit import fit_images

SHAPE = (5, 4, 3)
SESSIONS = ("s0", "s1", "s2")


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray, pd.DataFrame]:
    root = tmp_path_factory.mktemp("within_vox")
    (root / "maps").mkdir()
    rng = np.random.default_rng(4)
    ids = [f"sub-{i:02d}" for i in range(10)]
    groups = ["a"] * 5 + ["b"] * 5
    pd.DataFrame({"participant_id": ids, "group": groups}).to_csv(root / "participants.tsv", sep="\t", index=False)
    records, images = [], []
    for pid, g in zip(ids, groups, strict=True):
        person = rng.normal(0, 1, SHAPE)
        for s, ses in enumerate(SESSIONS):
            img = 5 + person + 0.4 * s * (g == "b") + rng.normal(0, 1 + 0.3 * s, SHAPE)
            nib.save(nib.Nifti1Image(img.astype(np.float32), np.eye(4)), root / "maps" / f"{pid}_{ses}.nii.gz")
            records.append({"participant_id": pid, "session": ses})
            images.append(img.astype(np.float32).astype(float))
    obs = pd.DataFrame(records)
    obs.to_csv(root / "observations.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "images": "maps/{participant_id}_{session}.nii.gz",
            "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
            "hypotheses": {"group": {"main": "group"}, "session": {"main": "session"},
                           "gxs": {"interaction": ["group", "session"]},
                           "gain": {"compare": {"session": ["s2", "s0"]}}}}
    (root / "model.json").write_text(json.dumps(spec))
    return root, np.array(images), obs


def test_maps_equal_table_fit_at_sampled_voxels(study, tmp_path: Path) -> None:
    root, images, obs = study
    fit = fit_images(root / "model.json", progress=False)
    assert set(fit.maps["session"]) >= {"F", "p", "epsilon_gg", "epsilon_hf", "p_gg"}
    assert "epsilon_gg" not in fit.maps["gain"]
    flat = images.reshape(len(images), -1)[:, fit.mask.ravel()]
    for voxel in (0, 17, flat.shape[1] - 1):
        table = obs.assign(y=flat[:, voxel])
        table.to_csv(root / "observations.tsv", sep="\t", index=False)
        ref = fit_table(root / "model.json", "y").table.set_index("hypothesis")
        for name in ("group", "session", "gxs", "gain"):
            stat = "t" if name == "gain" else "F"
            np.testing.assert_allclose(fit.maps[name][stat][voxel], ref.loc[name, "statistic"], rtol=1e-9)
            np.testing.assert_allclose(fit.maps[name]["p"][voxel], ref.loc[name, "p"], rtol=1e-8)
        for stat in ("p_gg", "p_hf", "epsilon_hf"):
            np.testing.assert_allclose(fit.maps["session"][stat][voxel], ref.loc["session", stat], rtol=1e-8)
    obs.to_csv(root / "observations.tsv", sep="\t", index=False)
    s0, s2 = flat[0::3], flat[2::3]  # rows are participant-major, sessions s0, s1, s2
    np.testing.assert_allclose(fit.maps["gain"]["effect"], (s2 - s0).mean(axis=0), rtol=1e-9)
    assert fit.df_of("gain") == (1, 8) and fit.df_of("session") == (2, 16)


def test_paired_t_map_equals_scipy_ttest_rel(study, tmp_path: Path) -> None:
    root, images, _ = study
    spec = json.loads((root / "model.json").read_text())
    spec.update({"terms": ["session"], "factors": {"session": {"within": True}},
                 "hypotheses": {"gain": {"compare": {"session": ["s2", "s0"]}}}})
    (root / "paired.json").write_text(json.dumps(spec))
    fit = fit_images(root / "paired.json", progress=False)
    flat = images.reshape(len(images), -1)[:, fit.mask.ravel()]
    ref = stats.ttest_rel(flat[2::3], flat[0::3])  # scipy.stats.ttest_rel, voxel by voxel
    np.testing.assert_allclose(fit.maps["gain"]["t"], ref.statistic, rtol=1e-9)
    np.testing.assert_allclose(fit.maps["gain"]["p"], ref.pvalue, rtol=1e-7)


def test_chunk_and_memory_invariance(study) -> None:
    root, _, _ = study
    a = fit_images(root / "model.json", progress=False, chunk_voxels=7)
    b = fit_images(root / "model.json", progress=False, chunk_voxels=1000)
    c = fit_images(root / "model.json", progress=False, memory_bytes=64 * 1024)
    for name, maps in a.maps.items():
        for stat, values in maps.items():
            # every reduction runs over participants, never across voxels: equal up to the last bit or two
            # that a BLAS may change with the shape of a product (as engine.ols says of the between fit)
            np.testing.assert_allclose(values, b.maps[name][stat], rtol=1e-12, err_msg=f"{name} {stat}")
            np.testing.assert_allclose(values, c.maps[name][stat], rtol=1e-12, err_msg=f"{name} {stat}")
    np.testing.assert_allclose(a.residual_variance, b.residual_variance, rtol=1e-12)


# ----------------------------------------------------------------------------------- permutation inference
def exact_p(stats_all: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """Exact randomisation p: the share of all rearrangements (identity included) at least as extreme."""
    return (stats_all >= observed[None, :] - 1e-9 * np.abs(observed[None, :])).mean(axis=0)


def test_permutation_methods_match_exact_enumeration(study) -> None:
    from itertools import combinations, product

    from groupmodel.model.options import InferenceOptions

    root, images, _ = study
    spec = json.loads((root / "model.json").read_text())
    spec.update({"terms": ["session"], "factors": {"session": {"within": True}},
                 "hypotheses": {"gain": {"compare": {"session": ["s2", "s0"]}}, "session": {"main": "session"}}})
    (root / "perm.json").write_text(json.dumps(spec))
    fit = fit_images(root / "perm.json", progress=False, inference=InferenceOptions(permutations=5000, seed=1))
    flat = images.reshape(len(images), -1)[:, fit.mask.ravel()]
    y = flat.reshape(10, 3, -1)  # participant, session, voxel
    assert fit.records["gain"]["method"] == "sign_flip" and fit.records["gain"]["exhaustive"]
    assert "sign flips" in fit.records["session"]["rearranged"]
    # exact sign-flip test of the paired t, by enumeration of all 2^10 sign vectors (one-sample t by hand)
    d = y[:, 2] - y[:, 0]
    signs = np.array(list(product([1.0, -1.0], repeat=10)))
    flipped = signs[:, :, None] * d[None]
    t_all = flipped.mean(axis=1) / (flipped.std(axis=1, ddof=1) / np.sqrt(10))
    np.testing.assert_allclose(fit.maps["gain"]["p_perm"], exact_p(np.abs(t_all), np.abs(t_all[0])), atol=1e-12)
    # exact whole-participant flips of the 2 orthonormal session contrasts: the split-plot F by hand
    q = np.linalg.qr(np.array([[1.0, -1.0, 0.0], [1.0, 1.0, -2.0]]).T)[0]  # orthonormal contrasts (3 x 2)
    z = np.einsum("nkv,kc->ncv", y, q)
    zf = signs[:, :, None, None] * z[None]
    mean = zf.mean(axis=1)
    ssh = 10 * (mean**2).sum(axis=1)
    sse = ((zf - mean[:, None]) ** 2).sum(axis=(1, 2))
    f_all = (ssh / 2) / (sse / 18)
    np.testing.assert_allclose(f_all[0], fit.maps["session"]["F"], rtol=1e-9)
    np.testing.assert_allclose(fit.maps["session"]["p_perm"], exact_p(f_all, f_all[0]), atol=1e-12)
    # between stratum: all 252 splits of the participants' averages into two groups of 5 (scipy f_oneway)
    spec.update({"factors": {"group": {}, "session": {"within": True}}, "terms": ["group", "session"],
                 "hypotheses": {"group": {"main": "group"}}})
    (root / "perm.json").write_text(json.dumps(spec))
    fit = fit_images(root / "perm.json", progress=False, inference=InferenceOptions(permutations=5000, seed=1))
    assert fit.records["group"]["method"] == "permutation" and fit.records["group"]["exhaustive"]
    avg = y.mean(axis=1)
    observed = stats.f_oneway(avg[:5], avg[5:]).statistic
    f_splits = np.array([stats.f_oneway(avg[list(a)], avg[[i for i in range(10) if i not in a]]).statistic
                         for a in combinations(range(10), 5)])
    np.testing.assert_allclose(fit.maps["group"]["F"], observed, rtol=1e-9)
    # an F near 0 is a difference of nearly equal sums: its mirror-image split (the same F) may differ from it
    # by more than the tie tolerance, so those few voxels are left out of the comparison
    clear = observed > 1e-3
    assert clear.mean() > 0.9
    np.testing.assert_allclose(fit.maps["group"]["p_perm"][clear], exact_p(f_splits, observed)[clear], atol=1e-12)
