"""The outputs of one fixed fit stay what they were (a guard against silent drift in restructurings).

``expected/`` was written by ``groupmodel fit tests/golden/model.json --out tests/golden/expected
--permutations 60 --seed 7 --tfce --cluster-threshold 3.1`` (run from the repository top; pictures
removed, though ``outputs.json`` still lists them, as the run's index does).
Every file must come out again with the same names, the same JSON and TSV content and the same
map values.  Floats are compared to a relative 1e-9, not bit for bit, because the last bits of a BLAS
product may differ between machines; everything else (file set, keys, text, counts) must be identical.
Regenerate ``expected/`` only for a deliberate change of output, and say so in the commit.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from reference_outputs import compare  # noqa: E402

from groupmodel.cli import main  # noqa: E402

ROOT = HERE.parents[1]


def test_fit_outputs_unchanged(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    monkeypatch.chdir(ROOT)
    out = tmp_path / "out"
    code = main(["fit", "tests/golden/model.json", "--out", str(out), "--permutations", "60", "--seed", "7",
                 "--tfce", "--cluster-threshold", "3.1"])
    assert code == 0
    diffs = compare(HERE / "expected", out, rtol=1e-9, pictures=False)
    assert diffs == [], "\n".join(diffs[:20])
