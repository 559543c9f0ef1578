"""The rearrangements chosen by ``method: auto``: sign flips for a mean, row permutation for a difference.

Reference (common practice; Winkler et al. 2014, NeuroImage 92:381-397, section 2.4): a permutation of rows
leaves the mean of the data unchanged, so it cannot test a mean or a combination of means (weights over
cell means that do not sum to zero); sign flips can (symmetric errors).  Differences, interactions and
slopes are tested by row permutation (exchangeable errors).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupmodel.analysis.corrections import InferenceOptions, hypothesis_method
from groupmodel.cli import main
from groupmodel.fit import fit_images
from groupmodel.inference import plan_contrast

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "unit"))
from test_fit_voxelwise import make_study  # noqa: E402

HYPOTHESES = {
    "grand_mean": {"mean": {}},
    "a_mean": {"mean": {"group": "a"}},
    "b_vs_a": {"compare": {"group": ["b", "a"]}},
    "age": {"slope": "age"},
}
N_A, N_B = 8, 16
PLANTED = 10  # voxels with a strong mean; the other 10 have none


def _planted_mean_study(root: Path) -> Path:
    """Two unbalanced groups; the first voxels have a mean of 3 noise SDs in both groups, no difference."""
    rng = np.random.default_rng(11)
    n = N_A + N_B
    table = pd.DataFrame({"participant_id": [f"sub-{i + 1:02d}" for i in range(n)],
                          "group": ["a"] * N_A + ["b"] * N_B, "sex": rng.permutation(["f", "m"] * (n // 2)),
                          "age": np.round(rng.uniform(20, 60, n), 1)})
    y = rng.normal(0.0, 1.0, (n, 2 * PLANTED))
    y[:, :PLANTED] += 3.0
    path = make_study(root, data=(table, y.reshape(n, 5, 4, 1).astype(np.float32)))
    spec = json.loads(path.read_text())
    spec.update(factors={"group": {"levels": ["a", "b"], "coding": "effect"}}, terms=["group", "age"],
                hypotheses=HYPOTHESES)
    path.write_text(json.dumps(spec))
    return path


@pytest.fixture(scope="module")
def planted(tmp_path_factory) -> Path:
    return _planted_mean_study(tmp_path_factory.mktemp("method") / "study")


def test_auto_tests_a_grand_mean_by_sign_flips_and_finds_it(planted) -> None:
    fit = fit_images(planted, progress=False, inference=InferenceOptions(permutations=500, seed=0))
    methods = {name: rec["method"] for name, rec in fit.records.items()}
    assert methods == {"grand_mean": "sign_flip", "a_mean": "sign_flip", "b_vs_a": "permutation",
                       "age": "permutation"}
    # Every planted voxel (t about 15) survives FWE with sign flips: its p is the smallest possible, 1/J.
    p_fwe = fit.maps["grand_mean"]["p_fwe"]
    mask_order = np.flatnonzero(fit.mask.ravel())
    planted_voxels = mask_order < PLANTED
    assert np.all(fit.maps["grand_mean"]["t"][planted_voxels] > 8)
    np.testing.assert_array_equal(p_fwe[planted_voxels], 1 / 500)
    # Row permutation cannot move the mean (only the part of it that the unequal group sizes tie to the
    # groups): forced on the same data it is never stronger, and it misses planted voxels.
    forced = fit_images(planted, progress=False,
                        inference=InferenceOptions(permutations=500, seed=0, method="permutation"))
    assert forced.records["grand_mean"]["method"] == "permutation"
    forced_p = forced.maps["grand_mean"]["p_fwe"][planted_voxels]
    assert np.all(forced_p >= p_fwe[planted_voxels]) and np.any(forced_p > 0.05)


def test_the_rule_on_cell_weights() -> None:
    class H:  # the fields of groupmodel.model.hypotheses.Hypothesis the rule reads
        def __init__(self, w: list[list[float]] | None, on_slopes: str | None = None) -> None:
            self.cell_weights = None if w is None else np.array(w)
            self.on_slopes = on_slopes

    assert hypothesis_method(H([[1 / 3, 1 / 3, 1 / 3]]), "auto") == "flip"  # grand mean: sums to 1
    assert hypothesis_method(H([[1.0, 0.0, -1.0]]), "auto") == "permute"  # a difference
    assert hypothesis_method(H([[1.0, -1.0, 0.0], [0.0, 0.0, 1.0]]), "auto") == "flip"  # F test with a mean row
    assert hypothesis_method(H([[0.5, 0.5]], on_slopes="age"), "auto") == "permute"  # a slope
    assert hypothesis_method(H(None), "auto") == "auto"  # raw weights: the engine's rule on the design
    assert hypothesis_method(H([[1 / 3, 1 / 3, 1 / 3]]), "permutation") == "permute"  # a setting is kept
    assert hypothesis_method(H([[1.0, -1.0]]), "both") == "both"


def test_engine_auto_asks_the_same_of_the_design() -> None:
    # Without cell weights the engine decides: does the contrast move when a constant is added to the data?
    rng = np.random.default_rng(0)
    group = np.r_[np.zeros(5), np.ones(9)]
    X = np.column_stack([1 - group, group, rng.normal(size=14)])  # cell means of two groups, a covariate
    assert plan_contrast(X, np.array([[0.5, 0.5, 0.0]])).method == "flip"  # grand mean, unbalanced
    assert plan_contrast(X, np.array([[1.0, 0.0, 0.0]])).method == "flip"  # one group's mean
    assert plan_contrast(X, np.array([[1.0, -1.0, 0.0]])).method == "permute"  # difference
    assert plan_contrast(X, np.array([[0.0, 0.0, 1.0]])).method == "permute"  # slope
    assert plan_contrast(np.ones((6, 1)), np.array([[1.0]])).method == "flip"  # one-sample


def test_terminal_and_summary_record_the_method_of_each_hypothesis(planted, tmp_path, capsys) -> None:
    out = tmp_path / "res"
    assert main(["fit", str(planted), "--out", str(out), "--permutations", "50", "--seed", "2"]) == 0
    printed = capsys.readouterr().out
    assert "  grand_mean: sign flips, 50 rearrangements" in printed
    assert "  b_vs_a: row permutation, 50 rearrangements" in printed
    summary = json.loads((out / "summary.json").read_text())
    assert summary["inference"]["method"] == {"grand_mean": "sign_flip", "a_mean": "sign_flip",
                                              "b_vs_a": "permutation", "age": "permutation"}
    assert summary["inference"]["method_setting"] == "auto"
    assert json.loads((out / "hypotheses/grand_mean/p_fwe.json").read_text())["method"] == "sign_flip"
    assert json.loads((out / "hypotheses/b_vs_a/p_perm.json").read_text())["method"] == "permutation"
    assert nib.load(out / "hypotheses/grand_mean/p_fwe.nii.gz").shape == (5, 4, 1)
