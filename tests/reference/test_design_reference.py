"""The design matrix against facts of the trade and against patsy/statsmodels.

References, named beside each check:

* Common practice (facts of the trade): cell counts of a factorial, column counts of codings, interaction
  columns as elementwise products, the effect-coded design row of a cell.
* R's ``contr.sum``, ``contr.treatment`` and ``contr.poly`` values as printed in REFERENCES.md, recomputed
  here with patsy's ``Sum``, ``Treatment`` and ``Poly`` contrasts.
* patsy (the formula layer of statsmodels): the design of the same formula spans the same column space
  (equal projection matrices), and with uncentred covariates has the same columns up to order.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import patsy
import pytest
from patsy.contrasts import Poly, Sum, Treatment

from groupmodel import build
from groupmodel.engine.linalg import condition_number, matrix_rank, variance_inflation
from groupmodel.model.checks import CONDITION_WARN, cell_counts_by_term, check_design
from groupmodel.model.coding import make_coding, orthogonal_polynomials
from groupmodel.model.design import Design, build_design
from groupmodel.model.spec import parse_term, spec_from_dict
from groupmodel.model.table import select_sample


# ------------------------------------------------------------------------------------------ helpers
def as_text_table(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame as read_table gives it: every value text, with participant ids."""
    out = frame.copy()
    if "participant_id" not in out:
        out.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(out))])
    return out.astype(str).astype(object)


def design_of(frame: pd.DataFrame, spec: dict) -> Design:
    """Build a design from an in-memory table (no files)."""
    spec = spec_from_dict({"participants": "participants.tsv", **spec}, Path("/nonexistent/model.json"))
    return build_design(spec, select_sample(spec, table=as_text_table(frame), sidecar_levels={}))


def random_frame(seed: int, n: int = 48) -> pd.DataFrame:
    """Unbalanced data over A (3 levels) and B (2 levels), every cell filled, covariates x and z."""
    rng = np.random.default_rng(seed)
    a = np.concatenate([["a1", "a2", "a3"] * 2, rng.choice(["a1", "a2", "a3"], n - 6)])
    b = np.concatenate([["b1"] * 3 + ["b2"] * 3, rng.choice(["b1", "b2"], n - 6)])
    return pd.DataFrame({"A": a, "B": b, "x": rng.normal(40, 9, n).round(3), "z": rng.normal(0, 2, n).round(3)})


def projector(x: np.ndarray) -> np.ndarray:
    """Orthogonal projector on the column space of x (via the pseudo-inverse, rank-safe)."""
    return x @ np.linalg.pinv(x)


def same_columns_up_to_order(ours: np.ndarray, theirs: np.ndarray) -> bool:
    if ours.shape != theirs.shape:
        return False
    unused = list(range(theirs.shape[1]))
    for j in range(ours.shape[1]):
        hit = next((k for k in unused if np.allclose(ours[:, j], theirs[:, k], atol=1e-12, rtol=0)), None)
        if hit is None:
            return False
        unused.remove(hit)
    return True


# ------------------------------------------------------------------------------------------ facts of the trade
def test_two_by_three_factorial_has_six_cells() -> None:
    frame = pd.DataFrame({"A": ["a1", "a2"] * 6, "B": ["b1", "b2", "b3"] * 4, "y": np.arange(12.0)})
    d = design_of(frame, {"factors": {"A": {}, "B": {}}, "terms": ["A*B"]})
    # Common practice: a 2 x 3 factorial has 6 cells.
    assert len(d.cells) == 6
    assert len(cell_counts_by_term(d)["A:B"]) == 6
    assert d.cell_counts.tolist() == [2] * 6
    cm = design_of(frame, {"factors": {"A": {"coding": "indicator"}, "B": {"coding": "indicator"}},
                           "intercept": False, "terms": ["A:B"]})
    assert cm.n_columns == 6  # the cell-means model: one column per cell
    np.testing.assert_array_equal(cm.matrix.sum(axis=1), 1.0)


@pytest.mark.parametrize("k", [2, 3, 4, 5, 6])
def test_column_counts_per_coding(k: int) -> None:
    levels = [f"l{i}" for i in range(k)]
    # Common practice: effect, treatment and polynomial coding give k-1 columns, indicators k.
    for scheme, m in [("effect", k - 1), ("treatment", k - 1), ("polynomial", k - 1), ("indicator", k)]:
        assert make_coding("f", levels, scheme).matrix.shape == (k, m)
    frame = pd.DataFrame({"f": levels * 3})
    d = design_of(frame, {"factors": {"f": {"coding": "effect"}}, "terms": ["f"]})
    assert d.n_columns == 1 + (k - 1)
    assert d.column_names == ["intercept"] + [f"f={lv}" for lv in levels[:-1]]


def test_interaction_columns_are_products() -> None:
    frame = random_frame(1)
    spec = {"factors": {"A": {"coding": "effect"}, "B": {"coding": "treatment"}},
            "covariates": {"x": {"center": "mean"}, "z": {"center": "none"}},
            "terms": ["A*B", "A:x", "x:z", "x"]}
    d = design_of(frame, spec)
    col = {name: d.matrix[:, j] for j, name in enumerate(d.column_names)}
    # Common practice: an interaction column is the elementwise product of its members' columns.
    products = {
        "A=a1:B=b2": ("A=a1", "B=b2"), "A=a2:B=b2": ("A=a2", "B=b2"),  # factor x factor
        "A=a1:x": ("A=a1", "x"), "A=a2:x": ("A=a2", "x"),  # factor x covariate
        "x:z": ("x", "z"),  # covariate x covariate (z enters uncentred, only through x:z)
    }
    col["z"] = frame["z"].to_numpy()
    for name, (u, v) in products.items():
        np.testing.assert_array_equal(col[name], col[u] * col[v])
    np.testing.assert_allclose(col["x"], frame["x"] - frame["x"].mean(), atol=1e-12)  # centred on the mean
    np.testing.assert_allclose(col["x:z"], (frame["x"] - frame["x"].mean()) * frame["z"], atol=1e-12)


def test_column_order_first_member_slowest() -> None:
    frame = pd.DataFrame({"A": ["a1", "a2", "a3"] * 6, "B": ["b1", "b2", "b3"] * 3 + ["b3", "b1", "b2"] * 3})
    d = design_of(frame, {"factors": {"A": {}, "B": {}}, "terms": ["A*B"]})
    assert d.column_names == [
        "intercept", "A=a1", "A=a2", "B=b1", "B=b2",
        "A=a1:B=b1", "A=a1:B=b2", "A=a2:B=b1", "A=a2:B=b2",
    ]
    assert all(name.isascii() for name in d.column_names)


def test_effect_coded_row_of_last_cell_in_three_by_two() -> None:
    frame = random_frame(2)
    d = design_of(frame, {"factors": {"A": {"coding": "effect"}, "B": {"coding": "effect"}}, "terms": ["A*B"]})
    # Common practice: intercept first, references last -> the cell (a3, b2) has row [1, -1, -1, -1, 1, 1].
    expected = [1.0, -1.0, -1.0, -1.0, 1.0, 1.0]
    np.testing.assert_array_equal(d.cell_row(("a3", "b2")), expected)
    in_cell = ((frame["A"] == "a3") & (frame["B"] == "b2")).to_numpy()
    assert in_cell.any()
    np.testing.assert_array_equal(d.matrix[in_cell], np.tile(expected, (in_cell.sum(), 1)))


def test_intercept_only_is_the_one_sample_design() -> None:
    frame = pd.DataFrame({"y": [1.0, 2.0, 3.0]})
    d = design_of(frame, {"terms": []})
    assert d.column_names == ["intercept"]
    np.testing.assert_array_equal(d.matrix, np.ones((3, 1)))


def test_numeric_looking_levels_stay_text() -> None:
    frame = pd.DataFrame({"dose": ["0.5", "2", "0.5", "10", "2", "10"]})
    d = design_of(frame, {"factors": {"dose": {"levels": ["0.5", "2", "10"]}}, "terms": ["dose"]})
    assert d.factors["dose"].levels == ("0.5", "2", "10")
    assert d.column_names == ["intercept", "dose=0.5", "dose=2"]


def test_wilkinson_rogers_shorthand() -> None:
    # Common practice (Wilkinson and Rogers 1973 notation): a*b = a + b + a:b; a*b*c has all 7 terms.
    assert parse_term("a*b") == [("a",), ("b",), ("a", "b")]
    assert parse_term("a:b") == [("a", "b")]
    assert sorted(map(len, parse_term("a*b*c"))) == [1, 1, 1, 2, 2, 2, 3]


# ------------------------------------------------------------------------------------------ R / patsy codings
def test_coding_matrices_equal_r_contrasts() -> None:
    lv3, lv4 = ["a", "b", "c"], ["a", "b", "c", "d"]
    # R contr.sum(3), as listed in REFERENCES.md, and patsy Sum.
    np.testing.assert_array_equal(make_coding("f", lv3, "effect").matrix, [[1, 0], [0, 1], [-1, -1]])
    np.testing.assert_array_equal(make_coding("f", lv4, "effect").matrix, Sum().code_without_intercept(lv4).matrix)
    # R contr.treatment: patsy Treatment with the first level as reference.
    np.testing.assert_array_equal(make_coding("f", lv4, "treatment").matrix,
                                  Treatment(reference=0).code_without_intercept(lv4).matrix)
    # R contr.poly values printed in REFERENCES.md (7 digits) ...
    np.testing.assert_allclose(make_coding("f", lv3, "polynomial").matrix,
                               [[-0.7071068, 0.4082483], [0, -0.8164966], [0.7071068, 0.4082483]], atol=5e-8)
    np.testing.assert_allclose(
        make_coding("f", lv4, "polynomial").matrix,
        [[-0.6708204, 0.5, -0.2236068], [-0.2236068, -0.5, 0.6708204],
         [0.2236068, -0.5, -0.6708204], [0.6708204, 0.5, 0.2236068]], atol=5e-8)
    np.testing.assert_allclose(orthogonal_polynomials([1, 2, 4])[:, 0], [-0.6172134, -0.1543034, 0.7715167],
                               atol=5e-8)
    # ... and patsy Poly to full precision, with default and with given scores.
    for k in range(2, 8):
        levels = [f"l{i}" for i in range(k)]
        np.testing.assert_allclose(make_coding("f", levels, "polynomial").matrix,
                                   Poly().code_without_intercept(levels).matrix, atol=1e-13)
    np.testing.assert_allclose(make_coding("f", lv3, "polynomial", scores=[1, 2, 4]).matrix,
                               Poly(scores=[1, 2, 4]).code_without_intercept(lv3).matrix, atol=1e-13)


def test_effect_reference_in_the_middle() -> None:
    # Common practice: +1 at the column's level, -1 at the reference (wherever it is), 0 otherwise.
    fc = make_coding("f", ["a", "b", "c"], "effect", reference="b")
    assert fc.labels == ("f=a", "f=c")
    np.testing.assert_array_equal(fc.matrix, [[1, 0], [-1, -1], [0, 1]])
    np.testing.assert_array_equal(fc.matrix, Sum(omit=1).code_without_intercept(["a", "b", "c"]).matrix)  # patsy


# formula in patsy -> (factor codings, intercept, terms) in groupmodel
MODELS = {
    "effect": ("C(A, Sum)*C(B, Sum) + x + C(A, Sum):x + z", {"A": "effect", "B": "effect"}, True,
               ["A*B", "x*A", "z"]),
    "treatment": ("C(A, Treatment)*C(B, Treatment) + x + C(A, Treatment):x + z",
                  {"A": "treatment", "B": "treatment"}, True, ["A*B", "x*A", "z"]),
    "polynomial": ("C(A, Poly)*C(B, Poly) + x + C(A, Poly):x + z", {"A": "polynomial", "B": "polynomial"}, True,
                   ["A*B", "x*A", "z"]),
    "mixed": ("C(A, Poly)*C(B, Sum) + x + C(A, Poly):x + z", {"A": "polynomial", "B": "effect"}, True,
              ["A*B", "x*A", "z"]),
    "cell_means": ("0 + C(A):C(B) + C(A):x + z", {"A": "indicator", "B": "indicator"}, False,
                   ["A:B", "A:x", "z"]),
}


@pytest.mark.parametrize("model", list(MODELS))
@pytest.mark.parametrize("center", ["none", "mean"])
def test_column_space_equals_patsy(model: str, center: str) -> None:
    formula, codings, intercept, terms = MODELS[model]
    frame = random_frame(7)
    spec = {"factors": {f: {"coding": c} for f, c in codings.items()},
            "covariates": {"x": {"center": center}, "z": {"center": center}},
            "intercept": intercept, "terms": terms}
    ours = design_of(frame, spec).matrix
    theirs = np.asarray(patsy.dmatrix(formula, frame))
    # Reference: patsy's design of the same formula spans the same space (equal projections) ...
    assert ours.shape == theirs.shape
    assert np.linalg.matrix_rank(ours) == np.linalg.matrix_rank(theirs) == ours.shape[1]
    np.testing.assert_allclose(projector(ours), projector(theirs), atol=1e-10)
    # ... and without centring it has exactly the same columns, up to their order.
    if center == "none":
        assert same_columns_up_to_order(ours, theirs)


def test_within_centring_and_scaling_are_recorded(tmp_path: Path) -> None:
    frame = random_frame(3)
    frame.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(frame))])
    frame.to_csv(tmp_path / "participants.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "factors": {"A": {}},
            "covariates": {"x": {"center": {"within": "A"}, "scale": "sd"}}, "terms": ["A", "x"]}
    (tmp_path / "model.json").write_text(json.dumps(spec))
    model = build(tmp_path / "model.json")
    x = frame["x"].to_numpy()
    group_means = frame.groupby("A")["x"].mean()
    expected = (x - frame["A"].map(group_means).to_numpy()) / x.std(ddof=1)  # common practice
    np.testing.assert_allclose(model.design.matrix[:, model.design.column_index("x")], expected, atol=1e-12)
    side = model.design_sidecar()["covariates"]["x"]
    assert side["center"] == "within"
    assert side["center_value"] == pytest.approx(group_means.to_dict())
    assert side["scale"] == pytest.approx(x.std(ddof=1))


# ------------------------------------------------------------------------------------------ checks
def test_rank_vif_and_condition_number_equal_references() -> None:
    frame = random_frame(4)
    frame["w"] = (frame["x"] * 0.9 + np.random.default_rng(0).normal(0, 1.5, len(frame))).round(3)
    d = design_of(frame, {"factors": {"A": {}, "B": {}}, "covariates": {"x": {}, "w": {}},
                          "terms": ["A*B", "x", "w"]})
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    x = d.matrix
    assert matrix_rank(x) == np.linalg.matrix_rank(x)  # numpy's default tolerance, as documented
    vif = variance_inflation(x, d.column_names)
    for j, name in enumerate(d.column_names[1:], start=1):
        # Reference: statsmodels variance_inflation_factor (regression on the other columns, intercept included).
        assert vif[name] == pytest.approx(variance_inflation_factor(x, j), rel=1e-9)
    scaled = x / np.linalg.norm(x, axis=0)
    assert condition_number(x) == pytest.approx(np.linalg.cond(scaled), rel=1e-9)  # numpy, unit-length columns
    assert not [f for f in check_design(d) if f.severity == "error"]


def test_build_time_warnings_name_cells_and_columns() -> None:
    frame = pd.DataFrame({
        "A": ["a1"] * 5 + ["a2"] * 5 + ["a3"],
        "B": ["b1", "b2", "b1", "b2", "b1", "b1", "b2", "b1", "b2", "b1", "b1"],
        "x": [20.0, 25, 31, 42, 38, 27, 33, 45, 51, 29, 40],
    })
    d = design_of(frame, {"factors": {"A": {}, "B": {}}, "covariates": {"x": {"center": "none"}},
                          "terms": ["A*B", "A:x"]})
    findings = {f.code: f.message for f in check_design(d)}
    assert "no participant has A=a3, B=b2" in findings["empty_cell"]
    assert "only 1 participant has A=a3, B=b1" in findings["small_cell"]
    assert "x = 0" in findings["uncentred_interaction"] and "A" in findings["uncentred_interaction"]
    assert "equals" in findings["rank_deficient"]
    # Uncentred x entering only through A:x with a large offset: ill conditioned, and said so with the threshold.
    frame2 = random_frame(5)
    frame2["x"] = frame2["x"] + 1000.0
    d2 = design_of(frame2, {"factors": {"A": {}}, "covariates": {"x": {"center": "none"}}, "terms": ["A*x"]})
    warnings = {f.code: f.message for f in check_design(d2)}
    assert condition_number(d2.matrix) > CONDITION_WARN
    assert f"above {CONDITION_WARN:g}" in warnings["ill_conditioned"]
    assert "variance inflation factor" in warnings["high_vif"]


def test_levels_from_the_sidecar_and_exclusions(tmp_path: Path) -> None:
    rows = [("sub-01", "low", "22"), ("sub-02", "high", "n/a"), ("sub-03", "mid", "30"), ("sub-04", "low", "41"),
            ("sub-05", "high", "35"), ("sub-06", "mid", "28"), ("sub-07", "high", "33"), ("sub-08", "low", "26"),
            ("sub-09", "max", "30")]
    pd.DataFrame(rows, columns=["participant_id", "dose", "age"]).to_csv(
        tmp_path / "participants.tsv", sep="\t", index=False)
    # BIDS sidecar: Levels in the order the study means them; "max" is filtered out by include.
    (tmp_path / "participants.json").write_text(json.dumps(
        {"dose": {"Levels": {"low": "5 mg", "mid": "10 mg", "high": "20 mg", "max": "40 mg"}}}))
    spec = {"participants": "participants.tsv", "factors": {"dose": {"coding": "polynomial"}},
            "covariates": {"age": {}}, "terms": ["dose", "age"], "exclude": ["sub-04"],
            "include": {"dose": ["low", "mid", "high"]}}
    (tmp_path / "model.json").write_text(json.dumps(spec))
    model = build(tmp_path / "model.json")
    assert model.design.factors["dose"].levels == ("low", "mid", "high")  # sidecar order, unused level dropped
    assert any("max" in f.message for f in model.findings if f.code == "levels")
    assert model.design.column_names == ["intercept", "dose.linear", "dose.quadratic", "age"]
    excluded = {e["participant_id"]: e["reason"] for e in model.design_sidecar()["excluded"]}
    assert set(excluded) == {"sub-02", "sub-04", "sub-09"}
    assert "age" in excluded["sub-02"] and "exclude" in excluded["sub-04"] and "include" in excluded["sub-09"]
    assert model.design.participant_ids == ["sub-01", "sub-03", "sub-05", "sub-06", "sub-07", "sub-08"]
