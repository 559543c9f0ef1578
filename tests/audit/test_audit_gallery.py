"""The gallery of hand-written file sets: each faulty set has exactly one fault, each correct set none.

Every case folder under ``gallery/`` holds participants.tsv, a design file, a contrast file (and a spec or an
image list where the fault needs one) and ``case.json``: the command-line arguments, the expected exit code,
and the findings that must appear (code, severity and key wording).  Correct sets (``"clean": true``) must give
no error and no warning.  Each case is run through ``groupmodel.cli.main`` with ``--json``, so the exit codes
and the JSON report are tested on the way.

The expected findings are what a reader who knows the fault would say (a rank-deficient design names the
column that equals a combination of others, and so on: common practice in linear-model texts); the numbers
in them (a standardized difference of 5.23, a mean age of 34.72) were computed by hand from the table.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from groupmodel.cli import main

GALLERY = Path(__file__).parent / "gallery"
CASES = sorted(p.name for p in GALLERY.iterdir() if (p / "case.json").exists())


def _run(case: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[int, dict, str, dict]:
    folder = GALLERY / case
    spec = json.loads((folder / "case.json").read_text())
    args = spec["args"]
    argv = ["check", "--design", str(folder / args["design"]), "--participants", str(folder / "participants.tsv")]
    for key in ("contrasts", "spec", "images"):
        if args.get(key):
            argv += [f"--{key}", str(folder / args[key])]
    for key in ("factors", "covariates"):
        if args.get(key):
            argv += [f"--{key}", args[key]]
    out = tmp_path / "report.json"
    code = main(argv + ["--json", str(out)])
    text = capsys.readouterr().out
    return code, json.loads(out.read_text()), text, spec


def test_gallery_is_complete():
    """All kinds of finding (the first issue's eight, then the reviewer's) have a faulty set; correct sets exist."""
    kinds = {
        1: {"row_count", "contrast_width", "ragged_contrast", "not_numeric", "not_finite"},
        2: {"rank_deficient", "collinear"},
        3: {"not_estimable", "dependent_rows"},
        4: {"unexplained_column"},
        5: {"main_effect_at_reference", "weights_not_sum_zero", "not_a_cell_mean"},
        6: {"rows_swapped", "row_typo", "images_out_of_order", "rows_sorted_by_factor", "rows_sorted_by_two_factors",
            "rows_sorted_one_factor", "rows_block_moved", "rows_shifted_by_one", "rows_and_images_sorted",
            "rows_sorted_images_in_table_order", "rows_block_reversed",
            "rows_shifted_no_covariate"},
        7: {"spec_column_space", "spec_name_mismatch"},
        8: {"uncentred_interaction", "confounded_covariate"},
        # the reviewer's gallery: no intercept, extra rows located, wording, partial F tests, rounded codes
        9: {"no_intercept", "extra_rows_excluded", "extra_row_duplicate", "marginal_mean_half_coding",
            "unexplained_named_factors", "short_first_contrast", "partial_main_effect", "correct_rounded_polynomial"},
        # covariates: centred within groups, the wrong column pasted
        10: {"covariate_centred_within", "covariate_wrong_column", "covariate_wrong_column_named"},
        # several images per participant in one model: ids repeated, participant columns, rows repeated
        11: {"repeated_ids", "repeated_participant_columns", "repeated_rows_no_ids", "correct_participant_averages"},
        # rounding noise left out of dependent-column explanations
        12: {"dependent_column_rounded_codes"},
        # a +/-0.5 column unrelated to the factors: unexplained, not miscoded rows
        13: {"unexplained_half_column"},
    }
    for kind, cases in kinds.items():
        assert cases <= set(CASES), (kind, cases - set(CASES))
    assert sum(c.startswith("correct") for c in CASES) >= 3


@pytest.mark.parametrize("case", CASES)
def test_gallery_case(case: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, report, text, spec = _run(case, tmp_path, capsys)
    assert code == spec["exit"], text
    assert report["summary"]["exit_code"] == code
    findings = report["findings"]
    for want in spec["expect"]:
        hits = [f for f in findings if f["code"] == want["code"]]
        assert hits, f"{case}: no {want['code']} finding in\n{text}"
        assert any(f["severity"] == want["severity"] and all(w in f["message"] for w in want["contains"])
                   and not any(w in f["message"] for w in want.get("lacks", ()))
                   for f in hits), f"{case}: {want} not matched by {hits}"
        # The terminal report shows the same finding with its severity, one line each.
        assert any(line.strip().startswith(f"{want['severity']}: ") and want["contains"][0] in line
                   for line in text.splitlines())
    for code in spec.get("absent", ()):
        assert not [f for f in findings if f["code"] == code], f"{case}: a {code} finding in\n{text}"
    bad = [f for f in findings if f["severity"] in ("error", "warning")]
    if spec["clean"]:
        assert not bad, f"{case}: a correct set gave {bad}"
    else:
        assert bad, f"{case}: a faulty set was accepted without a warning or error"



def test_wrong_covariate_column_is_one_finding(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A column holding another table column than --covariates names is said once, not also as unexplained."""
    _, report, _, _ = _run("covariate_wrong_column_named", tmp_path, capsys)
    codes = [f["code"] for f in report["findings"] if f["severity"] == "warning"]
    assert codes == ["covariate_mismatch"]
