"""``groupmodel build`` and ``groupmodel fit --outcome`` on the example study, through the command line.

Most tests call :func:`groupmodel.cli.main` in-process (fast); one runs the command in a subprocess.
References: the participants table itself (who is included, in which order, why others are left out);
common practice for mean centring; statsmodels ``OLSResults.t_test`` for one value of results.tsv.
"""

from __future__ import annotations

import contextlib
import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from groupmodel import cli
from groupmodel.outputs.target import OUTPUT_RECORD

STUDY = Path(__file__).resolve().parents[2] / "example_study"
SPEC = STUDY / "model.json"
DESIGN_FILES = {"design.tsv", "design.json", "contrasts.tsv", "contrasts.json", "design.png", "contrasts.png",
                "dataset_description.json", "outputs.json", "participants_included.tsv", "report.html"}
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def run(*argv: str) -> tuple[int, str, str]:
    """Run the command in-process; return (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = cli.main(list(argv))
        except SystemExit as exc:  # argparse --help / usage errors
            code = int(exc.code or 0)
    return code, out.getvalue(), err.getvalue()


def read_tsv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("build") / "design"
    code, stdout, stderr = run("build", str(SPEC), "--out", str(out))
    assert code == 0, stderr
    return out, stdout


@pytest.fixture(scope="module")
def fitted(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("fit") / "roi"
    code, stdout, stderr = run("fit", str(SPEC), "--outcome", "hippocampus_signal", "--out", str(out))
    assert code == 0, stderr
    return out, stdout


@pytest.fixture(scope="module")
def table() -> pd.DataFrame:
    return read_tsv(STUDY / "participants.tsv")


def included(table: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Rows with no n/a in the given columns, in table order (the BIDS rule, applied directly)."""
    return table[~(table[columns] == "n/a").any(axis=1)]


# ------------------------------------------------------------------------------------------ build
def test_build_writes_every_file(built: tuple[Path, str]) -> None:
    out, stdout = built
    assert {p.name for p in out.iterdir()} == DESIGN_FILES | {OUTPUT_RECORD}
    for name in ("design.png", "contrasts.png"):
        assert (out / name).read_bytes()[:8] == PNG_MAGIC
    assert "wrote" in stdout
    assert not list(out.parent.glob(".*partial*"))  # the temporary folder was renamed, not left behind


def test_design_tsv_rows_and_columns(built: tuple[Path, str], table: pd.DataFrame) -> None:
    out, _ = built
    design = read_tsv(out / "design.tsv")
    sidecar = json.loads((out / "design.json").read_text())
    names = [c["name"] for c in sidecar["columns"]]
    assert list(design.columns) == ["participant_id", *names]
    assert names[0] == "intercept" and "training=sprint:chronotype=early" in names and names[-1] == "age"
    keep = included(table, ["training", "chronotype", "age"])
    assert design["participant_id"].tolist() == keep["participant_id"].tolist()  # included, in table order
    assert sidecar["n_observations"] == len(keep)
    values = design[names].astype(float).to_numpy()
    np.testing.assert_array_equal(values[:, 0], 1.0)
    age = keep["age"].astype(float).to_numpy()
    np.testing.assert_allclose(values[:, -1], age - age.mean(), atol=1e-12)  # mean centring, common practice


def test_design_json_keys(built: tuple[Path, str], table: pd.DataFrame) -> None:
    out, _ = built
    sidecar = json.loads((out / "design.json").read_text())
    for key in ("columns", "rank", "condition_number", "cell_counts", "excluded", "factors", "covariates"):
        assert key in sidecar
    assert sidecar["rank"] == len(sidecar["columns"]) == 7
    assert 1.0 <= sidecar["condition_number"] < 30
    keep = included(table, ["training", "chronotype", "age"])
    counts = sidecar["cell_counts"]
    assert set(counts) == {"training", "chronotype", "training:chronotype"}
    direct = keep.groupby(["training", "chronotype"]).size()
    assert len(counts["training:chronotype"]) == 6
    for (tr, ch), k in direct.items():
        assert counts["training:chronotype"][f"training={tr}, chronotype={ch}"] == k
    assert sum(counts["training"].values()) == len(keep)
    dropped = table[~table["participant_id"].isin(keep["participant_id"])]
    excluded = {e["participant_id"]: e["reason"] for e in sidecar["excluded"]}
    assert set(excluded) == set(dropped["participant_id"])
    for _, row in dropped.iterrows():
        missing = [c for c in ("training", "chronotype", "age") if row[c] == "n/a"]
        assert all(c in excluded[row["participant_id"]] for c in missing)
        assert "missing value" in excluded[row["participant_id"]]
    age = sidecar["covariates"]["age"]
    assert age["center"] == "mean"
    assert age["center_value"] == pytest.approx(keep["age"].astype(float).mean())


def test_contrast_files(built: tuple[Path, str]) -> None:
    out, _ = built
    design = read_tsv(out / "design.tsv")
    contrasts = read_tsv(out / "contrasts.tsv")
    assert list(contrasts.columns) == ["hypothesis", "row", *design.columns[1:]]
    sidecar = json.loads((out / "contrasts.json").read_text())
    spec = json.loads(SPEC.read_text())
    assert list(sidecar["hypotheses"]) == list(spec["hypotheses"])
    rows_per = contrasts.groupby("hypothesis", sort=False).size()
    for name, h in sidecar["hypotheses"].items():
        for key in ("test", "rows", "tail", "statement", "estimable"):
            assert key in h, (name, key)
        assert h["estimable"] is True
        assert rows_per[name] == h["rows"]
        assert ("weights_over_cells" in h) or ("slope_weights_over_cells" in h)
        assert h["test"] == ("F" if "main" in spec["hypotheses"][name] or "interaction" in spec["hypotheses"][name]
                             else "t")
    assert sidecar["hypotheses"]["training"]["rows"] == 2
    assert sidecar["hypotheses"]["sprint_vs_rest"]["tail"] == "greater"
    assert "averaged equally over chronotype" in sidecar["hypotheses"]["training"]["statement"]


def test_build_prints_statements(built: tuple[Path, str]) -> None:
    _, stdout = built
    assert "mean(training=sprint) - mean(training=rest) = 0" in stdout
    assert "excluded 3" in stdout


def test_existing_output_needs_force(tmp_path: Path) -> None:
    out = tmp_path / "design"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    code, _, stderr = run("build", str(SPEC), "--out", str(out), "--no-pictures")
    assert code == 2
    assert "--force" in stderr and stderr.count("\n") == 1
    assert [p.name for p in out.iterdir()] == ["keep.txt"]  # untouched
    code, _, stderr = run("build", str(SPEC), "--out", str(out), "--no-pictures", "--force")
    assert code == 2 and "not a groupmodel output" in stderr  # --force replaces only groupmodel's own folders
    assert [p.name for p in out.iterdir()] == ["keep.txt"]
    (out / "keep.txt").unlink()
    assert run("build", str(SPEC), "--out", str(out), "--no-pictures")[0] == 0
    code, _, stderr = run("build", str(SPEC), "--out", str(out), "--no-pictures", "--force")
    assert code == 0, stderr
    assert {p.name for p in out.iterdir()} == {"design.tsv", "design.json", "contrasts.tsv", "contrasts.json",
                                               "dataset_description.json", "outputs.json", "participants_included.tsv",
                                               "report.html", OUTPUT_RECORD}
    empty = tmp_path / "empty"
    empty.mkdir()
    code, _, _ = run("build", str(SPEC), "--out", str(empty), "--no-pictures")
    assert code == 0  # an existing empty folder is fine without --force


def test_help_texts_have_examples() -> None:
    code, stdout, _ = run("--help")
    assert code == 0
    assert "examples:" in stdout and "groupmodel build example_study/model.json --out" in stdout
    assert "exit codes" in stdout
    code, stdout, _ = run("build", "--help")
    assert code == 0
    assert "example" in stdout and "groupmodel build " in stdout
    for option in ("--out", "--force", "--no-pictures"):
        assert option in stdout
    code, stdout, _ = run("fit", "--help")
    assert code == 0
    assert "--outcome" in stdout and "groupmodel fit example_study/model.json --outcome" in stdout


def test_console_command_in_a_subprocess(tmp_path: Path) -> None:
    out = tmp_path / "design"
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "build", str(SPEC), "--out", str(out),
                           "--no-pictures"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert (out / "design.tsv").exists() and (out / "contrasts.json").exists()


# ------------------------------------------------------------------------------------------ fit --outcome
def test_fit_outcome_writes_results(fitted: tuple[Path, str], table: pd.DataFrame) -> None:
    out, stdout = fitted
    assert DESIGN_FILES | {"results.tsv", "results.json"} <= {p.name for p in out.iterdir()}
    results = read_tsv(out / "results.tsv")
    wanted = ["hypothesis", "test", "estimate", "se", "statistic", "df1", "df2", "p", "z"]
    assert [c for c in results.columns if c in wanted] == wanted
    assert results.columns[0] == "hypothesis"
    spec = json.loads(SPEC.read_text())
    assert results["hypothesis"].tolist() == list(spec["hypotheses"])
    keep = included(table, ["training", "chronotype", "age", "hippocampus_signal"])
    df2 = len(keep) - 7
    for _, row in results.iterrows():
        assert int(row["df2"]) == df2
        if row["test"] == "F":
            assert row["estimate"] == "n/a" and row["se"] == "n/a"
        else:
            assert int(row["df1"]) == 1  # t with v df is F(1, v)
            assert float(row["se"]) > 0
        assert 0 < float(row["p"]) <= 1
        assert row["hypothesis"] in stdout  # the same table printed readably
    assert int(results.set_index("hypothesis").loc["training", "df1"]) == 2
    assert "sub-013" in stdout  # left out for n/a in the outcome, and said so


def test_fit_outcome_value_equals_statsmodels(fitted: tuple[Path, str], table: pd.DataFrame) -> None:
    import statsmodels.formula.api as smf

    out, _ = fitted
    results = read_tsv(out / "results.tsv").set_index("hypothesis")
    keep = included(table, ["training", "chronotype", "age", "hippocampus_signal"]).copy()
    keep["age"] = keep["age"].astype(float)
    keep["y"] = keep["hippocampus_signal"].astype(float)
    res = smf.ols("y ~ C(training, Sum)*C(chronotype, Sum) + age", keep).fit()
    tt = res.t_test("age = 0")  # Reference: statsmodels OLSResults.t_test
    assert float(results.loc["age", "statistic"]) == pytest.approx(float(tt.tvalue[0, 0]), rel=1e-8)
    assert float(results.loc["age", "estimate"]) == pytest.approx(float(tt.effect[0]), rel=1e-8)
