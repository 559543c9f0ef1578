"""Round trip: every design and contrast file ``groupmodel build`` writes passes ``groupmodel check``.

For the example study's spec and three more (treatment coding with an interaction, a cell-means model without
intercept, orthogonal polynomial coding with an uncentred and an SD-scaled covariate), the files build writes
are checked against the same spec: no error, no warning, and every contrast is recognised as the hypothesis of
its own name.  The same holds when the matrices are retyped as plain numbers rounded to 6 decimals (as a
script of another lab might have written them).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from groupmodel import build
from groupmodel.audit import audit
from groupmodel.cli import main

ROOT = Path(__file__).resolve().parents[2]
STUDY = ROOT / "example_study"
TABLE = STUDY / "participants.tsv"

SPECS = {
    "treatment": {
        "factors": {"training": {"levels": ["sprint", "endurance", "rest"], "coding": "treatment",
                                 "reference": "rest"},
                    "chronotype": {"coding": "treatment"}},
        "covariates": {"age": {"center": "mean"}},
        "terms": ["training*chronotype", "age"],
        "hypotheses": {"training": {"main": "training"}, "chronotype": {"main": "chronotype"},
                       "interaction": {"interaction": ["training", "chronotype"]},
                       "sprint_vs_rest": {"compare": {"training": ["sprint", "rest"]}},
                       "rest_early_mean": {"mean": {"training": "rest", "chronotype": "early"}},
                       "age": {"slope": "age"}},
    },
    "cell_means": {
        "intercept": False,
        "factors": {"training": {"levels": ["sprint", "endurance", "rest"], "coding": "indicator"},
                    "chronotype": {"coding": "indicator"}},
        "covariates": {"age": {"center": "mean"}},
        "terms": ["training:chronotype", "age"],
        "hypotheses": {"training": {"main": "training"},
                       "interaction": {"interaction": ["training", "chronotype"]},
                       "trained_vs_rest": {"compare": {"training": [["sprint", "endurance"], "rest"]}},
                       "sprint_vs_rest_late": {"cells": [
                           {"at": {"training": "sprint", "chronotype": "late"}, "weight": 1},
                           {"at": {"training": "rest", "chronotype": "late"}, "weight": -1}]},
                       "age": {"slope": "age"}},
    },
    "polynomial": {
        "factors": {"training": {"levels": ["rest", "endurance", "sprint"], "coding": "polynomial"}},
        "covariates": {"age": {"center": "none"}, "weekly_hours": {"center": "mean", "scale": "sd"}},
        "terms": ["training", "age", "weekly_hours"],
        "hypotheses": {"training": {"main": "training"}, "linear": {"trend": "training"},
                       "quadratic": {"trend": "training", "degree": 2},
                       "hours": {"slope": "weekly_hours"}, "rest_mean": {"mean": {"training": "rest"}}},
    },
}


def _spec_path(name: str, tmp_path: Path) -> Path:
    if name == "example":
        return STUDY / "model.json"
    path = tmp_path / f"{name}.json"
    path.write_text(json.dumps({"participants": str(TABLE), **SPECS[name]}))
    return path


@pytest.mark.parametrize("name", ["example", *SPECS])
def test_built_files_pass_check(name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = _spec_path(name, tmp_path)
    model = build(spec)
    assert not model.errors
    out = model.write(tmp_path / "design", pictures=False)
    report_path = tmp_path / "report.json"
    code = main(["check", "--design", str(out / "design.tsv"), "--contrasts", str(out / "contrasts.tsv"),
                 "--participants", str(TABLE), "--spec", str(spec), "--json", str(report_path)])
    text = capsys.readouterr().out
    assert code == 0, text
    report = json.loads(report_path.read_text())
    bad = [f for f in report["findings"] if f["severity"] in ("error", "warning")]
    assert not bad, text
    assert "spec_same_space" in {f["code"] for f in report["findings"]}
    names = [c["name"] for c in report["contrasts"]]
    assert names == list(model.hypotheses)
    for con in report["contrasts"]:
        assert con["name"] in con["spec_matches"], (con["name"], con["spec_matches"], text)
        assert con["test"] == ("t" if model.hypotheses[con["name"]].n_rows == 1 else "F")
    # No column is left unexplained: every one is a coding, an interaction or a covariate of the spec.
    kinds = {c["kind"] for c in report["columns"]}
    assert "unexplained" not in kinds


@pytest.mark.parametrize("name", ["example", "treatment", "polynomial"])
def test_retyped_as_rounded_numbers(name: str, tmp_path: Path) -> None:
    """Plain numbers, no header, 6 decimals, rows in the spec's order: still clean and recognised by name."""
    spec = _spec_path(name, tmp_path)
    model = build(spec)
    design = tmp_path / "design.txt"
    np.savetxt(design, model.design.matrix, fmt="%.6f", header="retyped by another script")
    rows, labels, _ = model.contrast_rows()
    contrasts = tmp_path / "contrasts.txt"
    names = [lab.rsplit(" ", 1)[0] if model.hypotheses.get(lab) is None else lab for lab in labels]
    contrasts.write_text("".join(f"{n} " + " ".join(f"{v:.6f}" for v in r) + "\n"
                                 for n, r in zip(names, rows, strict=True)))
    report = audit(design, contrasts, TABLE, spec=spec)
    assert report.exit_code == 0, report.format()
    assert not report.warnings, report.format()
    for con in report.contrasts:
        assert con.name in con.spec_matches, report.format()


def test_example_without_spec_reads_the_codings(tmp_path: Path) -> None:
    """Without --spec, the factor and covariate columns are found in the table and every column explained."""
    out = build(STUDY / "model.json").write(tmp_path / "d", pictures=False)
    report = audit(out / "design.tsv", out / "contrasts.tsv", TABLE)
    assert report.exit_code == 0 and not report.warnings, report.format()
    assert report.factors == ["training", "chronotype"]
    assert report.covariates == ["age"]
    described = [c.description for c in report.columns]
    assert described[1] == "effect coding of training: +1 at sprint, -1 at the reference rest, 0 elsewhere"
    assert described[4] == "interaction training x chronotype: product of column 2 (training=sprint) and " \
                           "column 4 (chronotype=early)"
    assert described[6].startswith("covariate age (centred at its mean 35.03")
    by_name = {c.name: c.statement for c in report.contrasts}
    assert by_name["training"].startswith("the main effect of training: mean(training=sprint) = "
                                          "mean(training=endurance) = mean(training=rest)")
