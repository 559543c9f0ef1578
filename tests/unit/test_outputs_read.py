"""Outputs a person reads: round-off noise, tail labels, trend units, statements, sidecar weights.

References: exact fractions (fractions.Fraction) for the written weights; numpy.polyfit for the least-squares
slope of cell means; statsmodels OLS t_test for the t and p of a trend; common practice for the name of an
F test's single (upper) rejection region.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from groupmodel import build
from groupmodel.outputs.numbers import tidy

# A design whose arithmetic leaves round-off noise: polynomial coding (its middle linear value is 1.7e-16),
# an F test and a grand mean over effect-coded columns.
NOISY_HYPOTHESES = {
    "lin": {"trend": "dose"},
    "dose": {"main": "dose"},
    "grand": {"mean": {}},
    "grand_obs": {"mean": {}, "marginal": "observed"},
    "raw": {"weights": {"dose.linear": 1, "sex=f": 0.5}},
}


def write_study(folder: Path, frame: pd.DataFrame, spec: dict) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    frame = frame.copy()
    frame.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(frame))])
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    (folder / "model.json").write_text(json.dumps({"participants": "participants.tsv", **spec}))
    return folder / "model.json"


def dose_frame(n: int = 30, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"dose": rng.choice(["d0", "d50", "d100"], n), "sex": rng.choice(["f", "m"], n),
                         "age": np.round(rng.normal(30, 5, n), 2), "y": rng.normal(0, 1, n)})


def noisy_spec(folder: Path) -> Path:
    spec = {"factors": {"dose": {"levels": ["d0", "d50", "d100"], "scores": [0, 50, 100], "coding": "polynomial"},
                        "sex": {"coding": "effect"}},
            "covariates": {"age": {"center": "mean"}}, "terms": ["dose*sex", "age"],
            "hypotheses": NOISY_HYPOTHESES}
    return write_study(folder, dose_frame(), spec)


# --------------------------------------------------------------------------------------------------
# Round-off noise
# --------------------------------------------------------------------------------------------------
def test_tidy_snaps_noise_to_simple_fractions_only() -> None:
    # Reference: exact fractions (fractions.Fraction); 1e-12 of the row's largest |value| is round-off.
    row = np.array([0.9999999999999999, -2.2e-17, 1.11e-16, -0.0, 1 / 3 + 4e-17, 0.1 + 0.2, math.sqrt(2), 0.123457])
    got = tidy(row)
    assert got.tolist() == [1.0, 0.0, 0.0, 0.0, 1 / 3, 0.3, math.sqrt(2), 0.123457]
    assert not np.signbit(got[1:4]).any()  # no -0.0
    # the scale is each row's (axis=1) or each column's (axis=0): 1e-14 is noise beside 1 but not beside 1e-13
    m = np.array([[1.0, 1e-14], [1e-13, 1e-14]])
    assert tidy(m, axis=1).tolist() == [[1.0, 0.0], [1e-13, 1e-14]]
    assert tidy(m, axis=0).tolist() == [[1.0, 1e-14], [0.0, 1e-14]]
    assert np.isnan(tidy([np.nan, 1.0])[0])


def test_tidy_agrees_with_fractions_limit_denominator() -> None:
    # Reference: fractions.Fraction(x).limit_denominator(1000), kept when within 1e-12 x the largest |value|.
    from fractions import Fraction

    rng = np.random.default_rng(11)
    b, a = rng.integers(1, 1001, 20000), rng.integers(-3000, 3000, 20000)
    x = np.concatenate([a / b * (1 + rng.choice([0, 1e-16, -2.2e-16, 3e-13, 1e-11], b.size)), rng.normal(size=2000)])
    tol = 1e-12 * np.abs(x).max()

    def snap(v: float) -> float:
        near = float(Fraction(v).limit_denominator(1000))
        return (near if abs(v - near) <= tol else v) + 0.0

    assert tidy(x).tolist() == [snap(float(v)) for v in x]


def _numbers(obj: object) -> list[float]:
    if isinstance(obj, dict):
        return [x for v in obj.values() for x in _numbers(v)]
    if isinstance(obj, list):
        return [x for v in obj for x in _numbers(v)]
    return [float(obj)] if isinstance(obj, float) else []


def test_written_weights_and_design_values_carry_no_round_off(tmp_path: Path) -> None:
    # Reference: the exact values (0, 1, +-1/2, cell-count fractions) that the arithmetic only approximates.
    model = build(noisy_spec(tmp_path / "study"))
    assert np.abs(model.design.matrix[np.abs(model.design.matrix) < 1e-12]).max() > 0  # the noise is there
    model.write(tmp_path / "out")
    design_text = (tmp_path / "out" / "design.tsv").read_text()
    contrasts_text = (tmp_path / "out" / "contrasts.tsv").read_text()
    for text in (design_text, contrasts_text):
        assert "e-1" not in text and "-0.0\t" not in text and "-0.0\n" not in text and "99999999" not in text
    contrasts = pd.read_csv(tmp_path / "out" / "contrasts.tsv", sep="\t").set_index("hypothesis")
    assert contrasts.loc["grand"].drop("row").tolist() == [1.0, 0, 0, 0, 0, 0, 0]
    for name in ("contrasts.json", "design.json"):
        doc = json.loads((tmp_path / "out" / name).read_text())
        doc.pop("singular_values", None)
        doc.pop("condition_number", None)
        doc.pop("variance_inflation", None)
        doc.pop("covariates", None)
        tiny = [x for x in _numbers(doc) if 0 < abs(x) < 1e-12]
        assert not tiny, (name, tiny)
        assert not [x for x in _numbers(doc) if x == 0 and math.copysign(1, x) < 0], name
    cells = json.loads((tmp_path / "out" / "contrasts.json").read_text())["hypotheses"]["raw"]["weights_over_cells"]
    assert all(abs(w) > 1e-12 for c in cells for w in c["weight"])
    # the fit's arithmetic is untouched
    assert np.abs(model.hypotheses["grand"].weights[0, 1:]).max() > 0


# --------------------------------------------------------------------------------------------------
# The tail of an F test
# --------------------------------------------------------------------------------------------------
def test_f_tests_are_labelled_upper_and_keep_their_p(tmp_path: Path) -> None:
    # Reference: common practice (an F test has one rejection region, large F); scipy.stats.f.sf for its p.
    from scipy import stats

    from groupmodel.fit import fit_table, write_table_fit

    fit = fit_table(noisy_spec(tmp_path / "study"), "y")
    table = fit.table.set_index("hypothesis")
    assert table.loc["dose", "tail"] == "upper" and table.loc["lin", "tail"] == "two-sided"
    dose = table.loc["dose"]
    assert dose["p"] == pytest.approx(stats.f.sf(dose["statistic"], dose["df1"], dose["df2"]), rel=1e-12)
    assert "upper" in fit.format() and fit.model.hypotheses["dose"].tail == "upper"
    write_table_fit(fit, tmp_path / "out")
    written = pd.read_csv(tmp_path / "out" / "results.tsv", sep="\t").set_index("hypothesis")
    assert written.loc["dose", "tail"] == "upper"
    sidecar = json.loads((tmp_path / "out" / "results.json").read_text())["hypotheses"]
    assert sidecar["dose"]["tail"] == "upper" and sidecar["raw"]["tail"] == "two-sided"
    contrasts = json.loads((tmp_path / "out" / "contrasts.json").read_text())["hypotheses"]
    assert contrasts["dose"]["tail"] == "upper"


def test_a_tail_on_several_rows_of_weights_is_refused(tmp_path: Path) -> None:
    spec = noisy_spec(tmp_path / "study")
    body = json.loads(spec.read_text())
    body["hypotheses"] = {"two_rows": {"weights": [{"dose.linear": 1}, {"dose.quadratic": 1}], "tail": "greater"}}
    spec.write_text(json.dumps(body))
    from groupmodel.errors import SpecError

    with pytest.raises(SpecError, match=r"\$\.hypotheses\.two_rows\.tail: .*F test.*remove 'tail'"):
        build(spec)


# --------------------------------------------------------------------------------------------------
# Trends in units of the scores
# --------------------------------------------------------------------------------------------------
def test_trend_estimates_are_in_units_of_the_scores(tmp_path: Path) -> None:
    # Reference: numpy.polyfit of the estimated level means over the scores (the slope per unit of score for
    # degree 1, the score**d coefficient of the degree-d fit otherwise); statsmodels OLS t_test of the
    # orthonormal polynomial contrast (patsy Poly, as R contr.poly) for t and p, which the scaling leaves alone.
    import patsy
    import statsmodels.formula.api as smf
    from scipy import stats

    from groupmodel.fit import fit_table

    rng = np.random.default_rng(5)
    levels, scores = ["h0", "h1", "h3", "h7"], [0, 1, 3, 7]
    dose = np.repeat(levels, [5, 8, 6, 9])
    frame = pd.DataFrame({"hours": dose, "y": rng.normal(0, 1, dose.size) + 0.3 * np.repeat(scores, [5, 8, 6, 9])})
    hyps = {"linear": {"trend": "hours"}, "quadratic": {"trend": "hours", "degree": 2},
            "cubic": {"trend": "hours", "degree": 3, "tail": "less"}}
    means = frame.groupby("hours")["y"].mean()[levels].to_numpy()
    res = smf.ols(f"y ~ C(hours, levels={levels!r})", frame).fit()
    poly = patsy.contrasts.Poly(scores=scores).code_without_intercept(levels).matrix
    cells = np.column_stack([np.ones(4), np.vstack([np.zeros(3), np.eye(3)])])  # treatment rows of the 4 cells
    for coding in ("effect", "polynomial", "treatment"):
        spec = {"factors": {"hours": {"levels": levels, "scores": scores, "coding": coding}}, "terms": ["hours"],
                "hypotheses": hyps}
        table = fit_table(write_study(tmp_path / coding, frame, spec), "y").table.set_index("hypothesis")
        for degree, name in enumerate(hyps, start=1):
            assert table.loc[name, "estimate"] == pytest.approx(np.polyfit(scores, means, degree)[0], rel=1e-10)
            ref = res.t_test(poly[:, degree - 1] @ cells)
            t = float(np.squeeze(ref.tvalue))
            p = stats.t.cdf(t, res.df_resid) if name == "cubic" else float(np.squeeze(ref.pvalue))
            assert table.loc[name, "statistic"] == pytest.approx(t, rel=1e-10)
            assert table.loc[name, "p"] == pytest.approx(p, rel=1e-9)
            se = float(np.squeeze(ref.sd)) * table.loc[name, "estimate"] / float(np.squeeze(ref.effect))
            assert table.loc[name, "se"] == pytest.approx(se, rel=1e-10)


def test_trend_statement_says_its_units(tmp_path: Path) -> None:
    model = build(noisy_spec(tmp_path / "study"))
    assert model.hypotheses["lin"].statement.startswith(
        "linear trend over dose scores [0, 50, 100], the least-squares slope of the dose means per unit of score: "
        "-0.01 mean(dose=d0) + 0.01 mean(dose=d100) = 0")


# --------------------------------------------------------------------------------------------------
# The grand mean in words
# --------------------------------------------------------------------------------------------------
def test_grand_mean_is_called_mean_over_participants_only_when_it_is(tmp_path: Path) -> None:
    # Reference: the definition (each participant weighted equally = each cell weighted by its count).
    frame = dose_frame()
    one = build(write_study(tmp_path / "one", frame, {"terms": [], "hypotheses": {"m": {"mean": {}}}}))
    assert one.hypotheses["m"].statement == "mean over participants = 0"
    model = build(noisy_spec(tmp_path / "study"))
    counts = model.design.cell_counts
    assert np.allclose(model.hypotheses["grand_obs"].cell_weights[0], counts / counts.sum())
    assert model.hypotheses["grand_obs"].statement == "mean over participants = 0; age at its mean 29.58"
    # equal weights over unbalanced cells are not the mean over participants: the old wording stays
    assert len(set(counts)) > 1
    assert model.hypotheses["grand"].statement.startswith("mean of all cells = 0, averaged equally over dose x sex")
    balanced = pd.DataFrame({"g": ["a", "b"] * 6, "y": np.arange(12.0)})
    eq = build(write_study(tmp_path / "bal", balanced, {"factors": {"g": {}}, "terms": ["g"], "hypotheses": {
        "m": {"mean": {}}, "in_a": {"mean": {}, "at": {"g": "a"}}}}))
    assert eq.hypotheses["m"].statement == "mean over participants = 0"
    assert eq.hypotheses["in_a"].statement == "mean over participants = 0, at g=a"


# --------------------------------------------------------------------------------------------------
# A voxelwise fit: sidecars, summary and cluster tables
# --------------------------------------------------------------------------------------------------
def test_voxel_fit_files_read_right(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Reference: contrasts.json (the weights over cells a map's sidecar repeats); common practice for the
    # upper tail of F; the image affine for the peak's voxel indices and mm coordinates.
    import nibabel as nib

    from groupmodel.cli import main

    rng = np.random.default_rng(8)
    affine = np.array([[2.0, 0, 0, -10], [0, 2.0, 0, -8], [0, 0, 2.0, -4], [0, 0, 0, 1]])
    frame = dose_frame(n=24, seed=8)
    (tmp_path / "study" / "maps").mkdir(parents=True)
    for i, dose in enumerate(frame["dose"]):
        vol = rng.normal(0, 1, (7, 6, 5))
        vol[1:4, 1:4, 1:3] += 3.0 * (dose == "d100")
        nib.save(nib.Nifti1Image(vol.astype(np.float32), affine), tmp_path / "study" / "maps" / f"sub-{i:03d}.nii.gz")
    spec = noisy_spec(tmp_path / "study")
    body = json.loads(spec.read_text())
    body["participants"] = "participants.tsv"
    body["images"] = "maps/{participant_id}.nii.gz"
    frame.insert(0, "participant_id", [f"sub-{i:03d}" for i in range(len(frame))])
    frame.to_csv(tmp_path / "study" / "participants.tsv", sep="\t", index=False)
    spec.write_text(json.dumps(body))
    out = tmp_path / "out"
    assert main(["fit", str(spec), "--out", str(out), "--permutations", "40", "--seed", "1"]) == 0
    printed = capsys.readouterr().out
    summary = pd.read_csv(out / "summary.tsv", sep="\t").set_index("hypothesis")
    assert summary.loc["dose", "tail"] == "upper" and summary.loc["lin", "tail"] == "two-sided"
    assert "dose    F     upper" in printed
    contrasts = json.loads((out / "contrasts.json").read_text())["hypotheses"]
    for name, stat in (("dose", "F"), ("dose", "p_fwe"), ("lin", "effect"), ("raw", "t")):
        side = json.loads((out / "hypotheses" / name / f"{stat}.json").read_text())
        assert side["weights_over_cells"] == contrasts[name]["weights_over_cells"], (name, stat)
        assert side["weights"] == contrasts[name]["weights"]
        assert side["tail"] == contrasts[name]["tail"]
    assert json.loads((out / "hypotheses/dose/F.json").read_text())["tail"] == "upper"
    table = pd.read_csv(out / "hypotheses/dose/clusters_voxel_fwe.tsv", sep="\t")
    assert table.columns.tolist() == ["cluster", "sign", "size", "peak_stat", "peak_index", "peak_i", "peak_j",
                                      "peak_k", "peak_x_mm", "peak_y_mm", "peak_z_mm", "com_x_mm", "com_y_mm",
                                      "com_z_mm", "p_fwe"]
    assert len(table) >= 1
    ijk = table.loc[0, ["peak_i", "peak_j", "peak_k"]].to_numpy(int)
    assert np.allclose(affine[:3, :3] @ ijk + affine[:3, 3], table.loc[0, ["peak_x_mm", "peak_y_mm", "peak_z_mm"]])
    f_map = np.asanyarray(nib.load(out / "hypotheses/dose/F.nii.gz").dataobj)
    assert f_map[tuple(ijk)] == pytest.approx(table.loc[0, "peak_stat"], rel=1e-6)
    columns = json.loads((out / "hypotheses/dose/clusters_voxel_fwe.json").read_text())["columns"]
    assert "peak_i, peak_j, peak_k" in columns and "peak_x_mm, peak_y_mm, peak_z_mm" in columns
