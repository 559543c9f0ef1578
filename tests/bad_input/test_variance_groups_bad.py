"""Bad ``variance_groups``: one line naming ``$.variance_groups`` (or the inference setting), the right exit code,
nothing written."""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

from groupmodel import cli
from groupmodel.errors import InputError
from groupmodel.inference.freedman_lane import moves_with_mean, partition

TSV = "participant_id\tgroup\tsex\tscore\n" + "".join(
    f"sub-{i:02d}\t{g}\t{s}\t{v}\n" for i, (g, s, v) in enumerate(
        [("patient", "f", 1.2), ("control", "m", 0.4), ("patient", "m", 2.5), ("control", "f", 0.1),
         ("control", "m", 0.9), ("control", "f", 0.3), ("patient", "f", 0.7), ("control", "m", 0.2)], start=1))
SPEC = {"participants": "participants.tsv",
        "factors": {"group": {"levels": ["patient", "control"]}, "sex": {"levels": ["f", "m"]}},
        "terms": ["group"], "hypotheses": {"group": {"compare": {"group": ["patient", "control"]}}},
        "variance_groups": "group"}


def _run(tmp_path: Path, spec: dict, tsv: str = TSV, command: tuple[str, ...] = ("build",)) -> tuple[int, str]:
    (tmp_path / "participants.tsv").write_text(tsv)
    (tmp_path / "model.json").write_text(json.dumps(spec))
    out = tmp_path / "out"
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        code = cli.main([*command, str(tmp_path / "model.json"), "--out", str(out)])
    err = stderr.getvalue()
    assert err.count("\n") == 1 and err.startswith("groupmodel: error: "), err
    assert "Traceback" not in err + stdout.getvalue()
    assert not out.exists()
    return code, err


def test_good_spec_fits(tmp_path: Path) -> None:
    (tmp_path / "participants.tsv").write_text(TSV)
    (tmp_path / "model.json").write_text(json.dumps(SPEC))
    with contextlib.redirect_stdout(io.StringIO()) as out:
        assert cli.main(["fit", str(tmp_path / "model.json"), "--outcome", "score", "--out", str(tmp_path / "o"),
                         "--no-pictures"]) == 0
    assert "Welch's v" in out.getvalue()


@pytest.mark.parametrize("value", ["sex", "age", "score"])
def test_not_a_factor_of_the_model(tmp_path: Path, value: str) -> None:
    code, err = _run(tmp_path, {**SPEC, "variance_groups": value})
    assert code == 2 and "$.variance_groups: expected a factor of the model ['group']" in err, err


def test_not_text(tmp_path: Path) -> None:
    code, err = _run(tmp_path, {**SPEC, "variance_groups": ["group"]})
    assert code == 2 and "$.variance_groups" in err, err


def test_group_without_residual_df(tmp_path: Path) -> None:
    # one patient only: the design fits that row exactly, so the group has no variance of its own
    tsv = TSV.replace("sub-03\tpatient", "sub-03\tcontrol").replace("sub-07\tpatient", "sub-07\tcontrol")
    code, err = _run(tmp_path, SPEC, tsv=tsv)
    assert code == 1 and "$.variance_groups: group 'patient' of 'group' has 1 observation(s)" in err, err


def test_group_whose_cells_have_one_row_each(tmp_path: Path) -> None:
    # two patients in a group x sex design, one female and one male: each patient cell has one row, which the
    # design fits exactly, so the group has two rows but no residual df
    spec = {**SPEC, "terms": ["group*sex"]}
    tsv = TSV.replace("sub-07\tpatient\tf", "sub-07\tcontrol\tf")
    code, err = _run(tmp_path, spec, tsv=tsv)
    assert code == 1 and "group 'patient' of 'group' has 2 observation(s) and 0 residual df" in err, err


def test_explicit_permutation_of_the_variance_groups_is_refused() -> None:
    from groupmodel.analysis.welch_inference import welch_method

    class H:
        name, on_slopes, cell_weights = "group", False, np.array([[1.0, -1.0]])

    x = np.column_stack([np.ones(8), np.repeat([1.0, 0.0], 4)])
    part = partition(x, [0, 1], "t")
    assert welch_method(H, "auto", False, moves_with_mean(part)) == "flip"
    with pytest.raises(InputError, match="permutation within the variance groups cannot test it"):
        welch_method(H, "permutation", False, moves_with_mean(part))


def test_which_hypotheses_permutation_within_groups_can_test() -> None:
    """Unbalanced groups with a covariate: a group difference is (mostly) constant within the groups, a sex
    difference or the covariate's slope is not."""
    from groupmodel.analysis.welch_inference import _moves_within

    rng = np.random.default_rng(0)
    groups = np.repeat([0, 1, 2], [6, 11, 9])
    sex = np.arange(26) % 2
    age = rng.normal(40, 10, 26) + 3 * groups
    x = np.column_stack([np.ones(26), groups == 1, groups == 2, sex, age - age.mean()])
    assert not _moves_within(partition(x, [[0, 1, 0, 0, 0], [0, 0, 1, 0, 0]], "F").interest, groups)
    assert not _moves_within(partition(x, [[0, 1, 0, 0, 0], [0, 0, 0, 1, 0]], "F").interest, groups)
    assert _moves_within(partition(x, [0, 0, 0, 1, 0], "t").interest, groups)
    assert _moves_within(partition(x, [0, 0, 0, 0, 1], "t").interest, groups)
