"""Unit tests of ``groupmodel check``: reading files, recognising codings, exit codes, the JSON report.

References: the coding values are R's contr.* matrices as listed in REFERENCES.md (orthogonal polynomials for 3
levels (-0.7071068, 0, 0.7071068) and (0.4082483, -0.8164966, 0.4082483), i.e. (-1, 0, 1) and (1, -2, 1) up to
scale: from memory and computed with patsy); within-group centring and z-scores are common practice.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from groupmodel.audit import audit
from groupmodel.audit.read import participant_in_path, read_matrix
from groupmodel.cli import main
from groupmodel.errors import TableError

GALLERY = Path(__file__).parent / "gallery"

# A small table: dose (3 ordered levels), group (2 levels), a covariate x.
DOSE = ["low", "mid", "high"] * 4
GROUP = ["a"] * 6 + ["b"] * 6
X = [31.0, 44.0, 27.0, 38.0, 25.0, 49.0, 35.0, 41.0, 29.0, 46.0, 33.0, 24.0]


@pytest.fixture()
def table(tmp_path: Path) -> Path:
    path = tmp_path / "participants.tsv"
    lines = ["participant_id\tdose\tgroup\tx"] + [
        f"sub-{i + 1:02d}\t{d}\t{g}\t{x:g}" for i, (d, g, x) in enumerate(zip(DOSE, GROUP, X, strict=True))]
    path.write_text("\n".join(lines) + "\n")
    (tmp_path / "participants.json").write_text(json.dumps({"dose": {"Levels": {"low": "", "mid": "", "high": ""}}}))
    return path


def _design(tmp_path: Path, columns: list[list[float]], name: str = "design.txt") -> Path:
    path = tmp_path / name
    rows = np.array(columns, dtype=float).T
    path.write_text("".join(" ".join(f"{v:.10g}" for v in r) + "\n" for r in rows))
    return path


def _descriptions(report) -> list[str]:  # type: ignore[no-untyped-def]
    return [c.description for c in report.columns]


# ----------------------------------------------------------------------------------------------- reading
def test_read_csv_with_header_comments_and_labels(tmp_path: Path) -> None:
    path = tmp_path / "c.csv"
    path.write_text("# weights\ncontrast, a, b\n\"one\", 1, -1\n# mid comment\ntwo, 0.333, 0.5\n")
    m = read_matrix(path, "contrasts")
    assert m.names == ["a", "b"] and m.labels == ["one", "two"] and m.lines == [3, 5]
    assert np.array_equal(m.values, [[1, -1], [0.333, 0.5]])
    assert m.entry_tolerance([1]) == pytest.approx(0.0005 * 1.01)  # 0.333 is rounded; 0.5 is exact
    assert m.entry_tolerance([0]) < 1e-9


def test_read_whitespace_with_id_column_and_bad_entries(tmp_path: Path) -> None:
    path = tmp_path / "d.txt"
    path.write_text("sub-01 1 0\nsub-02 1 x\nsub-03 1 inf\n")
    m = read_matrix(path, "design")
    assert m.ids == ["sub-01", "sub-02", "sub-03"] and m.names is None
    codes = [p.code for p in m.problems]
    assert codes == ["not_numeric", "not_finite"]
    assert "d.txt line 2 (row 2), column 2: expected a number, found 'x'" in m.problems[0].message
    assert not m.complete


@pytest.mark.parametrize("text", ["", "# only a comment\n", "a\tb\n"])
def test_unreadable_design_is_an_input_error(tmp_path: Path, text: str) -> None:
    path = tmp_path / "d.txt"
    path.write_text(text)
    with pytest.raises(TableError, match="--design"):
        read_matrix(path, "design")


def test_participant_in_path() -> None:
    assert participant_in_path("/data/sub-07/anat/sub-07_effect.nii.gz") == "sub-07"
    assert participant_in_path("maps/effect_12.nii") is None


# ----------------------------------------------------------------------------------------------- codings
def test_polynomial_typed_as_integers(tmp_path: Path, table: Path) -> None:
    lin = {"low": -1, "mid": 0, "high": 1}
    quad = {"low": 1, "mid": -2, "high": 1}
    cols = [[1] * 12, [lin[d] for d in DOSE], [quad[d] for d in DOSE]]
    report = audit(_design(tmp_path, cols), participants=table, factors=["dose"])
    d = _descriptions(report)
    assert d[1] == "linear polynomial of dose (scores 1, 2, 3) = -1, 0, 1"
    assert d[2] == "quadratic polynomial of dose (scores 1, 2, 3) = 1, -2, 1"
    assert any("dose: orthogonal polynomial coding (linear, quadratic; level scores low 1, mid 2, high 3)"
               in f.message for f in report.findings)


def test_half_effect_coding_and_treatment(tmp_path: Path, table: Path) -> None:
    cols = [[1] * 12, [0.5 if g == "a" else -0.5 for g in GROUP], [float(d == "mid") for d in DOSE],
            [float(d == "high") for d in DOSE]]
    report = audit(_design(tmp_path, cols), participants=table, factors=["dose", "group"])
    d = _descriptions(report)
    assert d[1] == "effect coding of group: +1 at a, -1 at the reference b, 0 elsewhere (times 0.5)"
    assert d[2] == "treatment coding of dose: 1 at mid, 0 elsewhere (reference low)"
    assert report.exit_code == 0 and not report.warnings


def test_covariate_centrings(tmp_path: Path, table: Path) -> None:
    x = np.array(X)
    g = np.array(GROUP)
    within = x - np.where(g == "a", x[g == "a"].mean(), x[g == "b"].mean())
    cols = [[1] * 12, [1 if v == "a" else -1 for v in GROUP], list(within), list((x - x.mean()) / x.std(ddof=1)),
            list(x - 30)]
    report = audit(_design(tmp_path, cols), participants=table, factors=["group"], covariates=["x"])
    d = _descriptions(report)
    assert d[2] == "covariate x (centred within each level of group)"
    assert d[3] == "covariate x (centred at its mean 35.17), divided by its SD"
    assert d[4] == "covariate x (centred at 30, not at its mean 35.17)"


def test_constant_mixed_and_unexplained_columns(tmp_path: Path, table: Path) -> None:
    x = np.array(X)
    mixed = x + np.array([3.0 if d == "low" else 0.0 for d in DOSE])  # a covariate plus a level offset
    cols = [[2] * 12, list(mixed), [0.1, 0.5, 0.2, 0.9, 0.3, 0.7, 0.4, 0.8, 0.6, 0.15, 0.25, 0.35]]
    report = audit(_design(tmp_path, cols), participants=table, factors=["dose"], covariates=["x"])
    kinds = [c.kind for c in report.columns]
    assert kinds == ["constant", "covariate_mixed", "unexplained"]
    assert {"column_mixed", "column_unexplained"} <= set(report.codes("warning"))


def test_factors_found_without_options(tmp_path: Path, table: Path) -> None:
    cols = [[1] * 12, [1 if v == "a" else -1 for v in GROUP], list(np.array(X) - np.mean(X))]
    report = audit(_design(tmp_path, cols), participants=table)
    assert report.factors == ["group"] and report.covariates == ["x"]
    assert {"factors_found", "covariates_found"} <= set(report.codes("note"))


def test_rows_after_missing_values(tmp_path: Path, table: Path) -> None:
    text = table.read_text().replace("sub-03\thigh\ta\t27", "sub-03\thigh\ta\tn/a")
    table.write_text(text)
    keep = [i for i in range(12) if i != 2]
    cols = [[1] * 11, [1 if GROUP[i] == "a" else -1 for i in keep]]
    report = audit(_design(tmp_path, cols), participants=table, factors=["group"], covariates=["x"])
    assert "rows_after_na" in report.codes("note") and report.exit_code == 0
    assert any("sub-03" in f.message for f in report.findings if f.code == "rows_after_na")


def test_participant_ids_in_any_order(tmp_path: Path, table: Path) -> None:
    order = [5, 0, 11, 3, 8, 1, 10, 2, 7, 4, 9, 6]
    path = tmp_path / "design.tsv"
    path.write_text("participant_id\tintercept\tgroup\n" + "".join(
        f"sub-{i + 1:02d}\t1\t{1 if GROUP[i] == 'a' else -1}\n" for i in order))
    report = audit(path, participants=table, factors=["group"])
    assert report.exit_code == 0 and not report.warnings, report.format()


# ----------------------------------------------------------------------------------------------- CLI
def test_exit_codes(tmp_path: Path, table: Path, capsys: pytest.CaptureFixture[str]) -> None:
    good = GALLERY / "correct_effect"
    base = ["check", "--participants", str(good / "participants.tsv"), "--factors", "diet,sleep"]
    assert main(base + ["--design", str(good / "design.txt"), "--contrasts", str(good / "contrasts.txt")]) == 0
    bad = GALLERY / "not_estimable"
    assert main(["check", "--design", str(bad / "design.txt"), "--contrasts", str(bad / "contrasts.txt"),
                 "--participants", str(bad / "participants.tsv")]) == 1
    assert main(base + ["--design", str(tmp_path / "missing.txt")]) == 2
    assert "groupmodel: error: --design" in capsys.readouterr().err
    assert main(base[:3] + ["--factors", "diet,mood", "--design", str(good / "design.txt")]) == 2
    err = capsys.readouterr().err
    assert "--factors: column 'mood' is not in participants.tsv" in err and err.count("\n") == 1
    assert main(["check", "--design", str(good / "design.txt"), "--participants", str(tmp_path / "no.tsv")]) == 2
    (tmp_path / "bad.json").write_text("{not json")
    assert main(["check", "--design", str(good / "design.txt"), "--participants", str(good / "participants.tsv"),
                 "--spec", str(tmp_path / "bad.json")]) == 2


def test_json_report_and_images(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    case = GALLERY / "correct_effect"
    ids = [ln.split("\t")[0] for ln in (case / "participants.tsv").read_text().splitlines()[1:]]
    images = tmp_path / "images.txt"
    images.write_text("".join(f"/data/{p}/{p}_effect.nii.gz\n" for p in ids))
    out = tmp_path / "r.json"
    code = main(["check", "--design", str(case / "design.txt"), "--contrasts", str(case / "contrasts.txt"),
                 "--participants", str(case / "participants.tsv"), "--factors", "diet,sleep", "--covariates", "age",
                 "--images", str(images), "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0
    report = json.loads(out.read_text())
    assert set(report) >= {"findings", "columns", "contrasts", "summary", "thresholds"}
    assert all(set(f) == {"section", "severity", "code", "message"} for f in report["findings"])
    assert "image_order_ok" in {f["code"] for f in report["findings"]}
    diet = next(c for c in report["contrasts"] if c["name"] == "diet")
    assert diet["test"] == "F" and diet["statement"].startswith("the main effect of diet")
    # Terminal report: section headings and one finding per line with its severity.
    assert "What each column encodes" in text and "Rows, participants and images" in text
    assert text.strip().splitlines()[-2].startswith("summary: 0 errors")


def test_fast_vif_equals_regression_vif() -> None:
    """The one-inverse VIF equals the regression form of the definition (common practice)."""
    from groupmodel.engine.linalg import variance_inflation, variance_inflation_by_regression

    rng = np.random.default_rng(3)
    a = rng.normal(size=40)
    x = np.column_stack([np.ones(40), a, a + 0.2 * rng.normal(size=40), rng.integers(0, 2, 40), rng.normal(size=40)])
    names = [f"c{j}" for j in range(5)]
    fast, slow = variance_inflation(x, names), variance_inflation_by_regression(x, names)
    assert fast.keys() == slow.keys()
    for k in fast:
        assert fast[k] == pytest.approx(slow[k], rel=1e-9)


def test_rounded_polynomial_codes_are_not_rescaled():
    """Orthonormal polynomial codes typed with two decimals (-0.67 for -0.6708) are those codes rounded, not the
    codes 'times 0.9973' (common practice: a typed value stands for every number that rounds to it)."""
    folder = GALLERY / "correct_rounded_polynomial"
    report = audit(folder / "design.txt", folder / "contrasts.txt", folder / "participants.tsv",
                   factors=["caffeine"])
    texts = [f.message for f in report.findings if f.code == "column"]
    assert any("linear polynomial of caffeine" in t for t in texts)
    assert not any("times" in t for t in texts), texts
