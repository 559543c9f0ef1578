"""Bad observations tables (several images per participant): each refused in one line naming the file, row,
column or participant and the fix.

Reference: the project's error rules (README "Exit codes and errors") and the issue's rule that covariates are
between-participant (one varying within a participant is an error naming the participant).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from groupmodel import build
from groupmodel.errors import SpecError, TableError

PEOPLE = "participant_id\tgroup\nsub-01\ta\nsub-02\ta\nsub-03\tb\nsub-04\tb\n"
OBS = "".join(f"sub-0{i}\t{s}\t{i + (s == 'post')}\t{20 + i}\n" for i in range(1, 5) for s in ("pre", "post"))
SPEC = {"participants": "participants.tsv", "observations": "observations.tsv",
        "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
        "hypotheses": {"s": {"main": "session"}}}


def study(root: Path, obs: str = OBS, spec: dict | None = None, header: str = "session\ty\tage") -> Path:
    (root / "participants.tsv").write_text(PEOPLE)
    (root / "observations.tsv").write_text(f"participant_id\t{header}\n" + obs)
    (root / "model.json").write_text(json.dumps(spec or SPEC))
    return root / "model.json"


def test_good_study_builds(tmp_path: Path) -> None:
    model = build(study(tmp_path), numeric_columns=["y"])
    assert model.design.n_observations == 8 and model.strata is not None
    assert model.strata.tests["s"].stratum == "within"


def test_covariate_varying_within_a_participant_names_the_participant(tmp_path: Path) -> None:
    obs = OBS.replace("sub-02\tpost\t3\t22", "sub-02\tpost\t3\t23")
    spec = {**SPEC, "covariates": {"age": {}}, "terms": ["group*session", "age"]}
    with pytest.raises(TableError, match=r"observations.tsv row 4, column 'age': participant sub-02 has '22' and "
                                         r"'23'.*between-participant"):
        build(study(tmp_path, obs, spec))


def test_two_rows_for_one_cell(tmp_path: Path) -> None:
    obs = OBS + "sub-01\tpre\t5\t21\n"
    with pytest.raises(TableError, match=r"observations.tsv rows 1 and 9: participant sub-01 has two rows for "
                                         r"session=pre"):
        build(study(tmp_path, obs))


def test_unknown_participant(tmp_path: Path) -> None:
    with pytest.raises(TableError, match=r"observations.tsv row 9: participant_id 'sub-09' is not in "
                                         r"participants.tsv"):
        build(study(tmp_path, OBS + "sub-09\tpre\t1\t20\n"))


def test_column_in_both_tables(tmp_path: Path) -> None:
    with pytest.raises(TableError, match=r"column 'group' is also in participants.tsv"):
        build(study(tmp_path, OBS, header="session\ty\tgroup"))


def test_within_factor_needs_observations(tmp_path: Path) -> None:
    spec = {k: v for k, v in SPEC.items() if k != "observations"}
    with pytest.raises(SpecError, match=r"\$.factors.session.within: .*observations"):
        build(study(tmp_path, spec=spec))


def test_missing_within_value_is_an_exclusion_with_reason(tmp_path: Path) -> None:
    obs = OBS.replace("sub-03\tpost", "sub-03\tn/a")
    model = build(study(tmp_path, obs))
    (ex,) = model.sample.exclusions
    assert ex.participant_id == "sub-03" and "observations.tsv row 6" in ex.reason and "session" in ex.reason
    assert [p for p, _ in model.strata.tests["s"].left_out] == ["sub-03"]


def test_one_test_over_two_strata_is_refused(tmp_path: Path) -> None:
    spec = {**SPEC, "hypotheses": {"w": {"weights": [{"intercept": 1}, {"session=post": 1}]},
                                   "grand": {"weights": {"intercept": 1}}}}
    model = build(study(tmp_path, spec=spec))
    (err,) = [f for f in model.errors if f.code == "stratum"]
    assert "hypothesis w cannot be tested: it tests participant averages and within-participant contrasts" \
        in err.message and "split it" in err.message
    assert model.strata.tests["grand"].stratum == "between"  # raw weights that cell means reproduce are placed


def test_participant_ids_must_be_in_the_participants_table_only_once(tmp_path: Path) -> None:
    (tmp_path / "participants.tsv").write_text(PEOPLE + "sub-01\tb\n")
    (tmp_path / "observations.tsv").write_text("participant_id\tsession\ty\tage\n" + OBS)
    (tmp_path / "model.json").write_text(json.dumps(SPEC))
    with pytest.raises(TableError, match="participant_id 'sub-01' appears 2 times"):
        build(tmp_path / "model.json")
