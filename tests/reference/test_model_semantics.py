"""Model semantics at the edges: level order from the data, terms without their marginal terms, ``at``.

References, named beside each check: numpy.polyfit of the cell means (trend over levels), statsmodels/patsy
formula fits (patsy codes a term whose marginal term is absent by the marginality rule of Chambers and Hastie
1992, as R's model.matrix does).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from groupmodel.analysis.table_fit import TableFit
from groupmodel.fit import fit_table


def write_study(folder: Path, frame: pd.DataFrame, spec: dict) -> Path:
    """Write ``participants.tsv`` (as given, text) and ``model.json`` into ``folder``; return the spec path."""
    folder.mkdir(parents=True, exist_ok=True)
    frame = frame.copy()
    if "participant_id" not in frame:
        frame.insert(0, "participant_id", [f"sub-{i:05d}" for i in range(len(frame))])
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    (folder / "model.json").write_text(json.dumps({"participants": "participants.tsv", **spec}, indent=1))
    return folder / "model.json"


# ------------------------------------------------------------------------------------------ level order
def test_numeric_levels_from_the_data_sort_numerically(tmp_path: Path) -> None:
    # Doses 7, 10, 25 (not declared): numeric order, so the linear trend follows the dose. Reference:
    # numpy.polyfit of the cell means on the scores 1..3 in numeric order (README: trend estimate = the
    # least-squares slope of the level means per unit of score).
    rng = np.random.default_rng(3)
    dose = np.repeat(["7", "10", "25"], 5)
    y = np.repeat([1.0, 2.0, 4.0], 5) + rng.normal(0, 0.3, 15)
    frame = pd.DataFrame({"dose": dose, "y": y})
    spec = write_study(tmp_path, frame, {
        "factors": {"dose": {"coding": "polynomial"}},
        "terms": ["dose"],
        "hypotheses": {"linear": {"trend": "dose", "degree": 1}},
    })
    fit = fit_table(spec, "y")
    assert fit.model.design.factors["dose"].levels == ("7", "10", "25")
    means = [y[dose == d].mean() for d in ("7", "10", "25")]
    slope = np.polyfit([1.0, 2.0, 3.0], means, 1)[0]
    est = float(fit.table.set_index("hypothesis").loc["linear", "estimate"])
    assert slope > 0 and est > 0
    assert abs(est - slope) < 1e-8 * abs(slope)


def test_mixed_text_levels_stay_in_text_order(tmp_path: Path) -> None:
    # Common practice: one non-numeric value keeps text order for every level.
    frame = pd.DataFrame({"g": ["7", "10", "x25"] * 3, "y": np.arange(9.0)})
    spec = write_study(tmp_path, frame, {"factors": {"g": {}}, "terms": ["g"], "hypotheses": {"g": {"main": "g"}}})
    assert fit_table(spec, "y").model.design.factors["g"].levels == ("10", "7", "x25")


# ------------------------------------------------------------------------------------------ marginality rule
CODINGS = ("effect", "treatment", "polynomial")


def nested_frame(seed: int, n: int = 30) -> pd.DataFrame:
    """Unbalanced data: a (3 levels), b (2 levels, nested within a), covariate age."""
    rng = np.random.default_rng(seed)
    a = np.concatenate([np.repeat(["a1", "a2", "a3"], 2), rng.choice(["a1", "a2", "a3"], n - 6)])
    b = np.concatenate([["b1", "b2"] * 3, rng.choice(["b1", "b2"], n - 6)])
    age = rng.normal(40, 9, n).round(2)
    y = rng.normal(0, 1, n) + (a == "a2") * 0.8 + (b == "b2") * (a == "a1") * 1.1 + 0.03 * age * (a == "a3")
    return pd.DataFrame({"a": a, "b": b, "age": age, "y": y.round(4)})


def fit_coded(tmp_path: Path, frame: pd.DataFrame, terms: list[str], coding: str, hyps: dict) -> TableFit:
    factors = {f: {"coding": coding} for f in ("a", "b") if any(f in t.split(":") for t in terms)}
    spec: dict = {"factors": factors, "terms": terms, "hypotheses": hyps}
    if "age" in " ".join(terms):
        spec["covariates"] = {"age": {}}
    fit = fit_table(write_study(tmp_path / coding, frame, spec), "y")
    return fit


def test_nested_factor_is_coded_fully_within_the_other(tmp_path: Path) -> None:
    # Reference: statsmodels formula fits (patsy applies the marginality rule of R's model.matrix) of
    # y ~ C(a, Sum) + C(a, Sum):C(b, Sum): same column space under every coding, so the same residual df, the
    # same fitted cell means and the same F for main a (anova_lm typ=3 on the sum-coded fit: the unweighted
    # marginal means of a, which are the cell-means hypothesis here).
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    frame = nested_frame(1)
    ref = smf.ols("y ~ C(a, Sum) + C(a, Sum):C(b, Sum)", data=frame).fit()
    ref_f = float(anova_lm(ref, typ=3).loc["C(a, Sum)", "F"])
    hyps = {"main_a": {"main": "a"}}
    for coding in CODINGS:
        fit = fit_coded(tmp_path, frame, ["a", "a:b"], coding, hyps)
        row = fit.table.set_index("hypothesis").loc["main_a"]
        assert fit.result.df_resid == int(ref.df_resid) == 24
        assert abs(float(row["statistic"]) - ref_f) < 1e-8 * ref_f
        assert (int(row["df1"]), int(row["df2"])) == (2, 24)
        d = fit.model.design
        ours = d.matrix @ np.linalg.pinv(d.matrix)
        theirs = ref.model.exog @ np.linalg.pinv(ref.model.exog)
        assert np.allclose(ours, theirs, atol=1e-8)
        beta = np.linalg.lstsq(d.matrix, frame["y"].to_numpy(), rcond=None)[0]
        cells = pd.DataFrame(list(d.cells), columns=["a", "b"])
        assert np.allclose(d.cell_rows() @ beta, ref.predict(cells), atol=1e-8)
        nested = [c for c in d.column_sidecar() if c["term"] == "a:b"]
        assert len(nested) == 3 and all("coded_fully" in c["members"][0] for c in nested)  # a coded fully
        assert all("coded_fully" not in c["members"][1] for c in nested)  # b by its own coding


def test_slope_within_each_level_without_the_covariate_main_effect(tmp_path: Path) -> None:
    # Reference: statsmodels formula fit y ~ C(a) + C(a):age (patsy: one slope per level of a): same column
    # space under every coding; the average slope equals the mean of the per-level slopes (t test on the
    # statsmodels fit with weights 1/3 on the three slopes).
    import statsmodels.formula.api as smf

    frame = nested_frame(2)
    ref = smf.ols("y ~ C(a) + C(a):age", data=frame).fit()
    names = [n for n in ref.params.index if n.endswith(":age")]
    assert len(names) == 3
    tt = ref.t_test(np.array([[1 / 3 if n in names else 0.0 for n in ref.params.index]]))
    hyps = {"age": {"slope": "age"}, "main_a": {"main": "a"}}
    stats = []
    for coding in CODINGS:
        fit = fit_coded(tmp_path, frame, ["a", "a:age"], coding, hyps)
        table = fit.table.set_index("hypothesis")
        assert fit.result.df_resid == int(ref.df_resid)
        assert abs(float(table.loc["age", "estimate"]) - float(tt.effect[0])) < 1e-8
        assert abs(float(table.loc["age", "statistic"]) - float(tt.tvalue[0, 0])) < 1e-7
        d = fit.model.design
        assert np.allclose(d.matrix @ np.linalg.pinv(d.matrix), ref.model.exog @ np.linalg.pinv(ref.model.exog),
                           atol=1e-8)
        stats.append(float(table.loc["main_a", "statistic"]))
    assert np.allclose(stats, stats[0], rtol=1e-8)


def test_random_non_hierarchical_term_sets_span_the_same_columns_under_every_coding() -> None:
    # Property with an outside reference: for random term sets (marginal terms often missing), the column space
    # is the same under effect, treatment and polynomial coding and equals patsy's (marginality rule).
    import patsy

    from groupmodel.model.design import build_design
    from groupmodel.model.spec import spec_from_dict
    from groupmodel.model.table import select_sample

    rng = np.random.default_rng(7)
    pool = ["a", "b", "c", "a:b", "a:c", "b:c", "a:b:c", "x", "a:x", "b:x", "a:b:x"]
    n = 60
    frame = pd.DataFrame({
        "participant_id": [f"sub-{i:03d}" for i in range(n)],
        "a": np.tile(["a1", "a2"], n // 2), "b": np.tile(["b1", "b2", "b3"], n // 3),
        "c": np.repeat(["c1", "c2"], n // 2), "x": rng.normal(0, 1, n).round(3),
    })
    for _ in range(25):
        terms = list(rng.choice(pool, size=int(rng.integers(1, 5)), replace=False))
        intercept = bool(rng.integers(0, 2))
        projectors = []
        for coding in CODINGS:
            used = {m for t in terms for m in t.split(":")}
            raw = {"participants": "participants.tsv", "intercept": intercept, "terms": terms,
                   "factors": {f: {"coding": coding} for f in "abc" if f in used},
                   "covariates": {"x": {"center": "none"}} if "x" in used else {}}
            spec = spec_from_dict(raw, Path("/nonexistent/model.json"))
            d = build_design(spec, select_sample(spec, table=frame.astype(str).astype(object), sidecar_levels={}))
            projectors.append(d.matrix @ np.linalg.pinv(d.matrix))
            assert np.linalg.matrix_rank(d.matrix) == d.matrix.shape[1], (terms, intercept, coding)
        formula = ("1 + " if intercept else "0 + ") + " + ".join(
            ":".join(f"C({m}, Sum)" if m != "x" else "x" for m in t.split(":")) for t in terms)
        theirs = np.asarray(patsy.dmatrix(formula, frame))
        for p in projectors:
            assert np.allclose(p, theirs @ np.linalg.pinv(theirs), atol=1e-8), (terms, intercept)


# ------------------------------------------------------------------------------------------ display of large values
def test_uncentred_large_covariate_vif_and_mean_are_readable(tmp_path: Path) -> None:
    # A covariate near 10^6 with a small spread, uncentred, crossed with a factor: the VIF of a=x is beyond
    # 10^12 (statsmodels' variance_inflation_factor, which regresses each column on the others plus a constant,
    # cannot resolve it in float64 either), so it is shown as "> 1e12" rather than inf; the covariate's mean in
    # the statements keeps its whole part (common practice: a value that can be read back).
    from groupmodel.model.checks import check_design

    rng = np.random.default_rng(0)
    age = (1e6 + 0.123 + rng.normal(0, 0.3, 40)).round(4)
    frame = pd.DataFrame({"a": np.tile(["x", "y"], 20), "age": age, "y": rng.normal(0, 1, 40).round(3)})
    spec = write_study(tmp_path, frame, {
        "factors": {"a": {}}, "covariates": {"age": {"center": "none"}}, "terms": ["a*age"],
        "hypotheses": {"main_a": {"main": "a"}},
    })
    fit = fit_table(spec, "y")
    messages = [f.message for f in check_design(fit.model.design)]
    vif = [m for m in messages if "variance inflation factor" in m and m.startswith("column a=x ")]
    assert vif and "> 1e12" in vif[0] and " inf " not in vif[0]
    statement = fit.model.hypotheses["main_a"].statement
    assert f"age at its mean {int(age.mean())}" in statement, statement
