"""Rank-deficient designs with random empty cells: what is refused, and what is suggested instead.

Properties (references: numpy's matrix_rank for the rank, and the definition of estimability, a row in the row
space of the design, checked here with numpy's lstsq):

* the build warns of rank deficiency exactly when numpy finds rank < p, and never refuses the design itself;
* a hypothesis is refused exactly when one of its rows is outside the row space of the design;
* every ``"at"`` a refusal suggests, written into the spec, gives a hypothesis that builds and is estimable.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from groupmodel import build

FACTORS = {"a": ["a1", "a2"], "b": ["b1", "b2", "b3"], "c": ["c1", "c2"]}
HYPOTHESES = {
    "main_a": {"main": "a"},
    "main_b": {"main": "b"},
    "a1_vs_a2": {"compare": {"a": ["a1", "a2"]}},
    "ab": {"interaction": ["a", "b"]},
    "b_trend": {"trend": "b"},
    "mean_a1": {"mean": {"a": "a1"}},
}


def _study(folder: Path, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    cells = [(x, y, z) for x in FACTORS["a"] for y in FACTORS["b"] for z in FACTORS["c"]]
    empty = set(rng.choice(len(cells), size=int(rng.integers(1, 4)), replace=False).tolist())
    rows = [cells[i] for i in range(len(cells)) if i not in empty for _ in range(2)]
    frame = pd.DataFrame(rows, columns=list(FACTORS))
    frame.insert(0, "participant_id", [f"sub-{i:02d}" for i in range(len(frame))])
    frame["age"] = np.round(rng.uniform(20, 60, len(frame)), 1)
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    coding = ["effect", "treatment", "indicator"][seed % 3]
    spec = {"participants": "participants.tsv",
            "factors": {f: {"levels": lv, "coding": coding} for f, lv in FACTORS.items()},
            "covariates": {"age": {}}, "terms": ["a*b*c", "age"], "hypotheses": HYPOTHESES}
    if coding == "indicator":
        spec.update(intercept=False, terms=["a:b:c", "age"])
    (folder / "model.json").write_text(json.dumps(spec))
    return folder / "model.json"


def _in_row_space(x: np.ndarray, rows: np.ndarray) -> bool:
    """numpy: a row L is estimable when L = A X for some A, i.e. X' A' = L' has an exact solution."""
    sol = np.linalg.lstsq(x.T, rows.T, rcond=None)[0]
    return bool(np.allclose(x.T @ sol, rows.T, atol=1e-8 * max(1.0, np.abs(rows).max())))


@pytest.mark.parametrize("seed", range(9))
def test_refusals_and_suggestions(tmp_path: Path, seed: int) -> None:
    spec_path = _study(tmp_path, seed)
    model = build(spec_path)
    x = model.design.matrix
    deficient = np.linalg.matrix_rank(x) < x.shape[1]
    assert deficient == any(f.code == "rank_deficient" and f.severity == "warning" for f in model.findings)
    assert not [f for f in model.findings if f.severity == "error" and f.code != "not_estimable"]
    refused = {re.match(r"hypothesis (\S+) is not estimable", f.message).group(1): f.message  # type: ignore[union-attr]
               for f in model.errors}
    for name, h in model.hypotheses.items():
        assert (name in refused) == (not _in_row_space(x, h.weights)), name
    spec = json.loads(spec_path.read_text())
    for name, message in refused.items():
        for at_text in re.findall(r'\("at": (\{[^)]*\})\)', message):
            trial = {**spec, "hypotheses": {name: {**HYPOTHESES[name], "at": json.loads(at_text)}}}
            spec_path.write_text(json.dumps(trial))
            other = build(spec_path)
            assert not other.errors, (name, at_text, [f.message for f in other.errors])
            assert _in_row_space(x, other.hypotheses[name].weights)
        spec_path.write_text(json.dumps(spec))
