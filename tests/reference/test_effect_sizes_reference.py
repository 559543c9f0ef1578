"""Effect sizes and confidence intervals against outside references.

References, named beside each check:

* statsmodels ``OLSResults.t_test(L).conf_int(alpha)`` for the interval of every t contrast, with the
  hypothesis written here by hand over the cell means of statsmodels' own cell-means parameterisation
  (``y ~ 0 + C(A):C(B) + x``).
* Cohen's d by direct computation: (mean_1 - mean_2) / pooled SD with numpy (Cohen 1988's d with the pooled
  SD), and the textbook identity d = t sqrt(1/n1 + 1/n2) with t from ``scipy.stats.ttest_ind``.
* statsmodels ``anova_lm(typ=3)`` (Type III, sum-to-zero coding) sums of squares: partial eta squared is
  SS_effect / (SS_effect + SS_resid).
* The noncentral-F interval of partial eta squared (Steiger 2004) against roots found independently here with
  mpmath: the noncentral F cdf summed as a Poisson mixture of regularised incomplete beta functions
  (``mpmath.betainc``) at 30 digits, the root by ``mpmath.findroot`` (Anderson-Bjorck bracketing).
"""

from __future__ import annotations

import json
from pathlib import Path

import mpmath
import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from groupmodel.analysis.table_fit import RESULT_COLUMNS
from groupmodel.engine import effect_sizes as es
from groupmodel.fit import fit_table, write_table_fit


def write_study(folder: Path, frame: pd.DataFrame, spec: dict) -> Path:
    """Write ``participants.tsv`` and ``model.json`` into ``folder``; return the spec path."""
    folder.mkdir(parents=True, exist_ok=True)
    frame = frame.copy()
    frame.insert(0, "participant_id", [f"sub-{i:04d}" for i in range(len(frame))])
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    (folder / "model.json").write_text(json.dumps({"participants": "participants.tsv", **spec}, indent=1))
    return folder / "model.json"


def two_by_three(seed: int = 11) -> pd.DataFrame:
    """Unbalanced 2 x 3 data (A: a1, a2; B: b1..b3) with a covariate x and real effects."""
    rng = np.random.default_rng(seed)
    rows = []
    for i, a in enumerate(("a1", "a2")):
        for j, b in enumerate(("b1", "b2", "b3")):
            n = int(rng.integers(5, 12))
            x = rng.normal(40, 8, n).round(2)
            y = 0.8 * i + 0.5 * j + 0.4 * i * j + 0.03 * x + rng.normal(0, 1.2, n)
            rows += [{"A": a, "B": b, "x": xx, "y": round(float(yy), 5)} for xx, yy in zip(x, y, strict=True)]
    return pd.DataFrame(rows).sample(frac=1.0, random_state=seed).reset_index(drop=True)


#: Hypotheses with their weights over the cells (a1b1, a1b2, a1b3, a2b1, a2b2, a2b3), written by hand.
T_HYPOTHESES = {
    "a2_vs_a1": ({"compare": {"A": ["a2", "a1"]}}, [-1 / 3, -1 / 3, -1 / 3, 1 / 3, 1 / 3, 1 / 3]),
    "b3_vs_b1_at_a2": ({"compare": {"B": ["b3", "b1"]}, "at": {"A": "a2"}}, [0, 0, 0, -1, 0, 1]),
    "b23_vs_b1": ({"compare": {"B": [["b2", "b3"], "b1"]}}, [-0.5, 0.25, 0.25, -0.5, 0.25, 0.25]),
    "mean_a1b2": ({"mean": {"A": "a1", "B": "b2"}}, [0, 1, 0, 0, 0, 0]),
}
CELLS = [("a1", "b1"), ("a1", "b2"), ("a1", "b3"), ("a2", "b1"), ("a2", "b2"), ("a2", "b3")]


def study_spec(hypotheses: dict, covariate: bool = True) -> dict:
    spec = {"factors": {"A": {"coding": "effect"}, "B": {"coding": "effect"}}, "terms": ["A*B"],
            "hypotheses": hypotheses}
    if covariate:
        spec["covariates"] = {"x": {"center": "mean"}}
        spec["terms"] = ["A*B", "x"]
    return spec


def cell_means_fit(frame: pd.DataFrame):
    """statsmodels OLS in the cell-means form, the covariate centred (cell means at the mean x)."""
    data = frame.assign(xc=frame["x"] - frame["x"].mean())
    return smf.ols("y ~ 0 + C(A):C(B) + xc", data=data).fit()


def contrast_over_cells(res, weights: list[float]) -> np.ndarray:
    names = list(res.params.index)
    row = np.zeros(len(names))
    for (a, b), w in zip(CELLS, weights, strict=True):
        row[names.index(f"C(A)[{a}]:C(B)[{b}]")] = w
    return row


# ------------------------------------------------------------------------------------------ t intervals
@pytest.mark.parametrize("level", [0.95, 0.90, 0.99])
def test_t_interval_matches_statsmodels_conf_int(tmp_path: Path, level: float) -> None:
    frame = two_by_three()
    spec = write_study(tmp_path, frame, study_spec({k: v[0] for k, v in T_HYPOTHESES.items()}))
    table = fit_table(spec, "y", ci_level=level).table.set_index("hypothesis")
    res = cell_means_fit(frame)
    for name, (_, weights) in T_HYPOTHESES.items():
        # Reference: statsmodels OLSResults.t_test(L).conf_int(alpha = 1 - level).
        want = res.t_test(contrast_over_cells(res, weights)).conf_int(alpha=1 - level)[0]
        got = table.loc[name, ["ci_lower", "ci_upper"]].to_numpy(dtype=float)
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12, err_msg=name)


def test_t_interval_level_comes_from_the_spec(tmp_path: Path) -> None:
    frame = two_by_three()
    spec = study_spec({"a2_vs_a1": T_HYPOTHESES["a2_vs_a1"][0]})
    path = write_study(tmp_path, frame, {**spec, "inference": {"ci_level": 0.8}})
    fit = fit_table(path, "y")
    row = fit.table.iloc[0]
    res = cell_means_fit(frame)
    # Reference: statsmodels conf_int at alpha 0.2.
    want = res.t_test(contrast_over_cells(res, T_HYPOTHESES["a2_vs_a1"][1])).conf_int(alpha=0.2)[0]
    np.testing.assert_allclose([row["ci_lower"], row["ci_upper"]], want, rtol=1e-9)
    # results.tsv carries the columns (described in results.json, with the level)
    write_table_fit(fit, tmp_path / "out", pictures=False)
    written = pd.read_csv(tmp_path / "out" / "results.tsv", sep="\t")
    assert list(written.columns) == RESULT_COLUMNS
    sidecar = json.loads((tmp_path / "out" / "results.json").read_text())
    assert sidecar["ci_level"] == 0.8 and set(RESULT_COLUMNS[3:]) <= set(sidecar["columns"])


# ------------------------------------------------------------------------------------------ Cohen's d
def test_cohens_d_two_groups_pooled_sd_and_scipy(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    g1, g2 = rng.normal(1.0, 2.0, 14).round(4), rng.normal(0.0, 2.0, 23).round(4)
    frame = pd.DataFrame({"group": ["patient"] * 14 + ["control"] * 23, "y": np.concatenate([g1, g2])})
    spec = write_study(tmp_path, frame, {"factors": {"group": {"coding": "effect"}}, "terms": ["group"],
                                         "hypotheses": {"p_vs_c": {"compare": {"group": ["patient", "control"]}}}})
    d = float(fit_table(spec, "y").table.set_index("hypothesis").loc["p_vs_c", "cohens_d"])
    # Reference: direct computation, (mean1 - mean2) / pooled SD (Cohen 1988's d), with numpy.
    n1, n2 = len(g1), len(g2)
    pooled = np.sqrt(((n1 - 1) * g1.var(ddof=1) + (n2 - 1) * g2.var(ddof=1)) / (n1 + n2 - 2))
    np.testing.assert_allclose(d, (g1.mean() - g2.mean()) / pooled, rtol=1e-10)
    # Reference: scipy.stats.ttest_ind (equal variances) and the textbook identity d = t sqrt(1/n1 + 1/n2).
    t = scipy.stats.ttest_ind(g1, g2).statistic
    np.testing.assert_allclose(d, t * np.sqrt(1 / n1 + 1 / n2), rtol=1e-10)


def test_cohens_d_marginal_comparison_is_effect_over_residual_sd(tmp_path: Path) -> None:
    frame = two_by_three()
    hyps = {k: v[0] for k, v in T_HYPOTHESES.items()}
    hyps |= {"slope_x": {"slope": "x"}, "main_B": {"main": "B"}}
    table = fit_table(write_study(tmp_path, frame, study_spec(hyps)), "y").table.set_index("hypothesis")
    res = cell_means_fit(frame)
    for name in ("a2_vs_a1", "b3_vs_b1_at_a2", "b23_vs_b1"):
        # Reference: statsmodels t_test effect over sqrt(mse_resid).
        effect = float(res.t_test(contrast_over_cells(res, T_HYPOTHESES[name][1])).effect[0])
        np.testing.assert_allclose(table.loc[name, "cohens_d"], effect / np.sqrt(res.mse_resid), rtol=1e-9)
    # a single mean, a slope and an F test are not comparisons of two means: n/a
    assert table.loc[["mean_a1b2", "slope_x", "main_B"], "cohens_d"].isna().all()


@pytest.mark.parametrize(("weights", "two_means"), [
    ([1, -1], True), ([-1, 1, 0, 0], True), ([0.5, 0.5, -1], True), ([0.2, 0.8, -0.5, -0.5], True),
    ([1, 0], False), ([2, -2], False), ([1, -1, -1, 1], False), ([1 / 3, 1 / 3, 1 / 3], False),
    ([[1, -1, 0], [0, 1, -1]], False), (None, False),
])
def test_two_mean_rule(weights: list | None, two_means: bool) -> None:
    # Reference: the rule as documented (weights sum to 0, positive part sums to 1; one row).
    assert es.compares_two_means(None if weights is None else np.array(weights, dtype=float)) is two_means


# ------------------------------------------------------------------------------------------ partial eta^2
def test_partial_eta_squared_matches_anova_lm_type3(tmp_path: Path) -> None:
    frame = two_by_three(seed=3)
    hyps = {"main_A": {"main": "A"}, "main_B": {"main": "B"}, "A_by_B": {"interaction": ["A", "B"]},
            "a2_vs_a1": T_HYPOTHESES["a2_vs_a1"][0]}
    table = fit_table(write_study(tmp_path, frame, study_spec(hyps, covariate=False)), "y")
    table = table.table.set_index("hypothesis")
    # Reference: statsmodels anova_lm(typ=3) with sum-to-zero coding, SS_effect / (SS_effect + SS_resid).
    typ3 = anova_lm(smf.ols("y ~ C(A, Sum) * C(B, Sum)", data=frame).fit(), typ=3)
    ss_resid = typ3.loc["Residual", "sum_sq"]
    for name, row in [("main_A", "C(A, Sum)"), ("main_B", "C(B, Sum)"), ("A_by_B", "C(A, Sum):C(B, Sum)"),
                      ("a2_vs_a1", "C(A, Sum)")]:
        ss = typ3.loc[row, "sum_sq"]
        np.testing.assert_allclose(table.loc[name, "partial_eta_squared"], ss / (ss + ss_resid), rtol=1e-9,
                                   err_msg=name)


# ------------------------------------------------------------------------------------------ noncentral F
def _ncf_cdf_mp(f: mpmath.mpf, d1: int, d2: int, lam: mpmath.mpf) -> mpmath.mpf:
    """P(F' <= f) for the noncentral F: sum_j Poisson(j; lam/2) I_x(d1/2 + j, d2/2), x = d1 f / (d1 f + d2)."""
    x = d1 * f / (d1 * f + d2)
    half = lam / 2
    total, j = mpmath.mpf(0), 0
    weight = mpmath.exp(-half)
    while True:
        term = weight * mpmath.betainc(mpmath.mpf(d1) / 2 + j, mpmath.mpf(d2) / 2, 0, x, regularized=True)
        total += term
        if j > half and term < mpmath.mpf(10) ** -28:
            return total
        j += 1
        weight *= half / j


def _eta_bound_mp(f: float, d1: int, d2: int, prob: float) -> float:
    """The partial eta squared bound for ``P(F' <= f | lam) = prob`` found with mpmath (0 if none)."""
    with mpmath.workdps(30):
        fm, pm = mpmath.mpf(f), mpmath.mpf(prob)
        if _ncf_cdf_mp(fm, d1, d2, mpmath.mpf(0)) <= pm:
            return 0.0
        hi = mpmath.mpf(max(10.0, 2 * d1 * f))
        while _ncf_cdf_mp(fm, d1, d2, hi) > pm:
            hi *= 2
        lam = mpmath.findroot(lambda lm: _ncf_cdf_mp(fm, d1, d2, lm) - pm, (mpmath.mpf(0), hi),
                              solver="anderson")
        return float(lam / (lam + d1 + d2 + 1))


@pytest.mark.parametrize(("f", "d1", "d2", "level"), [
    (35.48, 2, 51, 0.95), (8.37 ** 2, 1, 51, 0.95), (5.0, 3, 20, 0.95), (2.5, 4, 100, 0.90),
    (1.2, 2, 51, 0.95), (4.2, 1, 12, 0.99), (0.004, 1, 30, 0.95),
])
def test_partial_eta_squared_interval_matches_mpmath_roots(f: float, d1: int, d2: int, level: float) -> None:
    alpha = 1 - level
    # Reference: mpmath root finding on the noncentral F cdf written as a Poisson mixture (see module doc).
    want = [_eta_bound_mp(f, d1, d2, 1 - alpha / 2), _eta_bound_mp(f, d1, d2, alpha / 2)]
    for grid in (False, True):
        got = es.partial_eta_squared_interval(np.array([f]), d1, d2, level, grid=grid)
        np.testing.assert_allclose([got.lower[0], got.upper[0]], want, rtol=1e-7, atol=1e-9,
                                   err_msg=f"grid={grid}")


@pytest.mark.parametrize(("d1", "d2"), [(1, 5), (1, 51), (2, 17), (4, 120), (9, 30), (1, 2000)])
def test_grid_interval_agrees_with_direct_root_finding(d1: int, d2: int) -> None:
    # Reference: scipy.optimize.brentq on scipy.special.ncfdtr for every value (the method the grid stands for).
    rng = np.random.default_rng(d1 * 1000 + d2)
    f = np.concatenate([rng.exponential(2.0, 300), rng.exponential(200.0, 100), [0.0, 1e-9, 5e6, np.nan]])
    for level in (0.95, 0.9):
        grid = es.partial_eta_squared_interval(f, d1, d2, level, grid=True)
        direct = es.partial_eta_squared_interval(f, d1, d2, level, grid=False)
        np.testing.assert_allclose(grid.lower, direct.lower, rtol=0, atol=1e-8)
        np.testing.assert_allclose(grid.upper, direct.upper, rtol=0, atol=1e-8)
    assert np.isnan(grid.lower[-1]) and np.isnan(grid.upper[-1])


def test_interval_contains_the_estimate_and_widens_with_level() -> None:
    # Reference: properties of any confidence interval of a monotone parameter (bounds ordered, nested levels).
    f = np.array([0.3, 1.0, 3.0, 10.0, 60.0])
    eta = es.partial_eta_squared(f, 2, 40)
    narrow = es.partial_eta_squared_interval(f, 2, 40, 0.8)
    wide = es.partial_eta_squared_interval(f, 2, 40, 0.99)
    assert np.all(wide.lower <= narrow.lower) and np.all(narrow.upper <= wide.upper)
    assert np.all(narrow.lower[2:] <= eta[2:]) and np.all(eta <= narrow.upper)


def test_per_voxel_df_equal_one_call_per_df() -> None:
    # Reference: the scalar-df direct root finding (brentq) at each voxel's df, e.g. approximate (Welch) df.
    f = np.array([0.5, 4.0, 12.0, np.nan, 40.0])
    df2 = np.array([9.5, 20.0, 33.3, 12.0, 7.25])
    got = es.partial_eta_squared_interval(f, 2, df2, 0.95)
    for i in range(len(f)):
        one = es.partial_eta_squared_interval(f[i:i + 1], 2, float(df2[i]), 0.95, grid=False)
        np.testing.assert_allclose([got.lower[i], got.upper[i]], [one.lower[0], one.upper[0]], rtol=1e-12)


def test_extreme_f_values_give_finite_bounds_below_one() -> None:
    # Reference: lambda / (lambda + N) lies in [0, 1] for every finite lambda >= 0 (definition; 1 by rounding).
    f = np.array([1e-300, 1e-8, 1e7, 1e12, 1e30])
    for grid in (True, False):
        got = es.partial_eta_squared_interval(f, 1, 40, 0.95, grid=grid)
        assert np.all(np.isfinite(got.lower)) and np.all(np.isfinite(got.upper))
        assert np.all((got.lower >= 0) & (got.lower <= got.upper) & (got.upper <= 1))


@pytest.mark.parametrize(("d1", "d2"), [(1, 3), (1, 40), (3, 10), (20, 200)])
def test_large_noncentrality_limit_joins_root_finding(d1: int, d2: int) -> None:
    # Reference: scipy.optimize.brentq on scipy.special.ncfdtr at lambda ~ 1e7, where both still hold; the limit
    # lambda = df1 F chi2.isf(prob, df2) / df2 takes over above df1 F = 1e8 (its error falls as 1 / F: 10x
    # smaller there than here).
    f = 1e7 / d1
    for prob in (0.975, 0.025):
        direct = es.noncentrality_bound(np.array([f]), d1, d2, prob, grid=False)[0]
        limit = d1 * f * scipy.stats.chi2.isf(prob, d2) / d2
        n = d1 + d2 + 1
        assert abs(direct / (direct + n) - limit / (limit + n)) < 5e-10
