"""The example study's mixed design (example_study/sessions, made by make_sessions.py): the fit finds what was
planted, where it was planted.

Reference: ``example_study/sessions/planted_regions.json`` (the invented truth: post - pre +2 everywhere in
region 1, +3 in trained participants only in region 2, exactly 0 elsewhere) and the main example's
``planted_regions.nii.gz`` (the same two region centres and radius, labels 1 and 2).
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from groupmodel.analysis.voxel_fit import fit_images

EXAMPLE = Path(__file__).resolve().parents[2] / "example_study"


@pytest.fixture(scope="module")
def fit():
    return fit_images(EXAMPLE / "sessions" / "model.json", progress=False)


def test_strata_of_the_example(fit) -> None:
    strata = fit.model.strata
    assert {n: t.stratum for n, t in strata.tests.items()} == {
        "group": "between", "session": "within", "group_by_session": "within", "gain_in_trained": "within",
        "trained_vs_control_at_post": "mixed"}
    assert fit.df_of("session") == (1, 13)  # 16 participants - (intercept, group, age)


def test_planted_effects_found_where_planted(fit) -> None:
    truth = json.loads((EXAMPLE / "sessions" / "planted_regions.json").read_text())["true_effects"]
    labels = np.asarray(nib.load(EXAMPLE / "planted_regions.nii.gz").dataobj)[fit.mask]
    for name in ("session", "group_by_session", "gain_in_trained"):
        found = fit.maps[name]["p_bonferroni"] < 0.05
        assert found.any(), name
        assert set(np.unique(labels[found])) <= set(truth[name]), name  # nothing outside the planted regions
    gain = fit.maps["gain_in_trained"]["effect"]
    assert 2.5 < gain[labels == 2].max() < 4.0 and abs(np.median(gain[labels == 0])) < 0.3  # planted peak 3.0
