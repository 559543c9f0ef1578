"""A +/-0.5 column unrelated to the factors is an unknown column, not a coding with miscoded rows.

The rule (a seeded permutation test): an unexplained column is read as a cell coding with typos only when its
values agree with the cells better than in 99% of shuffles of the same values over the rows.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from groupmodel.audit import audit

BASE = Path(__file__).parent / "gallery" / "correct_effect"
ROW_CODES = {"row_coding", "rows_out_of_place"}


def _matrix() -> np.ndarray:
    return np.loadtxt(BASE / "design.txt", comments="#")


def _run(tmp_path: Path, x: np.ndarray):
    design = tmp_path / "design.txt"
    design.write_text("\n".join(" ".join(f"{v:g}" for v in row) for row in x) + "\n")
    return audit(design, None, BASE / "participants.tsv", factors=["diet", "sleep"], covariates=["age"])


@pytest.mark.parametrize("seed", range(12))
def test_random_half_column_gives_no_row_errors(tmp_path: Path, seed: int) -> None:
    x = _matrix()
    rng = np.random.default_rng(seed)
    extra = rng.choice([-0.5, 0.5], size=x.shape[0])
    report = _run(tmp_path, np.column_stack([x, extra]))
    codes = {f.code for f in report.findings}
    assert not codes & ROW_CODES, [f.message for f in report.findings if f.code in ROW_CODES]
    assert "column_unexplained" in codes


def test_half_coding_with_one_sign_typo_is_still_a_row_error(tmp_path: Path) -> None:
    """The sleep column typed as +/-0.5 with one sign flipped: a coding with a typo, found as a row error."""
    x = _matrix()
    x[:, 3] = 0.5 * x[:, 3]
    x[6, 3] = -x[6, 3]
    report = _run(tmp_path, x)
    hits = [f for f in report.findings if f.code == "row_coding"]
    assert len(hits) == 1 and "(row 7)" in hits[0].message
