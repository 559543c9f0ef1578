"""A rank-deficient design through the command line: ``build``, ``fit`` (table and images, with permutations) and
``check`` run, warn, and test what the observed cells determine.

The study is the one of tests/reference/test_rank_deficient_reference.py (drink x scanner, caffeine/C empty),
where the statistics are compared with statsmodels.  References here: the table itself (n), plain algebra
(residual df = n - rank, rank 6 = five observed cells + age), and the statsmodels table fit of that module.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pandas as pd
import pytest
from test_cli_build import run

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "reference"))
from rank_deficient_study import image_study, reference, table, write  # noqa: E402


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, pd.DataFrame]:
    root = tmp_path_factory.mktemp("rankdef")
    spec, frame, _ = image_study(root)
    return spec, frame


def test_build_warns_and_writes(study, tmp_path: Path) -> None:
    spec, frame = study
    code, out, err = run("build", str(spec), "--out", str(tmp_path / "design"), "--no-pictures")
    assert code == 0, err
    assert err == ""
    assert ("warning: the design has rank 6 with 7 columns because no participant has drink=caffeine, "
            "scanner=C: in the observed rows column drink=caffeine:scanner=B equals") in out
    assert f"n - rank = {len(frame) - 6} residual degrees of freedom" in out
    sidecar = json.loads((tmp_path / "design" / "design.json").read_text())
    assert sidecar["rank"] == 6 and len(sidecar["columns"]) == 7
    assert sidecar["condition_number"] in ("inf", float("inf"))  # a singular design, not 1/rounding error
    assert "rank_deficient" in {f["code"] for f in sidecar["findings"]}
    contrasts = json.loads((tmp_path / "design" / "contrasts.json").read_text())["hypotheses"]
    assert all(h["estimable"] for h in contrasts.values())
    assert contrasts["drink_over_AB"]["statement"].startswith(
        "mean(drink=caffeine) = mean(drink=placebo), averaged equally over scanner A, B")


def test_table_fit(study, tmp_path: Path) -> None:
    spec, frame = study
    code, out, err = run("fit", str(spec), "--outcome", "score", "--out", str(tmp_path / "roi"))
    assert code == 0, err
    res = pd.read_csv(tmp_path / "roi" / "results.tsv", sep="\t").set_index("hypothesis")
    assert (res["df2"] == len(frame) - 6).all()
    ref = reference(frame, frame["score"].to_numpy())  # statsmodels
    assert res.loc["caffeine_at_A", "statistic"] == pytest.approx(ref["caffeine_at_A"]["statistic"], rel=1e-6)


def test_image_fit_with_permutations(study, tmp_path: Path) -> None:
    spec, frame = study
    code, out, err = run("fit", str(spec), "--out", str(tmp_path / "maps"), "--permutations", "20", "--seed", "2",
                         "--tfce")
    assert code == 0, err
    assert "warning: the design has rank 6 with 7 columns" in err
    summary = json.loads((tmp_path / "maps" / "summary.json").read_text())
    text = json.dumps(summary)
    assert str(len(frame) - 6) in text
    sidecar = json.loads((tmp_path / "maps" / "hypotheses/caffeine_at_A/p_fwe.json").read_text())
    assert sidecar["df2"] == len(frame) - 6 and sidecar["permutations"] == 20


def test_non_estimable_hypothesis_is_refused_with_what_can_be_tested(tmp_path: Path) -> None:
    spec = write(tmp_path, "effect", table())
    body = json.loads(spec.read_text())
    body["hypotheses"] = {"drink": {"main": "drink"}, "caffeine_at_C": {"compare": {"drink": ["caffeine", "placebo"]},
                                                                       "at": {"scanner": "C"}}}
    spec.write_text(json.dumps(body))
    code, out, err = run("build", str(spec), "--out", str(tmp_path / "design"))
    assert code == 1 and err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "design").exists()
    assert ("hypothesis drink is not estimable: no participant has drink=caffeine, scanner=C; estimable instead: "
            "mean(drink=caffeine) = mean(drink=placebo), averaged equally over scanner A, B "
            '("at": {"scanner": ["A", "B"]}); or the same hypothesis in a model without the interaction '
            "drink:scanner, which assumes that interaction is absent") in err
    assert ("hypothesis caffeine_at_C is not estimable: no participant has drink=caffeine, scanner=C; estimable "
            "instead: mean(drink=caffeine) - mean(drink=placebo) = 0, averaged equally over scanner A, B "
            '("at": {"scanner": ["A", "B"]})') in err
    # Every suggestion is estimable: take the first one and the build succeeds.
    body["hypotheses"] = {"drink": {"main": "drink", "at": {"scanner": ["A", "B"]}}}
    spec.write_text(json.dumps(body))
    assert run("build", str(spec), "--out", str(tmp_path / "design"), "--no-pictures")[0] == 0


def test_check_warns_on_rank_and_refuses_only_non_estimable_contrasts(study, tmp_path: Path) -> None:
    spec, frame = study
    assert run("build", str(spec), "--out", str(tmp_path / "design"), "--no-pictures")[0] == 0
    design = tmp_path / "design" / "design.tsv"
    args = ["check", "--design", str(design), "--participants", str(spec.parent / "participants.tsv"),
            "--factors", "drink,scanner", "--covariates", "age"]
    code, out, err = run(*args, "--contrasts", str(tmp_path / "design" / "contrasts.tsv"))
    assert code == 0, out + err
    assert "warning: the design has rank 6 with 7 columns" in out and "generalised inverse" in out
    assert "tests: mean(drink=caffeine) - mean(drink=placebo) = 0, averaged equally over scanner A, B" in out
    columns = pd.read_csv(design, sep="\t").columns[1:]
    bad = tmp_path / "bad.tsv"
    bad.write_text("name\t" + "\t".join(columns) + "\n" + "drink_columns_alone\t" + "\t".join(
        "1" if c == "drink=caffeine" else "0" for c in columns) + "\n")
    code, out, err = run(*args, "--contrasts", str(bad))
    assert code == 1
    assert "error: contrast drink_columns_alone [t]" in out and "is not estimable" in out
