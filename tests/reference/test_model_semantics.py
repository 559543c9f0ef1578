"""Model semantics at the edges: level order from the data, terms without their marginal terms, ``at``.

References, named beside each check: numpy.polyfit of the cell means (trend over levels), statsmodels/patsy
formula fits (patsy codes a term whose marginal term is absent by the marginality rule of Chambers and Hastie
1992, as R's model.matrix does).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from groupmodel.fit import fit_table


def write_study(folder: Path, frame: pd.DataFrame, spec: dict) -> Path:
    """Write ``participants.tsv`` (as given, text) and ``model.json`` into ``folder``; return the spec path."""
    folder.mkdir(parents=True, exist_ok=True)
    frame = frame.copy()
    if "participant_id" not in frame:
        frame.insert(0, "participant_id", [f"sub-{i:05d}" for i in range(len(frame))])
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    (folder / "model.json").write_text(json.dumps({"participants": "participants.tsv", **spec}, indent=1))
    return folder / "model.json"


# ------------------------------------------------------------------------------------------ level order
def test_numeric_levels_from_the_data_sort_numerically(tmp_path: Path) -> None:
    # Doses 7, 10, 25 (not declared): numeric order, so the linear trend follows the dose. Reference:
    # numpy.polyfit of the cell means on the scores 1..3 in numeric order (README: trend estimate = the
    # least-squares slope of the level means per unit of score).
    rng = np.random.default_rng(3)
    dose = np.repeat(["7", "10", "25"], 5)
    y = np.repeat([1.0, 2.0, 4.0], 5) + rng.normal(0, 0.3, 15)
    frame = pd.DataFrame({"dose": dose, "y": y})
    spec = write_study(tmp_path, frame, {
        "factors": {"dose": {"coding": "polynomial"}},
        "terms": ["dose"],
        "hypotheses": {"linear": {"trend": "dose", "degree": 1}},
    })
    fit = fit_table(spec, "y")
    assert fit.model.design.factors["dose"].levels == ("7", "10", "25")
    means = [y[dose == d].mean() for d in ("7", "10", "25")]
    slope = np.polyfit([1.0, 2.0, 3.0], means, 1)[0]
    est = float(fit.table.set_index("hypothesis").loc["linear", "estimate"])
    assert slope > 0 and est > 0
    assert abs(est - slope) < 1e-8 * abs(slope)


def test_mixed_text_levels_stay_in_text_order(tmp_path: Path) -> None:
    # Common practice: one non-numeric value keeps text order for every level.
    frame = pd.DataFrame({"g": ["7", "10", "x25"] * 3, "y": np.arange(9.0)})
    spec = write_study(tmp_path, frame, {"factors": {"g": {}}, "terms": ["g"], "hypotheses": {"g": {"main": "g"}}})
    assert fit_table(spec, "y").model.design.factors["g"].levels == ("10", "7", "x25")
