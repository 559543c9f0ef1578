"""Rank-deficient designs against outside references.

The study: drink {caffeine, placebo} x scanner {A, B, C} with age, and no participant in the cell
caffeine/C, so that every coding of drink*scanner is rank deficient.  Every hypothesis below only uses the
observed cells.  References, named beside each check:

* statsmodels OLS on a design with the dependent column dropped: patsy's treatment coding of
  ``drink * scanner`` loses the column ``drink[T.placebo]:scanner[T.C]`` (it equals ``scanner[T.C]`` on the
  observed rows); each hypothesis is written by hand over the remaining coefficients.
* statsmodels OLS on the cell-means model restricted to the observed cells (``0 + C(cell)``, five cells), each
  hypothesis written by hand over the cell coefficients.
* A brute-force Freedman-Lane loop with numpy.linalg.lstsq (tests/reference/test_inference_reference.py) for
  the permutation statistics, and the parametric statistic for the identity rearrangement.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rank_deficient_study import CODINGS, image_study, reference, table, write
from test_inference_reference import _brute_force_fl

from groupmodel import build
from groupmodel.analysis.corrections import InferenceOptions
from groupmodel.fit import fit_images, fit_table
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.freedman_lane import plan_contrast
from groupmodel.inference.kernel import chunk_statistics
from groupmodel.inference.rearrangements import permutation_set
from groupmodel.inference.settings import ContrastTest, Rearrangements

RTOL = 1e-9
@pytest.mark.parametrize("coding", list(CODINGS))
def test_table_fit_matches_statsmodels(tmp_path: Path, coding: str) -> None:
    frame = table()
    spec = write(tmp_path, coding, frame)
    model = build(spec)
    assert not model.errors
    assert [f.code for f in model.findings if f.code == "rank_deficient"] == ["rank_deficient"]
    res = fit_table(spec, "score").table.set_index("hypothesis")
    ref = reference(frame, frame["score"].to_numpy())
    n = len(frame)
    for name, want in ref.items():
        got = res.loc[name]
        assert got["df2"] == want["df2"] == n - 6  # residual df = n - rank (rank 6: 5 cells + age)
        assert got["statistic"] == pytest.approx(want["statistic"], rel=RTOL), name
        if "estimate" in want:
            assert got["estimate"] == pytest.approx(want["estimate"], rel=RTOL), name
            assert got["se"] == pytest.approx(want["se"], rel=RTOL), name
        else:
            assert got["p"] == pytest.approx(want["p"], rel=RTOL), name


def test_statements_of_at_lists(tmp_path: Path) -> None:
    # Common practice: an equal average over the listed levels only, said in the statement.
    model = build(write(tmp_path, "effect", table()))
    hyp = model.hypotheses
    assert hyp["drink_over_AB"].statement.startswith(
        "mean(drink=caffeine) = mean(drink=placebo), averaged equally over scanner A, B; age at its mean")
    assert hyp["caffeine_minus_placebo_AB"].statement.startswith(
        "mean(drink=caffeine) - mean(drink=placebo) = 0, averaged equally over scanner A, B;")
    assert "over scanner A, B only" in hyp["interaction_AB"].statement
    assert hyp["scanner_AB"].statement.startswith("mean(scanner=A) = mean(scanner=B), averaged equally over drink;")
    assert hyp["caffeine_mean_AB"].statement.startswith("mean(drink=caffeine) = 0, averaged equally over scanner A, B")
    # The weights over cells: 1/2 on each listed level, nothing on scanner C.
    cells = [dict(zip(model.design.factors, c, strict=True)) for c in model.design.cells]
    w = dict(zip([(c["drink"], c["scanner"]) for c in cells], hyp["drink_over_AB"].cell_weights[0], strict=True))
    assert w == pytest.approx({("caffeine", "A"): .5, ("caffeine", "B"): .5, ("caffeine", "C"): 0,
                               ("placebo", "A"): -.5, ("placebo", "B"): -.5, ("placebo", "C"): 0})


# ------------------------------------------------------------------------------------------ voxelwise
def test_voxelwise_fit_matches_statsmodels(tmp_path: Path) -> None:
    spec, frame, y = image_study(tmp_path)
    fit = fit_images(spec, progress=False)
    assert fit.df_resid == len(frame) - 6
    shape = (4, 3, 2)
    for v in (0, 7, 23):
        ref = reference(frame, y[:, v])
        ijk = np.unravel_index(v, shape)
        flat = int(np.flatnonzero(np.ravel_multi_index(np.nonzero(fit.mask), shape) == v)[0])
        for name, want in ref.items():
            stat = "t" if "estimate" in want else "F"
            assert fit.maps[name][stat][flat] == pytest.approx(want["statistic"], rel=1e-8), (name, ijk)
            if stat == "t":
                assert fit.maps[name]["effect"][flat] == pytest.approx(want["estimate"], rel=1e-8), (name, ijk)


# ------------------------------------------------------------------------------------------ permutations
def test_freedman_lane_on_a_rank_deficient_design_equals_brute_force(tmp_path: Path) -> None:
    # Reference: the brute-force Freedman-Lane loop (numpy lstsq, pinv), which needs no full rank; the identity
    # (first rearrangement) is the parametric statistic of statsmodels (via _reference).
    spec, frame, y = image_study(tmp_path)
    model = build(spec)
    x = model.design.matrix
    assert np.linalg.matrix_rank(x) == x.shape[1] - 1
    for name in ("caffeine_at_A", "scanner_in_placebo"):
        h = model.hypotheses[name]
        plan = plan_contrast(x, h.weights, kind=h.test, method="permute")
        pset = permutation_set(len(frame), 60, "permute", seed=3, classes=plan.classes)
        engine = chunk_statistics(plan, pset.perm, pset.flips, y)
        brute = _brute_force_fl(x, h.weights, y, pset, h.test)
        np.testing.assert_allclose(engine, brute, rtol=1e-9, atol=1e-9)
        ref = reference(frame, y[:, 5])["caffeine_at_A" if name == "caffeine_at_A" else name]
        assert engine[0, 5] == pytest.approx(ref["statistic"], rel=1e-9)


def test_permutation_maps_equal_those_of_the_full_rank_cell_model(tmp_path: Path) -> None:
    # Reference: the same hypothesis in a full-rank model of the five observed cells (one factor 'cell'), which
    # spans the same column space: the same rearrangements give the same statistics, so the same p maps.
    spec, frame, _ = image_study(tmp_path / "deficient")
    opts = InferenceOptions(permutations=40, seed=5, method="permutation")
    fit = fit_images(spec, progress=False, inference=opts)
    cell = frame.assign(cell=frame["drink"] + "_" + frame["scanner"])
    (tmp_path / "full").mkdir()
    cell.to_csv(tmp_path / "full" / "participants.tsv", sep="\t", index=False)
    (tmp_path / "full" / "maps").symlink_to(tmp_path / "deficient" / "maps")
    full_spec = {"participants": "participants.tsv", "factors": {"cell": {}}, "covariates": {"age": {}},
                 "terms": ["cell", "age"], "images": "maps/{participant_id}.nii.gz",
                 "hypotheses": {"caffeine_at_A": {"compare": {"cell": ["caffeine_A", "placebo_A"]}}}}
    (tmp_path / "full" / "model.json").write_text(json.dumps(full_spec))
    full = fit_images(tmp_path / "full" / "model.json", progress=False, inference=opts)
    a, b = fit.maps["caffeine_at_A"], full.maps["caffeine_at_A"]
    np.testing.assert_allclose(a["t"], b["t"], rtol=1e-9)
    for stat in ("p_perm", "p_fwe"):
        np.testing.assert_array_equal(a[stat], b[stat], err_msg=stat)


def test_identity_only_gives_the_parametric_statistic() -> None:
    # Reference: statsmodels OLS on the observed-cell means model (via _reference): the identity rearrangement
    # alone, by permutation and by sign flips, gives the parametric statistic on an over-parameterised design.
    frame = table(seed=12)
    n = len(frame)
    rng = np.random.default_rng(0)
    y = frame["score"].to_numpy()[:, None] + rng.normal(0, 1, (n, 3))
    dummies = pd.get_dummies(frame["drink"] + "_" + frame["scanner"]).astype(float)
    # Intercept, an indicator of every observed cell (one column too many), centred age.
    x = np.column_stack([np.ones(n), dummies.to_numpy(), frame["age"] - frame["age"].mean()])
    L = np.zeros(x.shape[1])
    L[1 + list(dummies.columns).index("caffeine_A")] = 1
    L[1 + list(dummies.columns).index("placebo_A")] = -1
    want = [reference(frame, y[:, j])["caffeine_at_A"]["statistic"] for j in range(3)]
    for method in ("permute", "flip"):
        plan = plan_contrast(x, L, method=method)
        perm = np.arange(n)[None, :] if method == "permute" else None
        flips = np.ones((1, n)) if method == "flip" else None
        np.testing.assert_allclose(chunk_statistics(plan, perm, flips, y)[0], want, rtol=1e-9)
    res = run_permutations(ContrastTest(x, L), y, Rearrangements(n_perm=20, seed=1))
    np.testing.assert_allclose(res.stat, want, rtol=1e-9)
