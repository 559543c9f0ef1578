"""Within-participant factors (error strata) against references outside the project.

References, named beside each check:

* ``scipy.stats.ttest_rel`` for the paired t (one within factor with two levels).
* ``statsmodels.stats.anova.AnovaRM`` for two within factors (main effects and their interaction F).
* ``scipy.stats.f_oneway`` on participant averages for the between-participant F of a split-plot design, and the
  classical split-plot sums of squares (subjects within groups, session x subjects within groups) computed here
  with numpy from cell and marginal means, for the within and between-by-within F.
* Greenhouse-Geisser epsilon from Box's (1954) formula on the double-centred k x k covariance matrix of the
  repeated measures, as used by Greenhouse and Geisser (1959); the Huynh and Feldt (1976) epsilon for one group,
  ``(n (k-1) e - 2) / ((k-1) (n - 1 - (k-1) e))`` (formula from memory); bounds 1/(k-1) <= e <= 1; e = 1 for
  two levels.
* statsmodels OLS on all images in one model (the naive approach) for a between-participant F that differs.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.anova import AnovaRM

from groupmodel.analysis.table_fit import fit_table


def write_study(folder: Path, people: pd.DataFrame, obs: pd.DataFrame, spec: dict) -> Path:
    """participants.tsv, observations.tsv and model.json in ``folder``; returns the spec path."""
    people.to_csv(folder / "participants.tsv", sep="\t", index=False)
    obs.to_csv(folder / "observations.tsv", sep="\t", index=False, na_rep="n/a")
    path = folder / "model.json"
    path.write_text(json.dumps({"participants": "participants.tsv", "observations": "observations.tsv", **spec}))
    return path


def row(fit, name: str) -> pd.Series:
    return fit.table.set_index("hypothesis").loc[name]


def two_within(seed: int = 3, n: int = 12) -> pd.DataFrame:
    """Balanced invented data: every participant in every cell of A (3 levels) x B (2 levels)."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n):
        person = rng.normal(0, 2)
        for ai, a in enumerate(["a1", "a2", "a3"]):
            for bi, b in enumerate(["b1", "b2"]):
                y = 10 + person + 0.8 * ai - 0.6 * bi + 0.7 * ai * bi + rng.normal(0, 1 + 0.5 * ai)
                records.append({"participant_id": f"sub-{i:02d}", "A": a, "B": b, "y": round(y, 6)})
    return pd.DataFrame(records)


def split_plot(seed: int = 5, per_group: tuple[int, ...] = (5, 6, 7), k: int = 3) -> pd.DataFrame:
    """Invented split-plot data: group (3 levels, unequal sizes) between, session (k levels) within."""
    rng = np.random.default_rng(seed)
    records, pid = [], 0
    for g, size in enumerate(per_group):
        for _ in range(size):
            person = rng.normal(0, 3)
            for s in range(k):
                y = 50 + 2 * g + person + 1.5 * s + 1.0 * g * s + rng.normal(0, 1 + 0.4 * s)
                records.append({"participant_id": f"sub-{pid:02d}", "group": f"g{g}", "session": f"s{s}",
                                "y": round(y, 6)})
            pid += 1
    return pd.DataFrame(records)


def people_of(frame: pd.DataFrame, cols: list[str]) -> pd.DataFrame:
    return frame.drop_duplicates("participant_id")[["participant_id", *cols]]


# ---------------------------------------------------------------------------------------------------------
def test_paired_t_equals_scipy_ttest_rel(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    pre = rng.normal(10, 2, 15)
    post = pre + rng.normal(0.7, 1.1, 15)
    ids = [f"sub-{i:02d}" for i in range(15)]
    obs = pd.DataFrame({"participant_id": ids * 2, "session": ["pre"] * 15 + ["post"] * 15,
                        "y": np.concatenate([pre, post])})
    spec = write_study(tmp_path, pd.DataFrame({"participant_id": ids}), obs, {
        "factors": {"session": {"within": True, "levels": ["pre", "post"]}}, "terms": ["session"],
        "hypotheses": {"gain": {"compare": {"session": ["post", "pre"]}},
                       "gain_greater": {"compare": {"session": ["post", "pre"]}, "tail": "greater"}}})
    fit = fit_table(spec, "y")
    ref = stats.ttest_rel(post, pre)  # scipy.stats.ttest_rel
    r = row(fit, "gain")
    assert r["stratum"] == "within"
    np.testing.assert_allclose(r["statistic"], ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(r["p"], ref.pvalue, rtol=1e-8)
    np.testing.assert_allclose(r["estimate"], np.mean(post - pre), rtol=1e-12)
    assert r["df2"] == 14
    one = stats.ttest_rel(post, pre, alternative="greater")
    np.testing.assert_allclose(row(fit, "gain_greater")["p"], one.pvalue, rtol=1e-8)


def test_two_within_factors_equal_statsmodels_anovarm(tmp_path: Path) -> None:
    data = two_within()
    spec = write_study(tmp_path, people_of(data, []), data, {
        "factors": {"A": {"within": True}, "B": {"within": True}}, "terms": ["A*B"],
        "hypotheses": {"A": {"main": "A"}, "B": {"main": "B"}, "AxB": {"interaction": ["A", "B"]}}})
    fit = fit_table(spec, "y")
    ref = AnovaRM(data, "y", "participant_id", within=["A", "B"]).fit().anova_table  # statsmodels AnovaRM
    for ours, theirs in (("A", "A"), ("B", "B"), ("AxB", "A:B")):
        r = row(fit, ours)
        assert r["stratum"] == "within"
        np.testing.assert_allclose(r["statistic"], ref.loc[theirs, "F Value"], rtol=1e-9)
        np.testing.assert_allclose([r["df1"], r["df2"]], ref.loc[theirs, ["Num DF", "Den DF"]], rtol=1e-12)
        np.testing.assert_allclose(r["p"], ref.loc[theirs, "Pr > F"], rtol=1e-7)


def classical_split_plot(data: pd.DataFrame) -> dict[str, tuple[float, float, float]]:
    """F, df1, df2 of group, session and group x session from the classical sums of squares (numpy)."""
    y = data["y"].to_numpy()
    grand = y.mean()
    g = data["group"].to_numpy()
    s = data["session"].to_numpy()
    p = data["participant_id"].to_numpy()
    groups, sessions, people = np.unique(g), np.unique(s), np.unique(p)
    k = len(sessions)
    person_mean = {q: y[p == q].mean() for q in people}
    group_of = {q: g[p == q][0] for q in people}
    group_mean = {h: y[g == h].mean() for h in groups}
    ss_groups = sum(k * (person_mean[q] - grand) ** 2 for q in people) \
        - sum(k * (person_mean[q] - group_mean[group_of[q]]) ** 2 for q in people)
    ss_subjects = sum(k * (person_mean[q] - group_mean[group_of[q]]) ** 2 for q in people)
    cell = {(h, t): y[(g == h) & (s == t)].mean() for h in groups for t in sessions}
    n_g = {h: len([q for q in people if group_of[q] == h]) for h in groups}
    sess_mean = {t: y[s == t].mean() for t in sessions}
    ss_session = sum(len(people) * (sess_mean[t] - grand) ** 2 for t in sessions)
    ss_cells = sum(n_g[h] * (cell[h, t] - grand) ** 2 for h in groups for t in sessions)
    ss_gs = ss_cells - ss_groups - ss_session
    ss_total = ((y - grand) ** 2).sum()
    ss_error_w = ss_total - ss_groups - ss_subjects - ss_session - ss_gs
    df_g, df_sub = len(groups) - 1, len(people) - len(groups)
    df_s, df_gs, df_ew = k - 1, (len(groups) - 1) * (k - 1), (len(people) - len(groups)) * (k - 1)
    return {
        "group": (ss_groups / df_g / (ss_subjects / df_sub), df_g, df_sub),
        "session": (ss_session / df_s / (ss_error_w / df_ew), df_s, df_ew),
        "gxs": (ss_gs / df_gs / (ss_error_w / df_ew), df_gs, df_ew),
    }


@pytest.mark.parametrize("coding", ["effect", "treatment"])
def test_split_plot_equals_classical_sums_of_squares(tmp_path: Path, coding: str) -> None:
    data = split_plot(per_group=(6, 6, 6))  # the classical sums of squares are those of equal groups
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {"coding": coding}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"group": {"main": "group"}, "session": {"main": "session"},
                       "gxs": {"interaction": ["group", "session"]}}})
    fit = fit_table(spec, "y")
    expected = classical_split_plot(data)  # independent numpy computation
    for name, (f, df1, df2) in expected.items():
        r = row(fit, name)
        np.testing.assert_allclose([r["statistic"], r["df1"], r["df2"]], [f, df1, df2], rtol=1e-9)
    assert row(fit, "group")["stratum"] == "between"
    assert row(fit, "gxs")["stratum"] == "within"


def test_between_f_of_unequal_groups_is_one_way_anova_of_averages(tmp_path: Path) -> None:
    data = split_plot()
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"group": {"main": "group"}}})
    fit = fit_table(spec, "y")
    averages = data.groupby("participant_id").agg(y=("y", "mean"), group=("group", "first"))
    one_way = stats.f_oneway(*(averages.y[averages.group == h] for h in ["g0", "g1", "g2"]))  # scipy f_oneway
    np.testing.assert_allclose(row(fit, "group")["statistic"], one_way.statistic, rtol=1e-9)
    np.testing.assert_allclose(row(fit, "group")["p"], one_way.pvalue, rtol=1e-7)


def box_epsilon(cov: np.ndarray) -> float:
    """Box (1954) / Greenhouse-Geisser (1959) epsilon from the k x k covariance of the repeated measures."""
    k = cov.shape[0]
    mean_all, mean_diag, row_means = cov.mean(), np.diag(cov).mean(), cov.mean(axis=1)
    num = k**2 * (mean_diag - mean_all) ** 2
    den = (k - 1) * ((cov**2).sum() - 2 * k * (row_means**2).sum() + k**2 * mean_all**2)
    return float(num / den)


def test_greenhouse_geisser_and_huynh_feldt_epsilons(tmp_path: Path) -> None:
    rng = np.random.default_rng(21)
    n, k = 14, 4
    cov = np.array([[4, 3, 2, 1], [3, 5, 3, 2], [2, 3, 6, 4], [1, 2, 4, 9]], float)  # far from spherical
    y = rng.multivariate_normal([10, 11, 11.5, 13], cov, size=n)
    ids = [f"sub-{i:02d}" for i in range(n)]
    obs = pd.DataFrame({"participant_id": np.repeat(ids, k), "t": np.tile([f"t{j}" for j in range(k)], n),
                        "y": y.ravel()})
    spec = write_study(tmp_path, pd.DataFrame({"participant_id": ids}), obs, {
        "factors": {"t": {"within": True}}, "terms": ["t"], "hypotheses": {"time": {"main": "t"}}})
    r = row(fit_table(spec, "y"), "time")
    eps = box_epsilon(np.cov(y, rowvar=False))
    np.testing.assert_allclose(r["epsilon_gg"], eps, rtol=1e-10)
    assert 1 / (k - 1) <= r["epsilon_gg"] <= 1 and eps < 0.95
    hf = (n * (k - 1) * eps - 2) / ((k - 1) * (n - 1 - (k - 1) * eps))  # Huynh & Feldt 1976, from memory
    np.testing.assert_allclose(r["epsilon_hf"], min(1.0, hf), rtol=1e-10)
    np.testing.assert_allclose(r["p_gg"], stats.f.sf(r["statistic"], r["df1"] * eps, r["df2"] * eps), rtol=1e-8)
    assert r["p_gg"] > r["p"]
    e_hf = min(1.0, hf)  # the HF-corrected p: F on the df scaled by the HF epsilon (scipy.stats.f)
    np.testing.assert_allclose(r["p_hf"], stats.f.sf(r["statistic"], r["df1"] * e_hf, r["df2"] * e_hf), rtol=1e-8)
    assert r["p_gg"] >= r["p_hf"] >= r["p"]


def test_epsilon_is_one_for_two_levels_and_in_bounds(tmp_path: Path) -> None:
    data = split_plot(seed=8, k=2)
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"session": {"main": "session"}, "gxs": {"interaction": ["group", "session"]}}})
    fit = fit_table(spec, "y")
    assert fit.table["epsilon_gg"].isna().all()  # one within df: no correction to make (epsilon = 1)
    data = split_plot(seed=9, k=5)
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"session": {"main": "session"}, "gxs": {"interaction": ["group", "session"]}}})
    eps = fit_table(spec, "y").table.set_index("hypothesis")["epsilon_gg"]
    assert ((eps >= 1 / 4 - 1e-12) & (eps <= 1 + 1e-12)).all()
    np.testing.assert_allclose(eps["session"], eps["gxs"], rtol=1e-12)  # the same contrasts, the same epsilon


def test_naive_single_model_gives_a_different_between_f(tmp_path: Path) -> None:
    data = split_plot(seed=13)
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"group": {"main": "group"}}})
    ours = row(fit_table(spec, "y"), "group")
    naive = smf.ols("y ~ C(group, Sum) * C(session, Sum)", data).fit()  # statsmodels OLS, all images in one model
    names = [c for c in naive.params.index if c.startswith("C(group, Sum)[") and ":" not in c]
    test = naive.f_test(np.array([[1.0 if p == c else 0.0 for p in naive.params.index] for c in names]))
    assert float(test.df_denom) == len(data) - 9 != ours["df2"]
    assert abs(float(np.squeeze(test.fvalue)) - ours["statistic"]) > 0.5
    assert ours["df2"] == data["participant_id"].nunique() - 3


def test_missing_within_cell_leaves_participant_out_where_needed(tmp_path: Path) -> None:
    data = split_plot(seed=17)
    dropped = data[~((data.participant_id == "sub-03") & (data.session == "s2"))]
    spec = write_study(tmp_path, people_of(data, ["group"]), dropped.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"group": {"main": "group"}, "session": {"main": "session"},
                       "early": {"compare": {"session": ["s1", "s0"]}},
                       "groups_at_s0": {"compare": {"group": ["g1", "g0"]}, "at": {"session": "s0"}}}})
    fit = fit_table(spec, "y")
    n = data.participant_id.nunique()
    assert row(fit, "group")["participants"] == n - 1 and row(fit, "group")["df2"] == n - 1 - 3
    assert row(fit, "session")["participants"] == n - 1
    assert row(fit, "early")["participants"] == n and row(fit, "early")["df2"] == n - 3
    assert row(fit, "groups_at_s0")["stratum"] == "mixed"
    left = fit.model.strata.tests["session"].left_out
    assert left[0][0] == "sub-03" and "session=s2" in left[0][1]
    # the paired comparison of s1 and s0 uses every participant: the same as OLS on the differences
    wide = data.pivot(index="participant_id", columns="session", values="y")
    groups = data.groupby("participant_id")["group"].first()
    diff = smf.ols("d ~ C(g)", pd.DataFrame({"d": wide.s1 - wide.s0, "g": groups})).fit()  # statsmodels OLS
    means = diff.params["Intercept"] + np.array([0, diff.params["C(g)[T.g1]"], diff.params["C(g)[T.g2]"]])
    np.testing.assert_allclose(row(fit, "early")["estimate"], means.mean(), rtol=1e-10)


def test_simple_effects_with_at_equal_ols_on_transformed_values(tmp_path: Path) -> None:
    data = split_plot(seed=23)
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"gain_g1": {"compare": {"session": ["s2", "s0"]}, "at": {"group": "g1"}},
                       "g1_vs_g0_at_s1": {"compare": {"group": ["g1", "g0"]}, "at": {"session": "s1"}},
                       "mean_s2": {"mean": {"session": "s2"}}}})
    fit = fit_table(spec, "y")
    wide = data.pivot(index="participant_id", columns="session", values="y")
    groups = data.groupby("participant_id")["group"].first()
    frame = pd.DataFrame({"d": wide.s2 - wide.s0, "s1": wide.s1, "s2": wide.s2, "g": groups})
    gain = smf.ols("d ~ C(g)", frame).fit().t_test("Intercept + C(g)[T.g1] = 0")  # statsmodels OLS t_test
    r = row(fit, "gain_g1")
    assert r["stratum"] == "within"
    np.testing.assert_allclose([r["estimate"], r["statistic"], r["p"]],
                               [float(np.squeeze(gain.effect)), float(np.squeeze(gain.tvalue)), float(gain.pvalue)],
                               rtol=1e-8)
    at_s1 = smf.ols("s1 ~ C(g)", frame).fit().t_test("C(g)[T.g1] = 0")  # statsmodels OLS t_test
    r = row(fit, "g1_vs_g0_at_s1")
    assert r["stratum"] == "mixed"
    np.testing.assert_allclose([r["estimate"], r["statistic"]],
                               [float(np.squeeze(at_s1.effect)), float(np.squeeze(at_s1.tvalue))], rtol=1e-8)
    mean_s2 = smf.ols("s2 ~ C(g)", frame).fit().t_test("Intercept + C(g)[T.g1] / 3 + C(g)[T.g2] / 3 = 0")
    np.testing.assert_allclose(row(fit, "mean_s2")["statistic"], float(np.squeeze(mean_s2.tvalue)), rtol=1e-8)


def test_split_plot_epsilons_from_pooled_within_group_covariance(tmp_path: Path) -> None:
    data = split_plot(seed=29, per_group=(6, 7, 8), k=4)
    spec = write_study(tmp_path, people_of(data, ["group"]), data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"session": {"main": "session"}, "gxs": {"interaction": ["group", "session"]}}})
    fit = fit_table(spec, "y")
    wide = data.pivot(index="participant_id", columns="session", values="y")
    groups = data.groupby("participant_id")["group"].first()
    centred = wide - wide.groupby(groups).transform("mean")
    n, g, k = len(wide), 3, 4
    pooled = centred.T @ centred / (n - g)  # pooled within-group covariance of the repeated measures
    eps = box_epsilon(pooled.to_numpy())  # Box 1954 / Greenhouse & Geisser 1959
    hf = ((n - g + 1) * (k - 1) * eps - 2) / ((k - 1) * (n - g - (k - 1) * eps))  # Huynh & Feldt 1976 with
    # Lecoutre's 1991 correction (N -> N - g + 1), from memory
    for name in ("session", "gxs"):
        np.testing.assert_allclose(row(fit, name)["epsilon_gg"], eps, rtol=1e-10)
        np.testing.assert_allclose(row(fit, name)["epsilon_hf"], min(1.0, hf), rtol=1e-10)


def test_covariate_slope_on_averages_and_at_one_session(tmp_path: Path) -> None:
    data = split_plot(seed=31)
    people = people_of(data, ["group"])
    people = people.assign(age=np.round(np.random.default_rng(31).uniform(20, 60, len(people)), 1))
    spec = write_study(tmp_path, people, data.drop(columns="group"), {
        "factors": {"group": {}, "session": {"within": True}}, "covariates": {"age": {}},
        "terms": ["group*session", "age"],
        "hypotheses": {"age": {"slope": "age"}, "age_at_s2": {"slope": "age", "at": {"session": "s2"}}}})
    fit = fit_table(spec, "y")
    wide = data.pivot(index="participant_id", columns="session", values="y").join(people.set_index("participant_id"))
    wide["avg"] = wide[["s0", "s1", "s2"]].mean(axis=1)
    for name, column, stratum in (("age", "avg", "between"), ("age_at_s2", "s2", "mixed")):
        ref = smf.ols(f"{column} ~ C(group, Sum) + age", wide).fit()  # statsmodels OLS on transformed values
        r = row(fit, name)
        assert r["stratum"] == stratum
        np.testing.assert_allclose([r["estimate"], r["statistic"], r["p"]],
                                   [ref.params["age"], ref.tvalues["age"], ref.pvalues["age"]], rtol=1e-8)
