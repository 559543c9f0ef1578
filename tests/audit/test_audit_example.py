"""The faulty hand-written files of the example study (the README's check section) give the findings shown there.

The files in example_study/faulty/ were typed as an old lab script would: treatment coding with an interaction,
age uncentred, two rows swapped, a "main effect" read off the treatment columns, a cell mean at age 0, and an
image list that still holds the three excluded participants.
"""

from __future__ import annotations

from pathlib import Path

from groupmodel.audit import audit

STUDY = Path(__file__).resolve().parents[2] / "example_study"
FAULTY = STUDY / "faulty"


def test_faulty_example_report() -> None:
    report = audit(FAULTY / "design.txt", FAULTY / "contrasts.txt", STUDY / "participants.tsv",
                   spec=STUDY / "model.json", images=FAULTY / "images.txt")
    assert report.exit_code == 1
    errors = {f.code: f.message for f in report.errors}
    warnings = [(f.code, f.message) for f in report.warnings]
    assert set(errors) == {"rows_out_of_place", "image_count"}
    assert "rows 9 and 10 look swapped" in errors["rows_out_of_place"]
    assert "line 7 (sub-007), line 24 (sub-024), line 41 (sub-041)" in errors["image_count"]
    codes = [c for c, _ in warnings]
    assert sorted(codes) == ["effect_at_covariate_zero", "main_effect_at_reference", "spec_name_mismatch",
                             "spec_name_mismatch"]
    main_ref = next(m for c, m in warnings if c == "main_effect_at_reference")
    # The marginal main effect in this treatment coding: add half of each interaction column (hand computation).
    assert "[0 1 0 0 0.5 0 0]; [0 0 1 0 0 0.5 0]" in main_ref
    matched = {c.name: c.spec_matches for c in report.contrasts}
    assert matched == {"training": [], "sprint_vs_rest": ["sprint_vs_rest"], "sprint_late_mean": [], "age": ["age"]}
    said = {c.name: c.statement for c in report.contrasts}
    assert said["training"].startswith("mean(training=sprint) - mean(training=rest) = 0, at chronotype=early; and ")
    assert said["sprint_late_mean"] == ("mean of the cells = 0, at training=sprint, chronotype=late; "
                                        "age at 0 (not at its mean 35.03)")
    assert said["age"] == "slope of age = 0, averaged equally over training x chronotype"
    text = report.format()
    assert text.splitlines()[-1] == "summary: 2 errors, 4 warnings, 17 notes; exit code 1"
