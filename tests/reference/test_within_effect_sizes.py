"""Effect sizes and intervals of hypotheses tested in error strata, against direct computations outside the
project.

References, named beside each check:

* ``scipy.stats.ttest_rel(...).confidence_interval()`` for the interval of a paired mean difference; Cohen's
  d of a paired comparison defined as the mean difference / the SD of the differences (d_z), computed with
  numpy (``np.std(ddof=1)``);
* the mixed stratum (groups at one session) against ``scipy.stats.ttest_ind`` and the pooled-SD d with numpy;
* the between stratum against the same on each participant's average over the sessions;
* partial eta squared of a within F with more than one df against ``statsmodels`` ``AnovaRM``'s F and df
  (SSH / (SSH + SSE) = F df1 / (F df1 + df2)); its interval is n/a there, with the reason in results.json.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats
from statsmodels.stats.anova import AnovaRM

from groupmodel.analysis.table_fit import fit_table
from groupmodel.outputs.fit_files import write_table_fit


def _study(folder: Path, k: int = 2, seed: int = 11) -> tuple[Path, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    ids = [f"sub-{i:02d}" for i in range(14)]
    groups = ["a"] * 6 + ["b"] * 8
    people = pd.DataFrame({"participant_id": ids, "group": groups})
    records = []
    for pid, g in zip(ids, groups, strict=True):
        person = rng.normal(0, 2)
        for s in range(k):
            y = 3 + person + 0.9 * s + 0.5 * s * (g == "b") + rng.normal(0, 1 + 0.4 * s)
            records.append({"participant_id": pid, "session": f"s{s}", "y": round(float(y), 6)})
    obs = pd.DataFrame(records)
    people.to_csv(folder / "participants.tsv", sep="\t", index=False)
    obs.to_csv(folder / "observations.tsv", sep="\t", index=False)
    hyps = {"gain": {"compare": {"session": [f"s{k - 1}", "s0"]}},
            "gain_b": {"compare": {"session": [f"s{k - 1}", "s0"]}, "at": {"group": "b"}},
            "groups_last": {"compare": {"group": ["b", "a"]}, "at": {"session": f"s{k - 1}"}},
            "groups": {"compare": {"group": ["b", "a"]}},
            "session": {"main": "session"}}
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"], "hypotheses": hyps}
    (folder / "model.json").write_text(json.dumps(spec))
    return folder / "model.json", obs.merge(people, on="participant_id")


def _row(fit, name: str) -> pd.Series:
    return fit.table.set_index("hypothesis").loc[name]


def test_paired_comparison_d_and_interval(tmp_path: Path) -> None:
    spec, data = _study(tmp_path)
    wide = data.pivot(index="participant_id", columns="session", values="y")
    group = data.drop_duplicates("participant_id").set_index("participant_id")["group"].loc[wide.index]
    diff = (wide["s1"] - wide["s0"]).to_numpy()
    fit = fit_table(spec, "y")
    # gain at group b: the paired comparison of that group's participants (scipy ttest_rel; d_z with numpy)
    b = (group == "b").to_numpy()
    ref = stats.ttest_rel(wide["s1"][b], wide["s0"][b])
    # the stratum's residual SD pools the differences within both groups: df = 14 - 2
    pooled_sd = np.sqrt((np.var(diff[b], ddof=1) * (b.sum() - 1) + np.var(diff[~b], ddof=1) * ((~b).sum() - 1))
                        / (len(diff) - 2))
    r = _row(fit, "gain_b")
    np.testing.assert_allclose(r["estimate"], diff[b].mean(), rtol=1e-10)
    np.testing.assert_allclose(r["cohens_d"], diff[b].mean() / pooled_sd, rtol=1e-10)
    half = stats.t.isf(0.025, len(diff) - 2) * pooled_sd / np.sqrt(b.sum())
    np.testing.assert_allclose([r["ci_lower"], r["ci_upper"]], [diff[b].mean() - half, diff[b].mean() + half],
                               rtol=1e-10)
    assert r["df2"] == len(diff) - 2 and ref.df == b.sum() - 1  # the stratum pools both groups' differences


def test_paired_design_without_groups_matches_ttest_rel(tmp_path: Path) -> None:
    spec, data = _study(tmp_path)
    raw = json.loads(spec.read_text())
    raw.update(factors={"session": {"within": True}}, terms=["session"],
               hypotheses={"gain": {"compare": {"session": ["s1", "s0"]}}})
    spec.write_text(json.dumps(raw))
    wide = data.pivot(index="participant_id", columns="session", values="y")
    diff = (wide["s1"] - wide["s0"]).to_numpy()
    ref = stats.ttest_rel(wide["s1"], wide["s0"])  # scipy
    ci = ref.confidence_interval(0.95)
    r = _row(fit_table(spec, "y"), "gain")
    np.testing.assert_allclose(r["statistic"], ref.statistic, rtol=1e-10)
    np.testing.assert_allclose([r["ci_lower"], r["ci_upper"]], [ci.low, ci.high], rtol=1e-10)
    np.testing.assert_allclose(r["cohens_d"], diff.mean() / np.std(diff, ddof=1), rtol=1e-10)  # d_z, numpy
    np.testing.assert_allclose(r["partial_eta_squared"], ref.statistic**2 / (ref.statistic**2 + ref.df), rtol=1e-10)


def test_mixed_and_between_strata_d(tmp_path: Path) -> None:
    spec, data = _study(tmp_path)
    fit = fit_table(spec, "y")
    last = data[data.session == "s1"]
    a, b = (last[last.group == g]["y"].to_numpy() for g in ("a", "b"))
    sp = np.sqrt(((len(a) - 1) * np.var(a, ddof=1) + (len(b) - 1) * np.var(b, ddof=1)) / (len(a) + len(b) - 2))
    ref = stats.ttest_ind(b, a)  # scipy, pooled variance
    r = _row(fit, "groups_last")
    np.testing.assert_allclose(r["statistic"], ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(r["cohens_d"], (b.mean() - a.mean()) / sp, rtol=1e-10)
    ci = ref.confidence_interval(0.95)
    np.testing.assert_allclose([r["ci_lower"], r["ci_upper"]], [ci.low, ci.high], rtol=1e-10)
    avg = data.groupby(["participant_id", "group"], as_index=False)["y"].mean()
    a, b = (avg[avg.group == g]["y"].to_numpy() for g in ("a", "b"))
    sp = np.sqrt(((len(a) - 1) * np.var(a, ddof=1) + (len(b) - 1) * np.var(b, ddof=1)) / (len(a) + len(b) - 2))
    r = _row(fit, "groups")
    np.testing.assert_allclose(r["statistic"], stats.ttest_ind(b, a).statistic, rtol=1e-10)  # scipy
    np.testing.assert_allclose(r["cohens_d"], (b.mean() - a.mean()) / sp, rtol=1e-10)


def test_within_f_partial_eta_squared_and_no_interval(tmp_path: Path) -> None:
    spec, data = _study(tmp_path, k=3)
    raw = json.loads(spec.read_text())
    raw.update(factors={"session": {"within": True}}, terms=["session"], hypotheses={"session": {"main": "session"}})
    spec.write_text(json.dumps(raw))
    ref = AnovaRM(data, "y", "participant_id", within=["session"]).fit().anova_table.loc["session"]  # statsmodels
    fit = fit_table(spec, "y")
    r = _row(fit, "session")
    np.testing.assert_allclose(r["statistic"], ref["F Value"], rtol=1e-10)
    f, d1, d2 = ref["F Value"], ref["Num DF"], ref["Den DF"]
    np.testing.assert_allclose(r["partial_eta_squared"], f * d1 / (f * d1 + d2), rtol=1e-10)
    assert np.isnan(r["partial_eta_squared_ci_lower"]) and np.isnan(r["ci_lower"]) and np.isnan(r["cohens_d"])
    write_table_fit(fit, tmp_path / "out", pictures=False)
    side = json.loads((tmp_path / "out" / "results.json").read_text())
    assert side["strata"]["session"]["partial_eta_squared_interval"].startswith("n/a: with more than one")
    table = pd.read_csv(tmp_path / "out" / "results.tsv", sep="\t", keep_default_na=False)
    assert table.set_index("hypothesis").loc["session", "partial_eta_squared_ci_lower"] == "n/a"


def test_differences_equal_up_to_rounding_are_not_tested(tmp_path: Path) -> None:
    """Every participant gains exactly 0.5 (up to the rounding of the stored values): the paired difference has
    zero variance, so t, p and d are n/a (as the engine does for one row per participant), not 1e15."""
    spec, data = _study(tmp_path)
    obs = data[["participant_id", "session"]].copy()
    base = np.round(np.linspace(1.1, 3.7, len(obs) // 2), 3)
    obs["y"] = [round(base[i // 2] + 0.5 * (s == "s1"), 3) for i, s in enumerate(obs.session)]
    obs.to_csv(tmp_path / "observations.tsv", sep="\t", index=False)
    r = _row(fit_table(spec, "y"), "gain_b")
    np.testing.assert_allclose(r["estimate"], 0.5, rtol=1e-12)
    assert np.isnan(r["statistic"]) and np.isnan(r["p"]) and np.isnan(r["cohens_d"]) and r["se"] == 0


def test_cell_means_from_each_within_cell(tmp_path: Path) -> None:
    """cell_means.tsv with within factors: each cell's mean is its sample mean, its SE from the pooled SD of the
    groups at that session (numpy) and its 95% interval from scipy.stats.t.interval on that session's df."""
    spec, data = _study(tmp_path)
    cm = fit_table(spec, "y").cell_means.set_index(["group", "session"])
    for session in ("s0", "s1"):
        at = data[data.session == session]
        values = {g: at[at.group == g]["y"].to_numpy() for g in ("a", "b")}
        df = sum(len(v) - 1 for v in values.values())
        sp = np.sqrt(sum((len(v) - 1) * np.var(v, ddof=1) for v in values.values()) / df)
        for g, v in values.items():
            row = cm.loc[(g, session)]
            se = sp / np.sqrt(len(v))
            lo, hi = stats.t.interval(0.95, df, loc=v.mean(), scale=se)
            np.testing.assert_allclose([row["estimate"], row["se"], row["ci_low"], row["ci_high"]],
                                       [v.mean(), se, lo, hi], rtol=1e-10)
            assert row["count"] == len(v)
