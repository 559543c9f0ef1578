"""The command line on the example study's mixed design (example_study/sessions): build and fit say where each
hypothesis is tested and, with permutations, what was rearranged; the files record the same.

Reference: the README section "Within-participant factors" (strata, files, methods), and for the numbers the
table-level fit, checked against scipy and statsmodels in tests/reference/test_within_reference.py.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
from test_cli_build import run

SESSIONS = Path(__file__).resolve().parents[2] / "example_study" / "sessions"


def test_build_names_the_strata(tmp_path: Path) -> None:
    code, out, err = run("build", str(SESSIONS / "model.json"), "--out", str(tmp_path / "b"), "--no-pictures")
    assert code == 0, err
    assert "[tested in the between stratum on each participant's average" in out
    assert "[tested in the within stratum on each participant's contrast of session" in out
    side = json.loads((tmp_path / "b" / "design.json").read_text())
    assert side["observations"].endswith("observations.tsv")
    assert side["strata"]["hypotheses"]["trained_vs_control_at_post"]["stratum"] == "mixed"


def test_fit_images_with_permutations_records_the_method(tmp_path: Path) -> None:
    out_dir = tmp_path / "f"
    code, out, err = run("fit", str(SESSIONS / "model.json"), "--out", str(out_dir), "--no-pictures",
                         "--permutations", "40", "--seed", "3")
    assert code == 0, err
    assert "session: sign flips" in out and "within stratum: sign flips of each participant's" in out
    assert "group: row permutation" in out and "between stratum: permutations of whole participants" in out
    side = json.loads((out_dir / "hypotheses" / "session" / "p_perm.json").read_text())
    assert side["method"] == "sign_flip" and side["stratum"] == "within"
    assert side["stratum_test"]["transformed_data"].startswith("each participant's contrast of session")
    assert side["rearranged"].startswith("sign flips") and side["df2"] == 13
    summary = json.loads((out_dir / "summary.json").read_text())
    assert summary["inference"]["method"]["group"] == "permutation"


def test_fit_outcome_writes_strata_columns(tmp_path: Path) -> None:
    obs = pd.read_csv(SESSIONS / "observations.tsv", sep="\t")
    obs["roi"] = [round(0.1 * i + (s == "post") * 0.5, 3) for i, s in enumerate(obs.session)]
    for name in ("participants.tsv", "model.json"):
        (tmp_path / name).write_text((SESSIONS / name).read_text())
    obs.to_csv(tmp_path / "observations.tsv", sep="\t", index=False)
    code, out, err = run("fit", str(tmp_path / "model.json"), "--outcome", "roi", "--out", str(tmp_path / "r"),
                         "--no-pictures")
    assert code == 0, err
    table = pd.read_csv(tmp_path / "r" / "results.tsv", sep="\t")
    assert list(table.columns[:3]) == ["hypothesis", "stratum", "test"]
    assert {"epsilon_gg", "epsilon_hf", "p_gg", "participants"} <= set(table.columns)
    side = json.loads((tmp_path / "r" / "results.json").read_text())
    assert side["strata"]["group"]["stratum"] == "between"
    report = (tmp_path / "r" / "report.html").read_text()
    assert "each hypothesis is tested in its error stratum" in report and 'id="strata"' in report
    assert "p_hf" in table.columns and "cohens_d" in table.columns
