"""Table fits with ``variance_groups`` (``groupmodel.fit_table``) against scipy, and the unequal-variance finding.

References: ``scipy.stats.ttest_ind(equal_var=False)`` (Welch's t test), ``scipy.stats.f_oneway(equal_var=False)``
(Welch's 1951 ANOVA, scipy >= 1.15), ``scipy.stats.levene`` (the check named in the finding).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from groupmodel.fit import fit_table
from groupmodel.outputs.fit_files import write_table_fit

SIZES = {"control": 40, "patient": 10, "relative": 15}
SDS = {"control": 1.0, "patient": 3.0, "relative": 1.5}


def _study(root: Path, variance_groups: str | None = "group") -> Path:
    rng = np.random.default_rng(7)
    groups = np.repeat(list(SIZES), list(SIZES.values()))
    score = np.array([rng.normal(0.2 if g == "patient" else 0.0, SDS[g]) for g in groups])
    ids = [f"sub-{i + 1:03d}" for i in range(groups.size)]
    pd.DataFrame({"participant_id": ids, "group": groups, "score": np.round(score, 6)}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    spec = {
        "participants": "participants.tsv",
        "factors": {"group": {"levels": list(SIZES)}},
        "terms": ["group"],
        "hypotheses": {
            "patient_vs_control": {"compare": {"group": ["patient", "control"]}},
            "patient_gt_control": {"compare": {"group": ["patient", "control"]}, "tail": "greater"},
            "group": {"main": "group"},
        },
    }
    if variance_groups is not None:
        spec["variance_groups"] = variance_groups
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


def _samples(root: Path) -> dict[str, np.ndarray]:
    table = pd.read_csv(root / "participants.tsv", sep="\t")
    return {g: table.loc[table.group == g, "score"].to_numpy(float) for g in SIZES}


def test_table_fit_matches_scipy_welch(tmp_path: Path) -> None:
    fit = fit_table(_study(tmp_path), "score")
    s = _samples(tmp_path)
    row = fit.table.set_index("hypothesis")
    ref = stats.ttest_ind(s["patient"], s["control"], equal_var=False)  # Welch's t test
    va, vb = s["patient"].var(ddof=1) / 10, s["control"].var(ddof=1) / 40
    df_ws = (va + vb) ** 2 / (va**2 / 9 + vb**2 / 39)  # Welch-Satterthwaite, written out
    np.testing.assert_allclose(row.loc["patient_vs_control", "statistic"], ref.statistic, rtol=1e-9)
    np.testing.assert_allclose(row.loc["patient_vs_control", "p"], ref.pvalue, rtol=1e-8)
    np.testing.assert_allclose(row.loc["patient_vs_control", "df2"], df_ws, rtol=1e-9)
    one = stats.ttest_ind(s["patient"], s["control"], equal_var=False, alternative="greater")
    np.testing.assert_allclose(row.loc["patient_gt_control", "p"], one.pvalue, rtol=1e-8)
    anova = stats.f_oneway(*s.values(), equal_var=False)  # Welch (1951)
    np.testing.assert_allclose(row.loc["group", "statistic"], anova.statistic, rtol=1e-9)
    np.testing.assert_allclose(row.loc["group", "p"], anova.pvalue, rtol=1e-8)
    assert fit.variance_groups["factor"] == "group"
    assert fit.variance_groups["statistic"] == {"t tests": "v", "F tests": "G"}
    assert not [f for f in fit.model.findings if f.code == "unequal_variances"]  # handled: no warning
    write_table_fit(fit, tmp_path / "out", pictures=False)
    side = json.loads((tmp_path / "out" / "results.json").read_text())
    assert side["variance_groups"]["groups"] == SIZES
    written = pd.read_csv(tmp_path / "out" / "results.tsv", sep="\t").set_index("hypothesis")
    np.testing.assert_allclose(written.loc["patient_vs_control", "df2"], df_ws, rtol=1e-6)


def test_pooled_fit_warns_with_levene(tmp_path: Path) -> None:
    fit = fit_table(_study(tmp_path, variance_groups=None), "score")
    s = _samples(tmp_path)
    found = [f.message for f in fit.model.findings if f.code == "unequal_variances"]
    assert len(found) == 1 and '"variance_groups": "group"' in found[0]
    # a one-way design's residuals are the data minus the group means; Levene's test is location-invariant per group
    p = stats.levene(*s.values(), center="median").pvalue
    assert f"p = {p:.4g}" in found[0], (found[0], p)
    ratio = s["patient"].var(ddof=1) / s["control"].var(ddof=1)
    assert f"differ by a factor of {ratio:.4g}" in found[0]
    row = fit.table.set_index("hypothesis")
    # the pooled fit is unchanged: one residual variance over the three groups (written out)
    s2 = sum((x.size - 1) * x.var(ddof=1) for x in s.values()) / 62
    pooled_t = (s["patient"].mean() - s["control"].mean()) / np.sqrt(s2 * (1 / 10 + 1 / 40))
    np.testing.assert_allclose(row.loc["patient_vs_control", "statistic"], pooled_t, rtol=1e-9)
    assert row.loc["patient_vs_control", "df2"] == 62


@pytest.mark.parametrize("value, fragment", [("score", "expected a factor of the model"),
                                             ("nope", "expected a factor of the model")])
def test_variance_groups_must_be_a_model_factor(tmp_path: Path, value: str, fragment: str) -> None:
    from groupmodel.errors import SpecError
    from groupmodel.model.spec import load_spec

    with pytest.raises(SpecError, match=r"\$\.variance_groups: " + fragment):
        load_spec(_study(tmp_path, variance_groups=value))


def test_v_and_g_do_not_depend_on_the_coding(tmp_path: Path) -> None:
    """The same hypotheses under effect and treatment coding, with a covariate: the same v, G and df2."""
    spec_path = _study(tmp_path)
    table = pd.read_csv(tmp_path / "participants.tsv", sep="\t")
    table["age"] = np.round(np.random.default_rng(1).uniform(20, 60, len(table)), 1)
    table.to_csv(tmp_path / "participants.tsv", sep="\t", index=False)
    fits = []
    for coding in ("effect", "treatment"):
        spec = json.loads(spec_path.read_text())
        spec["factors"]["group"]["coding"] = coding
        spec["covariates"] = {"age": {"center": "mean"}}
        spec["terms"] = ["group", "age"]
        spec["hypotheses"]["age"] = {"slope": "age"}
        path = tmp_path / f"{coding}.json"
        path.write_text(json.dumps(spec))
        fits.append(fit_table(path, "score").table.set_index("hypothesis"))
    for col in ("statistic", "df2", "p", "estimate"):
        np.testing.assert_allclose(fits[0][col].to_numpy(float), fits[1][col].to_numpy(float), rtol=1e-9,
                                   equal_nan=True)
    assert np.all(fits[0]["df2"] % 1 != 0)  # approximate df: not whole numbers


def test_welch_interval_matches_scipy_confidence_interval(tmp_path: Path) -> None:
    """With variance groups a t hypothesis keeps its interval: L b -/+ t(1 - alpha/2; Welch df) x Welch se, the
    interval of scipy's Welch test (``ttest_ind(equal_var=False).confidence_interval``); the standardized
    effects (one residual SD, a pooled F) stay n/a."""
    fit = fit_table(_study(tmp_path), "score", ci_level=0.9)
    s = _samples(tmp_path)
    ref = stats.ttest_ind(s["patient"], s["control"], equal_var=False).confidence_interval(0.9)
    row = fit.table.set_index("hypothesis")
    np.testing.assert_allclose(row.loc["patient_vs_control", ["ci_lower", "ci_upper"]].to_numpy(float),
                               [ref.low, ref.high], rtol=1e-9)
    one_sided = row.loc["patient_gt_control"]  # two-sided also for a one-sided test, as without variance groups
    np.testing.assert_allclose([one_sided.ci_lower, one_sided.ci_upper], [ref.low, ref.high], rtol=1e-9)
    assert np.isnan(row.loc["group", "ci_lower"]) and np.isnan(row.loc["patient_vs_control", "cohens_d"])
    assert np.isnan(row.loc["patient_vs_control", "partial_eta_squared"])
    write_table_fit(fit, tmp_path / "out", pictures=False)
    written = pd.read_csv(tmp_path / "out" / "results.tsv", sep="\t").set_index("hypothesis")
    np.testing.assert_allclose(written.loc["patient_vs_control", "ci_upper"], ref.high, rtol=1e-6)
