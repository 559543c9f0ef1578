"""``groupmodel check`` with a spec naming an ``outcome``: the unequal-variance warning, with Levene's test from
``scipy.stats.levene`` (the check it names) recomputed here."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from groupmodel.audit import audit


def _files(root: Path, sd_patient: float) -> tuple[Path, Path, Path]:
    rng = np.random.default_rng(4)
    group = np.repeat(["patient", "control"], [10, 30])
    score = np.where(group == "patient", rng.normal(0, sd_patient, 40), rng.normal(0, 1, 40))
    ids = [f"sub-{i + 1:02d}" for i in range(40)]
    pd.DataFrame({"participant_id": ids, "group": group, "score": np.round(score, 6)}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    pd.DataFrame({"participant_id": ids, "intercept": 1.0, "patient": (group == "patient") * 1.0}).to_csv(
        root / "design.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "factors": {"group": {"levels": ["patient", "control"]}},
            "terms": ["group"], "outcome": "score", "hypotheses": {"g": {"compare": {"group": ["patient", "control"]}}}}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "design.tsv", root / "participants.tsv", root / "model.json"


def test_check_warns_when_group_variances_differ(tmp_path: Path) -> None:
    design, table, spec = _files(tmp_path, sd_patient=3.0)
    report = audit(design, participants=table, spec=spec)
    found = [f for f in report.findings if f.code == "unequal_variances"]
    frame = pd.read_csv(table, sep="\t")
    parts = [frame.loc[frame.group == g, "score"].to_numpy() for g in ("patient", "control")]
    p = stats.levene(*parts, center="median").pvalue  # residuals are the data minus each group's mean
    assert len(found) == 1 and found[0].section == "variances" and found[0].severity == "warning"
    assert f"p = {p:.4g}" in found[0].message and '"variance_groups": "group"' in found[0].message
    assert "Residual variances by group" in report.format()


def test_check_is_quiet_for_equal_variances(tmp_path: Path) -> None:
    design, table, spec = _files(tmp_path, sd_patient=1.0)
    report = audit(design, participants=table, spec=spec)
    assert not [f for f in report.findings if f.code == "unequal_variances"]


def test_screened_check_flags_the_same_voxels_as_levene_everywhere() -> None:
    """The voxelwise screen (Levene only where the variance ratio is already past the limit) flags exactly the
    voxels that scipy.stats.levene (median-centred) run at every voxel flags, with the same p where it ran."""
    from groupmodel.engine.variance_check import VARIANCE_RATIO_WARN, group_variances, screen, unequal

    rng = np.random.default_rng(11)
    labels = np.repeat([0, 1, 2], [8, 12, 20])
    sd = np.ones((3, 600))
    sd[0, :200] = rng.uniform(1.0, 3.0, 200)  # a third of the voxels with a more variable first group
    resid = rng.standard_normal((40, 600)) * sd[labels]
    resid[:, 590:] = 0.0  # no spread at all
    rho = np.bincount(labels).astype(float) - 1
    variances, p_all = group_variances(resid, labels, rho)
    v2, p, checked = screen(resid, labels, rho)
    np.testing.assert_array_equal(v2, variances)
    np.testing.assert_array_equal(unequal(v2, p), unequal(variances, p_all))
    assert unequal(variances, p_all).sum() > 20  # the check has something to find
    np.testing.assert_array_equal(checked, np.isfinite(p_all))
    ran = np.isfinite(p)
    assert ran.sum() < 600 and np.all(variances[:, ran].max(axis=0) / variances[:, ran].min(axis=0)
                                      > VARIANCE_RATIO_WARN)
    parts = [resid[labels == g][:, ran] for g in range(3)]
    np.testing.assert_allclose(p[ran], stats.levene(*parts, center="median", axis=0).pvalue, rtol=1e-12)
