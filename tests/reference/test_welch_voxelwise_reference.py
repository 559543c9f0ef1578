"""Voxelwise fits with ``variance_groups`` against scipy, with and without permutations.

References: ``scipy.stats.ttest_ind(equal_var=False)`` at every voxel (v, p; df by the Welch-Satterthwaite
formula written out), ``scipy.stats.f_oneway(equal_var=False)`` (Welch 1951); for permutations, the rearrangements
are re-applied here to the data residualised against the intercept and each rearrangement's v computed with
scipy, so that the uncorrected and max-statistic FWE p are recomputed outside the engine.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from groupmodel.analysis.dry_run import dry_run
from groupmodel.errors import InputError
from groupmodel.fit import fit_images, write_voxel_fit
from groupmodel.inference.rearrangements import permutation_set
from groupmodel.model.options import InferenceOptions

SHAPE = (4, 3, 3)
SIZES = {"control": 24, "patient": 8, "relative": 10}
SDS = {"control": 1.0, "patient": 2.0, "relative": 0.7}


def _study(root: Path, hypotheses: dict, terms: tuple[str, ...] = ("group",),
           variance_groups: str | None = "group") -> tuple[Path, pd.DataFrame, np.ndarray]:
    rng = np.random.default_rng(16)
    (root / "maps").mkdir(parents=True)
    groups = np.repeat(list(SIZES), list(SIZES.values()))
    sex = np.array(["f", "m"])[np.arange(groups.size) % 2]
    ids = [f"sub-{i + 1:02d}" for i in range(groups.size)]
    table = pd.DataFrame({"participant_id": ids, "group": groups, "sex": sex})
    table.to_csv(root / "participants.tsv", sep="\t", index=False)
    nvox = int(np.prod(SHAPE))
    effect = rng.choice([0.0, 1.5], nvox)
    data = np.empty((groups.size, nvox))
    for i, g in enumerate(groups):
        data[i] = 10 + effect * (g == "patient") + rng.normal(0, SDS[g], nvox)
        nib.save(nib.Nifti1Image(data[i].reshape(SHAPE).astype(np.float64), np.eye(4)),
                 root / "maps" / f"{ids[i]}.nii.gz")
    spec = {"participants": "participants.tsv",
            "factors": {"group": {"levels": list(SIZES)}, "sex": {"levels": ["f", "m"]}},
            "terms": list(terms), "hypotheses": hypotheses, "images": "maps/{participant_id}.nii.gz"}
    if variance_groups is not None:
        spec["variance_groups"] = variance_groups
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json", table, data


HYPOTHESES = {"patient_vs_control": {"compare": {"group": ["patient", "control"]}},
              "group": {"main": "group"}}


def test_maps_match_scipy_at_every_voxel(tmp_path: Path) -> None:
    spec, table, data = _study(tmp_path, HYPOTHESES)
    fit = fit_images(spec, progress=False, chunk_voxels=7)
    g = table.group.to_numpy()
    a, b = data[g == "patient"], data[g == "control"]
    ref = stats.ttest_ind(a, b, equal_var=False)
    va, vb = a.var(axis=0, ddof=1) / a.shape[0], b.var(axis=0, ddof=1) / b.shape[0]
    df_ws = (va + vb) ** 2 / (va**2 / (a.shape[0] - 1) + vb**2 / (b.shape[0] - 1))
    m = fit.maps["patient_vs_control"]
    np.testing.assert_allclose(m["v"], ref.statistic, rtol=1e-8)
    np.testing.assert_allclose(m["p"], ref.pvalue, rtol=1e-7)
    np.testing.assert_allclose(m["df2"], df_ws, rtol=1e-8)
    anova = stats.f_oneway(*[data[g == k] for k in SIZES], equal_var=False)
    np.testing.assert_allclose(fit.maps["group"]["G"], anova.statistic, rtol=1e-8)
    np.testing.assert_allclose(fit.maps["group"]["p"], anova.pvalue, rtol=1e-7)
    assert "t" not in m and "F" not in fit.maps["group"]
    out = tmp_path / "out"
    write_voxel_fit(fit, out, pictures=False)
    sides = [json.loads(p.read_text()) for p in (out / "hypotheses" / "patient_vs_control").glob("*.json")]
    side = next(s for s in sides if s.get("statistic") == "v")
    assert side["variance_groups"]["factor"] == "group" and side["variance_groups"]["statistic"]["t tests"] == "v"
    assert any(s.get("statistic") == "df2" for s in sides)


def test_interval_maps_match_scipy_at_every_voxel(tmp_path: Path) -> None:
    """The interval of the effect with variance groups: scipy's Welch interval
    (``ttest_ind(equal_var=False).confidence_interval``) at every voxel, at the spec's ``ci_level``."""
    spec, table, data = _study(tmp_path, HYPOTHESES)
    doc = json.loads(spec.read_text())
    doc["inference"] = {"ci_level": 0.9}
    spec.write_text(json.dumps(doc))
    fit = fit_images(spec, progress=False, chunk_voxels=7)
    g = table.group.to_numpy()
    ref = stats.ttest_ind(data[g == "patient"], data[g == "control"], equal_var=False).confidence_interval(0.9)
    m = fit.maps["patient_vs_control"]
    np.testing.assert_allclose(m["ci_lower"], ref.low, rtol=1e-8)
    np.testing.assert_allclose(m["ci_upper"], ref.high, rtol=1e-8)
    assert "ci_lower" not in fit.maps["group"] and "cohens_d" not in m
    out = tmp_path / "out"
    write_voxel_fit(fit, out, pictures=False)
    side = json.loads((out / "hypotheses" / "patient_vs_control" / "ci_lower.json").read_text())
    assert side["ci_level"] == 0.9 and "Welch" in side["effect_size"]
    assert nib.load(out / "hypotheses" / "patient_vs_control" / "ci_upper.nii.gz").shape == SHAPE


def test_mean_image_and_participant_check_with_variance_groups(tmp_path: Path) -> None:
    """A fit with variance groups writes the report's background (the mean input image) and the per-participant
    check like a pooled fit; each participant's robust z is taken within its own variance group, so a group that
    is simply more variable is not called unusual, while one bad image is.  References: the mean absolute residual
    from ``scipy.linalg.lstsq`` on the images read back with nibabel; the robust z from ``np.median`` and
    ``scipy.stats.median_abs_deviation(scale="normal")`` (1.4826 x MAD) within each group."""
    from scipy import linalg

    spec, table, data = _study(tmp_path, HYPOTHESES)
    bad = int(np.flatnonzero(table.group.to_numpy() == "patient")[3])
    path = tmp_path / "maps" / f"{table.participant_id[bad]}.nii.gz"
    data[bad] = 10 + 12 * (data[bad] - 10)  # one patient's image badly scaled
    nib.save(nib.Nifti1Image(data[bad].reshape(SHAPE), np.eye(4)), path)
    fit = fit_images(spec, progress=False, chunk_voxels=7)
    out = tmp_path / "out"
    write_voxel_fit(fit, out, pictures=False)
    np.testing.assert_allclose(np.asarray(nib.load(out / "mean_input.nii.gz").dataobj, dtype=float).ravel(),
                               data.mean(axis=0), rtol=1e-6)  # float32 map
    design = pd.read_csv(out / "design.tsv", sep="\t")
    x = design.drop(columns="participant_id").to_numpy(float)
    b, *_ = linalg.lstsq(x, data)
    mean_abs = np.abs(data - x @ b).mean(axis=1)
    got = pd.read_csv(out / "participants_residuals.tsv", sep="\t")
    np.testing.assert_allclose(got["mean_abs_residual"], mean_abs, rtol=1e-9)
    z = np.empty_like(mean_abs)
    for g in SIZES:
        rows = table.group.to_numpy() == g
        z[rows] = (mean_abs[rows] - np.median(mean_abs[rows])) / stats.median_abs_deviation(mean_abs[rows],
                                                                                              scale="normal")
    np.testing.assert_allclose(got["robust_z"], z, rtol=1e-5)  # groupmodel scales by 1.4826, scipy by 1/Phi^-1(3/4)
    assert list(got.loc[got.unusual, "participant_id"]) == [table.participant_id[bad]]
    assert json.loads((out / "summary.json").read_text())["variance_groups"]["factor"] == "group"
    page = (out / "report.html").read_text()
    assert "robust SDs above the median of its variance group (group)" in page and "mean of the input images" in page


def _reference_p(data: np.ndarray, groups: np.ndarray, perm: np.ndarray | None, flips: np.ndarray | None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Uncorrected and FWE p of |v| (patient vs control) recomputed with scipy over the given rearrangements."""
    # Freedman-Lane: residuals of the reduced model, in which patients and controls share a mean
    w = data.copy()
    for rows in (np.isin(groups, ["patient", "control"]), groups == "relative"):
        w[rows] -= data[rows].mean(axis=0)
    J = (perm if perm is not None else flips).shape[0]
    null = np.empty((J, data.shape[1]))
    for j in range(J):
        y = w if perm is None else w[perm[j]]
        y = y if flips is None else y * flips[j][:, None]
        null[j] = np.abs(stats.ttest_ind(y[groups == "patient"], y[groups == "control"], equal_var=False).statistic)
    tol = 100 * np.finfo(float).eps * null[0]  # the tie tolerance of scipy.stats.permutation_test
    p_unc = np.mean(null >= null[0] - tol, axis=0)
    p_fwe = np.mean(null.max(axis=1)[:, None] >= null[0] - tol, axis=0)
    return p_unc, p_fwe


def test_permutations_flip_signs_when_comparing_variance_groups(tmp_path: Path) -> None:
    spec, table, data = _study(tmp_path, {"patient_vs_control": HYPOTHESES["patient_vs_control"]})
    options = InferenceOptions(permutations=200, seed=5)
    fit = fit_images(spec, progress=False, chunk_voxels=5, inference=options)
    assert fit.records["patient_vs_control"]["method"] == "sign_flip"
    assert fit.records["patient_vs_control"]["permutation_statistic"] == "v"
    n = data.shape[0]
    labels = np.repeat(np.arange(3), list(SIZES.values()))
    _, classes = np.unique(labels, return_inverse=True)
    pset = permutation_set(n, 200, "flip", blocks=labels, seed=5, classes=classes)
    p_unc, p_fwe = _reference_p(data, table.group.to_numpy(), None, pset.flips)
    np.testing.assert_allclose(fit.maps["patient_vs_control"]["p_perm"], p_unc, atol=1e-12)
    np.testing.assert_allclose(fit.maps["patient_vs_control"]["p_fwe"], p_fwe, atol=1e-12)
    write_voxel_fit(fit, tmp_path / "out", pictures=False)
    sides = [json.loads(p.read_text()) for p in (tmp_path / "out" / "hypotheses" / "patient_vs_control").glob("*.json")]
    fwe = next(s for s in sides if s.get("statistic") == "p_fwe")
    assert fwe["permutation_statistic"] == "v" and fwe["permuted_within_variance_groups"] == "group"
    assert fwe["method"] == "sign_flip" and fwe["variance_groups"]["factor"] == "group"
    again = fit_images(spec, progress=False, chunk_voxels=36, inference=options)  # one chunk: the same p
    np.testing.assert_array_equal(again.maps["patient_vs_control"]["p_fwe"], fit.maps["patient_vs_control"]["p_fwe"])


def test_permutations_stay_within_variance_groups(tmp_path: Path) -> None:
    """A sex difference (within every group) is tested by permuting rows only inside each variance group."""
    spec, table, data = _study(tmp_path, {"sex": {"compare": {"sex": ["m", "f"]}}}, terms=("group", "sex"))
    fit = fit_images(spec, progress=False, chunk_voxels=9, inference=InferenceOptions(permutations=100, seed=3))
    rec = fit.records["sex"]
    assert rec["method"] == "permutation" and "within variance groups" in rec["rearrangements"]
    labels = np.repeat(np.arange(3), list(SIZES.values()))
    x = fit.model.design.matrix
    _, classes = np.unique(np.round(x, 10), axis=0, return_inverse=True)
    pset = permutation_set(x.shape[0], 100, "permute", blocks=labels, seed=3, classes=classes.reshape(-1))
    assert np.all(labels[pset.perm] == labels[None, :])  # every row stays in its group
    assert np.all(np.isfinite(fit.maps["sex"]["p_fwe"])) and np.all(fit.maps["sex"]["p_fwe"] >= 1 / 100)


def test_tfce_is_refused_with_variance_groups(tmp_path: Path) -> None:
    spec, _, _ = _study(tmp_path, HYPOTHESES)
    with pytest.raises(InputError, match="inference tfce: not available with variance_groups"):
        fit_images(spec, progress=False, inference=InferenceOptions(permutations=50, tfce=True))
    # the dry run runs the fit's checks: the same refusal, before any image is read
    with pytest.raises(InputError, match="inference tfce: not available with variance_groups"):
        dry_run(spec, inference=InferenceOptions(permutations=50, tfce=True))


def test_pooled_voxel_fit_warns_with_levene(tmp_path: Path) -> None:
    """Without variance groups the fit counts the voxels whose groups' variances differ by more than a factor 2
    with Levene's p < 0.05 (scipy.stats.levene on the residuals, recomputed here voxel by voxel)."""
    spec, table, data = _study(tmp_path, HYPOTHESES, variance_groups=None)
    fit = fit_images(spec, progress=False, chunk_voxels=10)
    g = table.group.to_numpy()
    resid = data.copy()
    for k in SIZES:
        resid[g == k] -= data[g == k].mean(axis=0)
    hits = 0
    for j in range(data.shape[1]):
        parts = [resid[g == k, j] for k in SIZES]
        var = np.array([p.var(ddof=1) for p in parts])
        hits += bool(var.max() / var.min() > 2 and stats.levene(*parts, center="median").pvalue < 0.05)
    found = [w for w in fit.warnings if "Levene" in w]
    assert hits > 0.1 * data.shape[1]
    assert len(found) == 1 and found[0].startswith(f"in {hits} of {data.shape[1]} voxels"), (found, hits)
    assert '"variance_groups": "group"' in found[0]
    assert "t" in fit.maps["patient_vs_control"] and fit.variance_groups is None


class _Stop(Exception):
    pass


def test_checkpoint_resume_with_variance_groups_gives_identical_maps(tmp_path: Path) -> None:
    # Stopped after some chunks of voxels (every rearrangement of a chunk is run before the next chunk), resumed
    # with other chunks: the maps equal those of a run never stopped, bit for bit (counts and maxima are exact).
    from groupmodel.inference.checkpoint import CheckpointFolder
    from groupmodel.runtime.log import StageLog

    spec, _, _ = _study(tmp_path, HYPOTHESES)
    options = InferenceOptions(permutations=150, seed=4)
    whole = fit_images(spec, progress=False, chunk_voxels=7, inference=options)

    class StopLog(StageLog):
        def progress(self, name: str, done: int, total: int, unit: str = "") -> None:
            if name == "permutations" and done >= 150 + 80:  # the first hypothesis done, the second mid-way
                raise _Stop

    params = {"spec": "model.json"}
    with pytest.raises(_Stop):
        fit_images(spec, progress=False, chunk_voxels=7, inference=options, log=StopLog(quiet=True),
                   checkpoint=CheckpointFolder(tmp_path / "ck", params, resume=False, every=0))
    saved = CheckpointFolder(tmp_path / "ck", params, resume=True, every=0)
    progress = saved.progress()
    n_vox = whole.maps["group"]["p"].size
    assert progress["patient_vs_control"] == f"{n_vox} of {n_vox} elements", progress
    done = int(progress["group"].split()[0])
    assert 0 < done < n_vox, progress
    resumed = fit_images(spec, progress=False, chunk_voxels=5, inference=options, checkpoint=saved)
    for name in whole.maps:
        for stat in ("p_perm", "p_fwe"):
            assert np.array_equal(whole.maps[name][stat], resumed.maps[name][stat], equal_nan=True), (name, stat)
    # a pooled run's checkpoint is not taken for a run with variance groups
    with pytest.raises(InputError, match="not for this contrast"):
        _pooled_then_welch(tmp_path, spec, options)


def _pooled_then_welch(tmp_path: Path, spec: Path, options: InferenceOptions) -> None:
    """A pooled fit's checkpoint folder, then the variance-groups fit resumed from it."""
    from groupmodel.inference.checkpoint import CheckpointFolder

    pooled = json.loads(spec.read_text())
    pooled.pop("variance_groups")
    (spec.parent / "pooled.json").write_text(json.dumps(pooled))
    folder = tmp_path / "ck_pooled"
    fit_images(spec.parent / "pooled.json", progress=False, inference=options,
               checkpoint=CheckpointFolder(folder, {"spec": "x"}, resume=False, every=0))
    fit_images(spec, progress=False, inference=options,
               checkpoint=CheckpointFolder(folder, {"spec": "x"}, resume=True, every=0))
