"""Design checks that are not reference values: when a check applies at all."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np

import groupmodel
from groupmodel.engine.linalg import has_constant_column

EXAMPLE = Path(__file__).resolve().parents[2] / "example_study"


def _cell_means_spec(tmp_path: Path) -> Path:
    for name in ("participants.tsv", "participants.json"):
        shutil.copy(EXAMPLE / name, tmp_path / name)
    spec = {
        "participants": "participants.tsv",
        "factors": {"training": {"coding": "indicator"}, "chronotype": {"coding": "indicator"}},
        "covariates": {"age": {}},
        "intercept": False,
        "terms": ["training:chronotype", "age"],
        "hypotheses": {"training": {"main": "training"}},
    }
    (tmp_path / "model.json").write_text(json.dumps(spec))
    return tmp_path / "model.json"


def test_cell_means_design_gets_no_meaningless_vif_warnings(tmp_path: Path) -> None:
    # Common practice: the VIF regresses a column on the others plus a constant; in a cell-means design the
    # indicators sum to that constant, so every VIF is infinite by construction and is not reported.
    model = groupmodel.build(_cell_means_spec(tmp_path))
    assert not has_constant_column(model.design.matrix)
    assert [f for f in model.findings if f.code == "high_vif"] == []
    assert model.design_sidecar()["variance_inflation"] is None
    assert not model.errors


def test_intercept_design_reports_vif() -> None:
    model = groupmodel.build(EXAMPLE / "model.json")
    assert has_constant_column(model.design.matrix)
    vif = model.design_sidecar()["variance_inflation"]
    assert set(vif) == set(model.design.column_names) - {"intercept"}
    assert all(np.isfinite(v) and v >= 1.0 for v in vif.values())
