"""statsmodels reference: a hand contrast the audit declares equivalent to a generated hypothesis has the same F.

The hand design is a cell-means model (one indicator per training x chronotype cell, no intercept) with age
uncentred, typed as plain numbers; the spec is the example study's (effect coding, centred age).  The two
matrices differ column by column but span the same space, so a hand contrast and a spec hypothesis that test the
same thing must give the same F on any data.  Both F values come from statsmodels OLS ``f_test`` (the outside
reference) on random outcomes; they must agree to 1e-8 relative.  A contrast the audit says matches nothing
must give a different F, so the comparison can fail.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from groupmodel import build
from groupmodel.audit import audit

ROOT = Path(__file__).resolve().parents[2]
STUDY = ROOT / "example_study"
RTOL = 1e-8

CELLS = [(t, c) for t in ("sprint", "endurance", "rest") for c in ("early", "late")]


def _hand_files(tmp_path: Path) -> tuple[Path, Path, dict[str, np.ndarray]]:
    model = build(STUDY / "model.json")
    obs = model.design.observations
    x = np.array([[float((t, c) == cell) for cell in CELLS] for t, c in zip(obs["training"], obs["chronotype"],
                                                                           strict=True)])
    age = obs["age"].to_numpy(float)
    x = np.column_stack([x, age])
    design = tmp_path / "design.txt"
    np.savetxt(design, x, fmt="%.17g", header="sprint/early sprint/late endurance/early endurance/late "
                                              "rest/early rest/late age(uncentred)")
    mean_age = float(age.mean())
    h = 0.5
    contrasts = {
        "training": np.array([[h, h, 0, 0, -h, -h, 0], [0, 0, h, h, -h, -h, 0]]),
        "training_by_chronotype": np.array([[1, -1, 0, 0, -1, 1, 0], [0, 0, 1, -1, -1, 1, 0]]),
        "sprint_vs_rest": np.array([[h, h, 0, 0, -h, -h, 0]]),
        "late_vs_early_in_sprint": np.array([[-1, 1, 0, 0, 0, 0, 0]]),
        "sprint_late_mean": np.array([[0, 1, 0, 0, 0, 0, mean_age]]),
        "age": np.array([[0, 0, 0, 0, 0, 0, 1]]),
        # Not a hypothesis of the spec: sprint against rest among early types only.
        "sprint_vs_rest_early": np.array([[1, 0, 0, 0, -1, 0, 0]]),
    }
    path = tmp_path / "contrasts.txt"
    path.write_text("".join(f"{name} " + " ".join(f"{v:.17g}" for v in row) + "\n"
                            for name, rows in contrasts.items() for row in rows))
    return design, path, contrasts


def test_declared_equivalents_have_equal_f(tmp_path: Path) -> None:
    design, contrasts, hand = _hand_files(tmp_path)
    report = audit(design, contrasts, STUDY / "participants.tsv", spec=STUDY / "model.json")
    assert report.exit_code == 0, report.format()
    assert "spec_same_space" in report.codes()
    declared = {c.name: c.spec_matches for c in report.contrasts}
    # Every hand contrast named after a spec hypothesis is recognised as it; the extra one matches nothing.
    for name in hand:
        if name == "sprint_vs_rest_early":
            assert declared[name] == []
        else:
            assert name in declared[name], (name, declared[name])

    model = build(STUDY / "model.json")
    xs = model.design.matrix
    xh = np.loadtxt(design)
    rng = np.random.default_rng(20240611)
    checked = 0
    for _ in range(3):
        y = rng.normal(size=xs.shape[0]) + xs @ rng.normal(size=xs.shape[1])
        fit_h = sm.OLS(y, xh).fit()
        fit_s = sm.OLS(y, xs).fit()
        for con in report.contrasts:
            for match in con.spec_matches:
                f_hand = float(np.squeeze(fit_h.f_test(con.weights).fvalue))
                f_spec = float(np.squeeze(fit_s.f_test(model.hypotheses[match].weights).fvalue))
                assert f_hand == pytest.approx(f_spec, rel=RTOL), (con.name, match)  # statsmodels f_test
                checked += 1
        # The contrast that matches nothing tests something else: its F differs from the nearest hypothesis.
        f_other = float(np.squeeze(fit_h.f_test(hand["sprint_vs_rest_early"]).fvalue))
        f_near = float(np.squeeze(fit_s.f_test(model.hypotheses["sprint_vs_rest"].weights).fvalue))
        assert abs(f_other - f_near) > 1e-6 * abs(f_near)
    assert checked == 3 * 6


def test_gallery_treatment_set_matches_its_spec() -> None:
    """The correct treatment-coded gallery set against its spec: declared matches give statsmodels-equal F."""
    folder = Path(__file__).parent / "gallery" / "correct_spec"
    report = audit(folder / "design.tsv", folder / "contrasts.tsv", folder / "participants.tsv",
                   spec=folder / "model.json")
    model = build(folder / "model.json")
    xh = np.loadtxt(folder / "design.tsv", skiprows=1, usecols=range(1, 7))
    rng = np.random.default_rng(7)
    y = rng.normal(size=xh.shape[0])
    fit_h, fit_s = sm.OLS(y, xh).fit(), sm.OLS(y, model.design.matrix).fit()
    pairs = [(c, m) for c in report.contrasts for m in c.spec_matches]
    assert {(c.name, m) for c, m in pairs} >= {("diet", "diet"), ("vegan_vs_keto", "vegan_vs_keto"),
                                              ("long_vs_short_on_keto", "long_vs_short_on_keto")}
    for con, match in pairs:
        f_hand = float(np.squeeze(fit_h.f_test(con.weights).fvalue))
        f_spec = float(np.squeeze(fit_s.f_test(model.hypotheses[match].weights).fvalue))
        assert f_hand == pytest.approx(f_spec, rel=RTOL)  # statsmodels f_test
