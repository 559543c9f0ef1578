"""``build`` of a model with a within-participant factor: per-stratum files and design.json's account of which
hypothesis is tested in which stratum on what data.

Reference: the issue's statement of the strata (between: participant averages; within: within contrasts) and the
classical split-plot model (each participant's transformed data fitted with the between-participant design).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from groupmodel import build

PEOPLE = "participant_id\tgroup\nsub-01\ta\nsub-02\ta\nsub-03\tb\nsub-04\tb\nsub-05\tb\n"
SPEC = {"participants": "participants.tsv", "observations": "observations.tsv",
        "factors": {"group": {}, "session": {"within": True, "levels": ["pre", "mid", "post"]}},
        "terms": ["group*session"],
        "hypotheses": {"group": {"main": "group"}, "session": {"main": "session"},
                       "gain_in_a": {"compare": {"session": ["post", "pre"]}, "at": {"group": "a"}},
                       "groups_at_post": {"compare": {"group": ["a", "b"]}, "at": {"session": "post"}}}}


def study(root: Path) -> Path:
    (root / "participants.tsv").write_text(PEOPLE)
    lines = ["participant_id\tsession"] + [f"sub-0{i}\t{s}" for i in range(1, 6) for s in ("pre", "mid", "post")]
    (root / "observations.tsv").write_text("\n".join(lines[:-1]) + "\n")  # sub-05 has no post
    (root / "model.json").write_text(json.dumps(SPEC))
    return root / "model.json"


def test_build_writes_each_stratum(tmp_path: Path) -> None:
    model = build(study(tmp_path))
    model.write(tmp_path / "out", pictures=False)
    out = tmp_path / "out"
    side = json.loads((out / "design.json").read_text())["strata"]
    assert side["hypotheses"]["group"]["stratum"] == "between"
    assert "average" in side["hypotheses"]["group"]["transformed_data"]
    assert side["hypotheses"]["session"]["stratum"] == "within"
    assert "2 orthonormal contrasts of session" in side["hypotheses"]["session"]["transformed_data"]
    assert side["hypotheses"]["groups_at_post"]["stratum"] == "mixed"
    assert side["hypotheses"]["session"]["left_out"][0]["participant_id"] == "sub-05"
    assert side["hypotheses"]["gain_in_a"]["participants"] == 4  # sub-05 has no post, which the gain needs
    for s in ("between", "within", "mixed"):
        for kind in ("design", "transforms", "contrasts"):
            assert (out / f"stratum-{s}_{kind}.tsv").exists()
    transforms = pd.read_csv(out / "stratum-within_transforms.tsv", sep="\t")
    session = transforms[transforms.hypothesis == "session"][["session=pre", "session=mid", "session=post"]]
    w = session.to_numpy()
    np.testing.assert_allclose(w @ w.T, np.eye(2), atol=1e-12)  # orthonormal
    np.testing.assert_allclose(w.sum(axis=1), 0, atol=1e-12)  # contrasts
    gain = transforms[transforms.hypothesis == "gain_in_a"].iloc[0]
    assert (gain["session=post"], gain["session=mid"], gain["session=pre"]) == (1, 0, -1)
    design = pd.read_csv(out / "stratum-between_design.tsv", sep="\t")
    assert design.participant_id.tolist() == ["sub-01", "sub-02", "sub-03", "sub-04"]


def _dense_transform(strata, name: str) -> np.ndarray:
    """The transform as one dense (n_entered * c, n_obs) matrix, participant by participant: row i * c + j holds
    entered participant i's within weights of column j at its observations."""
    t = strata.tests[name]
    k, c = t.within_weights.shape
    out = np.zeros((len(t.entered) * c, int(strata.observation_index.max()) + 1))
    for i, p in enumerate(t.entered):
        for w in range(k):
            obs = strata.observation_index[p, w]
            if obs >= 0:
                out[i * c:(i + 1) * c, obs] += t.within_weights[w]
    return out


def test_transformed_data_equal_the_dense_transform(tmp_path: Path) -> None:
    # The gathered transform (observations by within cell, weights in one small product) against the dense
    # transform matrix the fits used before: the same numbers, also for a participant who enters a hypothesis
    # without an observation the hypothesis gives no weight (sub-05 has no post; mid - pre needs none).
    path = study(tmp_path)
    spec = json.loads(path.read_text())
    spec["hypotheses"]["mid_vs_pre"] = {"compare": {"session": ["mid", "pre"]}}
    path.write_text(json.dumps(spec))
    strata = build(path).strata
    values = np.random.default_rng(2).standard_normal((strata.n_observations, 7))
    assert strata.tests["mid_vs_pre"].entered.size == 5
    for name, t in strata.tests.items():
        got = strata.transformed(name, values)
        dense = (_dense_transform(strata, name) @ values).reshape(len(t.entered), t.within_df, 7)
        assert got.shape == dense.shape and got.flags.c_contiguous
        np.testing.assert_allclose(got, dense, rtol=1e-13, atol=1e-13, err_msg=name)
