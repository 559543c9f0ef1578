"""Bad input to ``groupmodel build`` (and ``fit --outcome``): one line, the right exit code, nothing written.

Each test writes a small study into tmp_path, spoils one thing, runs the command in-process and checks:
the exit code (2 for unreadable or invalid input, 1 for a model problem), a single line on stderr that starts
with ``groupmodel: error:`` and says where the problem is, no traceback, and no output folder.
"""

from __future__ import annotations

import contextlib
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from groupmodel import cli

TSV = (
    "participant_id\tgroup\tage\tsite\tscanner\n"
    "sub-01\tpatient\t31\tnorth\tN1\n"
    "sub-02\tcontrol\t45\tsouth\tS1\n"
    "sub-03\tpatient\t27\tnorth\tN1\n"
    "sub-04\tcontrol\t52\tsouth\tS1\n"
    "sub-05\tpatient\t39\tsouth\tS1\n"
    "sub-06\tcontrol\t33\tnorth\tN1\n"
)
SPEC = {
    "participants": "participants.tsv",
    "factors": {"group": {"levels": ["patient", "control"]}},
    "covariates": {"age": {"center": "mean"}},
    "terms": ["group", "age"],
    "hypotheses": {"group": {"compare": {"group": ["patient", "control"]}}},
}


def study(tmp_path: Path, tsv: str | None = TSV, spec: dict | None = None, spec_text: str | None = None) -> Path:
    if tsv is not None:
        (tmp_path / "participants.tsv").write_text(tsv)
    path = tmp_path / "model.json"
    path.write_text(spec_text if spec_text is not None else json.dumps(spec if spec is not None else SPEC, indent=1))
    return path


def fails(tmp_path: Path, spec_path: Path, code: int, *fragments: str, out: Path | None = None,
          command: tuple[str, ...] = ("build",)) -> str:
    """Run the command; check exit code, one line, no traceback, nothing written; return the message."""
    out = out if out is not None else tmp_path / "out"
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        got = cli.main([*command, str(spec_path), "--out", str(out)])  # an uncaught exception fails the test
    err = stderr.getvalue()
    assert got == code, (got, err)
    assert err.startswith("groupmodel: error: ") and err.endswith("\n")
    assert err.count("\n") == 1, err  # one line
    assert "Traceback" not in err + stdout.getvalue()
    assert not out.exists()  # nothing written
    assert not list(out.parent.glob(f".{out.name}*"))  # no temporary folder left behind
    for fragment in fragments:
        assert fragment in err, (fragment, err)
    return err


def test_good_study_builds(tmp_path: Path) -> None:
    """The unspoilt study of this file builds (so each failure below is due to the one change)."""
    path = study(tmp_path)
    with contextlib.redirect_stdout(io.StringIO()):
        assert cli.main(["build", str(path), "--out", str(tmp_path / "ok"), "--no-pictures"]) == 0


def test_missing_spec_file(tmp_path: Path) -> None:
    fails(tmp_path, tmp_path / "nope.json", 2, "file not found", "nope.json")


def test_missing_participants_file(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, tsv=None), 2, "participants.tsv", "file not found")


def test_not_a_tsv(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, tsv=TSV.replace("\t", ",")), 2, "tab-separated", "line 1")


def test_no_participant_id_column(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, tsv=TSV.replace("participant_id", "subject")), 2, "participant_id")


def test_duplicate_participant_ids(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, tsv=TSV.replace("sub-04", "sub-02")), 2, "'sub-02'", "rows [2, 4]")


def test_undeclared_level(tmp_path: Path) -> None:
    err = fails(tmp_path, study(tmp_path, tsv=TSV.replace("sub-03\tpatient", "sub-03\tpatinet")), 2,
                "row 3", "column 'group'", "'patinet'")
    assert "patient" in err  # the declared levels are listed


def test_level_not_in_the_sidecar(tmp_path: Path) -> None:
    (tmp_path / "participants.json").write_text(json.dumps({"site": {"Levels": {"north": "N", "south": "S"}}}))
    spec = {**SPEC, "factors": {"site": {}}, "terms": ["site"], "hypotheses": {}}
    path = study(tmp_path, tsv=TSV.replace("sub-05\tpatient\t39\tsouth", "sub-05\tpatient\t39\teast"), spec=spec)
    fails(tmp_path, path, 2, "row 5", "column 'site'", "'east'", "participants.json")


def test_exclude_names_an_unknown_participant(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, spec={**SPEC, "exclude": ["sub-99"]}), 2, "$.exclude", "'sub-99'")


def test_non_numeric_covariate(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, tsv=TSV.replace("\t52\t", "\tfifty\t")), 2, "row 4", "column 'age'",
          "'fifty'", "expected a number")


def test_term_naming_an_unknown_column(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, spec={**SPEC, "terms": ["group", "weight"]}), 2, "$.terms[1]", "'weight'")


def test_spec_column_missing_from_table(tmp_path: Path) -> None:
    spec = {**SPEC, "covariates": {"weight": {}}, "terms": ["group", "weight"]}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "'weight'", "not in the table")


def test_interaction_of_a_term_with_itself(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, spec={**SPEC, "terms": ["group:group"]}), 2, "$.terms[0]", "itself")


def test_invalid_json_names_line_and_column(tmp_path: Path) -> None:
    text = '{\n  "participants": "participants.tsv",\n  "terms": [group]\n}\n'
    fails(tmp_path, study(tmp_path, spec_text=text), 2, "invalid JSON", "line 3, column 13")


def test_schema_failure_names_json_path(tmp_path: Path) -> None:
    spec = {**SPEC, "factors": {"group": {"coding": "sum-to-zero"}}}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "$.factors.group.coding", "effect")


def test_schema_failure_unknown_key(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path, spec={**SPEC, "intercpt": True}), 2, "$", "'intercpt'")


def test_schema_failure_two_kinds_in_one_hypothesis(tmp_path: Path) -> None:
    spec = {**SPEC, "hypotheses": {"h": {"main": "group", "slope": "age"}}}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "$.hypotheses.h", "exactly one")


def test_unwritable_out(tmp_path: Path) -> None:
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    fails(tmp_path, study(tmp_path), 2, "--out", out=blocker / "design")


def test_out_is_a_file(tmp_path: Path) -> None:
    target = tmp_path / "design"
    target.write_text("a file")
    stderr = io.StringIO()
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(stderr):
        assert cli.main(["build", str(study(tmp_path)), "--out", str(target)]) == 2
    assert "expected a folder" in stderr.getvalue()
    assert target.read_text() == "a file"


def test_hypothesis_on_confounded_factors_names_the_dependent_columns(tmp_path: Path) -> None:
    # scanner is the same split as site: the scanner column is the site column under another name, so the
    # design is rank deficient (a warning) and a site effect cannot be told from a scanner effect (an error).
    spec = {**SPEC, "factors": {"site": {"coding": "treatment"}, "scanner": {"coding": "treatment"}},
            "terms": ["site", "scanner"], "hypotheses": {"site": {"main": "site"}}}
    fails(tmp_path, study(tmp_path, spec=spec), 1, "hypothesis site is not estimable",
          "no participant has site=north, scanner=S1; site=south, scanner=N1",
          "estimable instead: the same hypothesis in a model without the term scanner")


def test_design_without_residual_df(tmp_path: Path) -> None:
    # Six participants, six distinct ages, age as a factor with an intercept: rank 6, no residual df.
    spec = {**SPEC, "factors": {"age": {}}, "covariates": {}, "terms": ["age"], "hypotheses": {}}
    fails(tmp_path, study(tmp_path, spec=spec), 1, "no residual degrees of freedom (n = 6, rank = 6)")


def _empty_cell_study(tmp_path: Path, hypotheses: dict) -> Path:
    # group x site with no control in the north (sub-06 moves south; a northern patient is added).
    tsv = TSV.replace("sub-06\tcontrol\t33\tnorth", "sub-06\tcontrol\t33\tsouth") + "sub-07\tpatient\t41\tnorth\tN1\n"
    spec = {**SPEC, "factors": {"group": {}, "site": {}}, "terms": ["group*site"], "hypotheses": hypotheses}
    return study(tmp_path, tsv=tsv, spec=spec)


def test_non_estimable_hypothesis(tmp_path: Path) -> None:
    path = _empty_cell_study(tmp_path, {"group": {"main": "group"},
                                        "patients": {"compare": {"site": ["north", "south"]},
                                                     "at": {"group": "patient"}}})
    err = fails(tmp_path, path, 1, "hypothesis group is not estimable",
                "no participant has group=control, site=north")
    assert "hypothesis patients" not in err  # the estimable one is not blamed


@pytest.mark.parametrize("at, code, fragments", [
    ({"site": ["north", "west"]}, 2, ["$.hypotheses.h.at.site[1]", "'west' is not a level of site"]),
    ({"site": ["north", 3]}, 2, ["$.hypotheses.h.at.site[1]", "not of type 'string'"]),
    ({"site": []}, 2, ["$.hypotheses.h.at.site", "non-empty"]),
    ({"site": ["north", "north"]}, 2, ["$.hypotheses.h.at.site", "non-unique"]),
    ({"site": True}, 2, ["$.hypotheses.h.at.site", "a factor level (text), a list of levels, or a covariate value"]),
    ({"age": ["north"]}, 2, ["$.hypotheses.h.at.age", "expected a number for covariate age, found ['north']"]),
    ({"group": "patient"}, 2, ["$.hypotheses.h.at.group", "group is the factor this compare hypothesis is about"]),
])
def test_bad_at(tmp_path: Path, at: dict, code: int, fragments: list[str]) -> None:
    spec = {**SPEC, "factors": {"group": {}, "site": {}}, "terms": ["group", "site", "age"],
            "hypotheses": {"h": {"compare": {"group": ["patient", "control"]}, "at": at}}}
    fails(tmp_path, study(tmp_path, spec=spec), code, *fragments)


def test_main_effect_held_at_one_of_its_own_levels(tmp_path: Path) -> None:
    spec = {**SPEC, "hypotheses": {"h": {"main": "group", "at": {"group": "patient"}}}}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "$.hypotheses.h.at.group",
          "give a list of at least two of its levels, or remove it")


def test_hypothesis_that_vanishes(tmp_path: Path) -> None:
    spec = {**SPEC, "factors": {"group": {}, "site": {}}, "terms": ["group", "site"],
            "hypotheses": {"gs": {"interaction": ["group", "site"]}}}
    fails(tmp_path, study(tmp_path, spec=spec), 1, "hypothesis gs", "group:site is not among the terms")


def test_slope_of_a_covariate_not_in_the_model(tmp_path: Path) -> None:
    spec = {**SPEC, "terms": ["group"], "hypotheses": {"age": {"slope": "age"}}}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "hypotheses.age.slope", "'age'")


def test_unknown_level_in_a_hypothesis(tmp_path: Path) -> None:
    spec = {**SPEC, "hypotheses": {"h": {"compare": {"group": ["patient", "controls"]}}}}
    fails(tmp_path, study(tmp_path, spec=spec), 2, "'controls'", "patient")


def test_fit_outcome_column_missing(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path), 2, "'signal'", "not in the table", command=("fit", "--outcome", "signal"))


def test_fit_outcome_not_numeric(tmp_path: Path) -> None:
    fails(tmp_path, study(tmp_path), 2, "row 1", "column 'site'", command=("fit", "--outcome", "site"))


def test_process_level_exit_code_and_no_traceback(tmp_path: Path) -> None:
    """The command as a user runs it, in its own process: a table without participant_id."""
    spec = study(tmp_path, tsv=TSV.replace("participant_id", "subject"))
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "build", str(spec), "--out", str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.startswith("groupmodel: error: ") and proc.stderr.count("\n") == 1
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "out").exists()


def test_missing_out_option_is_a_usage_error(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    with pytest.raises(SystemExit) as exc:
        cli.main(["build", str(study(tmp_path))])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--out" in err.splitlines()[-1] and "Traceback" not in err
