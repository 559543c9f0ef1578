"""Several images per participant in one hand-written design: one ``repeated_measures`` finding.

The claim the finding makes (a between-participant effect tested on all images has the wrong error term and
the wrong df; the right test is on the participants' averages, on participants - rank df) is checked against
statsmodels OLS on invented data: the naive all-images model and the participant-averages model give
different F for the same effect, on the df the finding names, and with participant indicator columns the
effect adds nothing to the model's rank (statsmodels' ``model.rank``), so it cannot be tested there.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from groupmodel.audit import audit

GALLERY = Path(__file__).parent / "gallery"

IDS = [f"sub-{i:02d}" for i in range(1, 13)]
TRAINING = ["app", "waitlist", "waitlist", "app", "app", "waitlist", "app", "waitlist", "app", "waitlist",
            "waitlist", "app"]
AGE = [24, 31, 45, 38, 27, 29, 33, 40, 41, 36, 26, 47]


def _table(tmp_path: Path) -> Path:
    path = tmp_path / "participants.tsv"
    path.write_text("participant_id\ttraining\tage\n"
                    + "".join(f"{p}\t{t}\t{a}\n" for p, t, a in zip(IDS, TRAINING, AGE, strict=True)))
    return path


def _write(tmp_path: Path, rows: list[list[float]], contrast: list[float] | None = None) -> tuple[Path, Path | None]:
    design = tmp_path / "design.txt"
    design.write_text("\n".join(" ".join(f"{v:g}" for v in r) for r in rows) + "\n")
    if contrast is None:
        return design, None
    con = tmp_path / "contrasts.txt"
    con.write_text(" ".join(f"{v:g}" for v in contrast) + "\n")
    return design, con


def _between_rows() -> list[list[float]]:
    mean_age = float(np.mean(AGE))
    return [[1.0, 1.0 if t == "app" else -1.0, round(a - mean_age, 2)] for t, a in zip(TRAINING, AGE, strict=True)]


def _codes(report) -> list[str]:
    return [f.code for f in report.findings if f.severity in ("error", "warning")]


def test_rows_one_after_the_other_without_session_column(tmp_path: Path) -> None:
    """Each participant's row typed twice in a row (no session column at all): one finding, not 12."""
    rows = [r for r in _between_rows() for _ in range(2)]
    design, con = _write(tmp_path, rows, [0, 1, 0])
    report = audit(design, con, _table(tmp_path))
    assert _codes(report) == ["repeated_measures"]
    msg = report.findings[0].message
    assert "one after the other" in msg and "21 residual df (24 rows - rank 3)" in msg
    assert "the right df is 9 (12 participants - rank 3" in msg


def test_one_id_typed_twice_is_a_duplicate_not_repeated_measures(tmp_path: Path) -> None:
    rows = _between_rows()
    design = tmp_path / "design.tsv"
    lines = ["participant_id\tintercept\ttraining\tage_c"]
    lines += [f"{p}\t" + "\t".join(f"{v:g}" for v in r) for p, r in zip(IDS, rows, strict=True)]
    lines.append(f"{IDS[4]}\t" + "\t".join(f"{v:g}" for v in rows[4]))
    design.write_text("\n".join(lines) + "\n")
    report = audit(design, None, _table(tmp_path))
    codes = _codes(report)
    assert "repeated_measures" not in codes and "duplicate_participant" in codes


def test_one_row_per_participant_is_not_flagged(tmp_path: Path) -> None:
    design, con = _write(tmp_path, _between_rows(), [0, 1, 0])
    report = audit(design, con, _table(tmp_path))
    assert not _codes(report)


def test_within_only_design_with_participant_columns_is_a_note(tmp_path: Path) -> None:
    """Participant columns and a session column, testing the session only: the within test is right."""
    rows = []
    for i in range(12):
        for s in (-0.5, 0.5):
            rows.append([s] + [1.0 if j == i else 0.0 for j in range(12)])
    design, con = _write(tmp_path, rows, [1] + [0] * 12)
    report = audit(design, con, _table(tmp_path))
    assert not _codes(report)
    assert [f.severity for f in report.findings if f.code == "repeated_measures"] == ["note"]


def _invented_outcome() -> tuple[np.ndarray, np.ndarray]:
    """Two sessions of 12 participants: a participant effect, a session effect, noise (seeded)."""
    rng = np.random.default_rng(20261202)
    participant = rng.normal(0.0, 2.0, 12)
    y = np.concatenate([participant + rng.normal(0, 0.7, 12), participant + 0.8 + rng.normal(0, 0.7, 12)])
    return y, participant


def test_between_f_differs_from_participant_averages_statsmodels(tmp_path: Path) -> None:
    """statsmodels OLS: the naive all-images F for training differs from the participant-averages F, and its
    residual df is the one `check` calls wrong; with participant dummies training is not testable."""
    sm = pytest.importorskip("statsmodels.api")
    folder = GALLERY / "repeated_rows_no_ids"
    report = audit(folder / "design.txt", folder / "contrasts.txt", folder / "participants.tsv")
    msg = next(f.message for f in report.findings if f.code == "repeated_measures")
    x = np.loadtxt(folder / "design.txt", comments="#")  # intercept, training, age centred, session
    y, _ = _invented_outcome()
    naive = sm.OLS(y, x).fit()
    f_naive = naive.f_test(np.array([[0, 1, 0, 0]]))
    averages = sm.OLS(0.5 * (y[:12] + y[12:]), x[:12, :3]).fit()
    f_avg = averages.f_test(np.array([[0, 1, 0]]))
    # the df `check` names: the naive model's residual df (used) and the averages model's (right)
    assert f"{int(naive.df_resid)} residual df" in msg and int(naive.df_resid) == 20
    assert f"the right df is {int(averages.df_resid)}" in msg and int(averages.df_resid) == 9
    assert int(f_naive.df_denom) != int(f_avg.df_denom)
    assert abs(float(f_naive.fvalue) - float(f_avg.fvalue)) > 0.1 * float(f_avg.fvalue)
    # participant dummies: the training column adds nothing to the rank (statsmodels' model.rank), so no
    # contrast on it is estimable in that model
    dummies = np.tile(np.eye(12), (2, 1))
    with pytest.warns(Warning, match="rank-deficient"):  # statsmodels says so itself
        with_training = sm.OLS(y, np.column_stack([dummies, x[:, 1], x[:, 3]])).fit().model
    without = sm.OLS(y, np.column_stack([dummies, x[:, 3]])).fit().model
    assert with_training.rank == without.rank == 13


def test_rows_repeated_for_the_participants_without_na(tmp_path: Path) -> None:
    """Two participants with n/a age left out, the other ten typed twice in blocks: repeated measures."""
    table = _table(tmp_path)
    lines = table.read_text().splitlines()
    for k in (3, 8):  # sub-03 and sub-08
        lines[k] = lines[k].rsplit("\t", 1)[0] + "\tn/a"
    table.write_text("\n".join(lines) + "\n")
    keep = [i for i in range(12) if i not in (2, 7)]
    mean_age = float(np.mean([AGE[i] for i in keep]))
    base = [[1.0, 1.0 if TRAINING[i] == "app" else -1.0, round(AGE[i] - mean_age, 2)] for i in keep]
    rows = [r + [s] for s in (0.0, 1.0) for r in base]
    design, con = _write(tmp_path, rows, [0, 1, 0, 0])
    report = audit(design, con, table, factors=["training"], covariates=["age"])
    assert _codes(report) == ["repeated_measures"]
    assert "20 rows for 10 participants" in report.findings[0].message
    assert "the right df is 7 (10 participants - rank 3" in report.findings[0].message


def test_right_df_is_the_between_stratum_df_of_the_spec_it_proposes(tmp_path: Path) -> None:
    """The fix the finding proposes ("observations" and "within": true) gives the between-participant effect
    the df the finding calls right: the spec's fit tests it in the between stratum on that df (the fit's F is
    checked against scipy.stats.f_oneway on participant averages in tests/reference/test_within_reference.py)."""
    import json

    import pandas as pd

    from groupmodel.analysis.table_fit import fit_table

    rows = [r for r in _between_rows() for _ in range(2)]
    design, con = _write(tmp_path, rows, [0, 1, 0])
    report = audit(design, con, _table(tmp_path))
    msg = report.findings[0].message
    assert '"observations": "observations.tsv"' in msg and '"within": true' in msg
    assert "in the between stratum on each participant's average over the within cells (9 df)" in msg
    rng = np.random.default_rng(2)
    obs = pd.DataFrame([{"participant_id": p, "session": s, "y": round(float(rng.normal()), 6)}
                        for p in IDS for s in ("pre", "post")])
    obs.to_csv(tmp_path / "observations.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "factors": {"training": {}, "session": {"within": True}}, "covariates": {"age": {}},
            "terms": ["training*session", "age"], "hypotheses": {"training": {"main": "training"}}}
    (tmp_path / "model.json").write_text(json.dumps(spec))
    row = fit_table(tmp_path / "model.json", "y").table.set_index("hypothesis").loc["training"]
    assert row["stratum"] == "between" and row["df2"] == 9
