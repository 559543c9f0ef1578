"""Within-participant factors in the output folder layout: per-hypothesis folders, the index (with the GG/HF
maps and the strata files), sidecars naming the stratum, the report (strata, observations, epsilons), effect-size
maps equal to the table fit at sampled voxels, checkpoints and resume, --dry-run, and the refusal of
variance_groups with an observations table.

References: the table-level fit (checked against scipy and statsmodels in test_within_reference.py and
test_within_effect_sizes.py); the claim of resume is bit identity, so maps are compared exactly.
"""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from test_cli_build import run

from groupmodel.analysis.corrections import InferenceOptions
from groupmodel.analysis.table_fit import fit_table
from groupmodel.analysis.voxel_fit import fit_images
from groupmodel.inference.checkpoint import CheckpointFolder
from groupmodel.outputs.fit_files import write_voxel_fit
from groupmodel.outputs.index import read_index
from groupmodel.runtime.log import StageLog

SHAPE = (4, 4, 3)
SESSIONS = ("s0", "s1", "s2")


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray, pd.DataFrame]:
    """10 participants in two groups, three sessions; sub-09 has no image at s2."""
    root = tmp_path_factory.mktemp("within_out")
    (root / "maps").mkdir()
    rng = np.random.default_rng(8)
    ids = [f"sub-{i:02d}" for i in range(10)]
    groups = ["a"] * 5 + ["b"] * 5
    pd.DataFrame({"participant_id": ids, "group": groups}).to_csv(root / "participants.tsv", sep="\t", index=False)
    records, images = [], []
    for pid, g in zip(ids, groups, strict=True):
        person = rng.normal(0, 1, SHAPE)
        for s, ses in enumerate(SESSIONS):
            if pid == "sub-09" and ses == "s2":
                continue
            img = (5 + person + 0.5 * s * (g == "b") + rng.normal(0, 1 + 0.3 * s, SHAPE)).astype(np.float32)
            nib.save(nib.Nifti1Image(img, np.eye(4)), root / "maps" / f"{pid}_{ses}.nii.gz")
            records.append({"participant_id": pid, "session": ses})
            images.append(img.astype(float))
    obs = pd.DataFrame(records)
    obs.to_csv(root / "observations.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "images": "maps/{participant_id}_{session}.nii.gz",
            "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
            "hypotheses": {"group": {"compare": {"group": ["b", "a"]}}, "session": {"main": "session"},
                           "gain": {"compare": {"session": ["s1", "s0"]}}}}
    (root / "model.json").write_text(json.dumps(spec))
    return root, np.array(images), obs


def test_layout_index_sidecars_and_report(study, tmp_path: Path) -> None:
    root, _, _ = study
    fit = fit_images(root / "model.json", progress=False)
    out = tmp_path / "out"
    write_voxel_fit(fit, out, pictures=False)
    entries = {(e.hypothesis, e.statistic, e.kind): e.path for e in read_index(out)}
    for stat in ("F", "epsilon_gg", "epsilon_hf", "p_gg", "p_hf", "partial_eta_squared"):
        assert entries[("session", stat, "map")] == f"hypotheses/session/{stat}.nii.gz"
    assert ("session", "partial_eta_squared_ci_lower", "map") not in entries  # n/a: no sphericity
    assert entries[("gain", "cohens_d", "map")] == "hypotheses/gain/cohens_d.nii.gz"
    for s in ("between", "within"):
        assert entries[(None, f"stratum-{s}_design", "design")] == f"stratum-{s}_design.tsv"
        assert entries[(None, f"stratum-{s}_contrasts", "contrasts")] == f"stratum-{s}_contrasts.tsv"
    side = json.loads((out / "hypotheses" / "session" / "p_gg.json").read_text())
    assert side["stratum"] == "within" and side["stratum_test"]["participants"] == 9
    assert side["df1"] == 2 and side["df2"] == 14 and "Greenhouse-Geisser" in side["correction"]
    eta = json.loads((out / "hypotheses" / "session" / "partial_eta_squared.json").read_text())
    assert eta["partial_eta_squared_interval"].startswith("n/a")
    assert "Huynh-Feldt" in json.loads((out / "hypotheses" / "session" / "epsilon_hf.json").read_text())["sphericity"]
    d = json.loads((out / "hypotheses" / "gain" / "cohens_d.json").read_text())
    assert "d_z" in d["cohens_d_sd"] and d["stratum"] == "within"
    assert json.loads((out / "contrasts.json").read_text())["hypotheses"]["group"]["stratum"] == "between"
    text = html.unescape(re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", (out / "report.html").read_text())))
    assert "Tested in the within stratum on each participant's 2 orthonormal contrasts of session" in text
    assert "Greenhouse-Geisser epsilon median" in text and "Huynh-Feldt epsilon median" in text
    assert "29 images of 10 participants" in text and "Without an image in every within cell (1): sub-09" in text
    assert "per hypothesis, in its error stratum" in text


def test_effect_size_maps_equal_table_fit(study) -> None:
    root, images, obs = study
    fit = fit_images(root / "model.json", progress=False, chunk_voxels=5)
    flat = images.reshape(len(images), -1)[:, fit.mask.ravel()]
    for voxel in (0, 11, flat.shape[1] - 1):
        obs.assign(y=flat[:, voxel]).to_csv(root / "observations.tsv", sep="\t", index=False)
        ref = fit_table(root / "model.json", "y").table.set_index("hypothesis")
        for name, stat in (("gain", "cohens_d"), ("gain", "ci_lower"), ("group", "ci_upper"),
                           ("session", "partial_eta_squared"), ("group", "partial_eta_squared_ci_lower")):
            np.testing.assert_allclose(fit.maps[name][stat][voxel], ref.loc[name, stat], rtol=1e-6, atol=1e-9)
    obs.to_csv(root / "observations.tsv", sep="\t", index=False)


class _Stop(Exception):
    pass


class _StopLog(StageLog):
    """Stops the run (as a kill would) once some permutations are done."""

    def progress(self, name: str, done: int, total: int, unit: str = "") -> None:
        if name == "permutations" and done >= 300:
            raise _Stop


def test_checkpoint_resume_gives_identical_maps(study, tmp_path: Path) -> None:
    root, _, _ = study
    options = InferenceOptions(permutations=200, seed=5)
    whole = fit_images(root / "model.json", progress=False, inference=options)
    params = {"spec": "model.json"}
    with pytest.raises(_Stop):
        fit_images(root / "model.json", progress=False, inference=options, log=_StopLog(quiet=True),
                   checkpoint=CheckpointFolder(tmp_path / "ck", params, resume=False, every=0))
    done = {}
    for p in (tmp_path / "ck").glob("*.npz"):
        with np.load(p) as z:
            done[p.stem] = int(z["done"])
    # group: all C(9, 4) = 126 splits of the 9 complete participants (exhaustive), done; session stopped mid-way
    assert done.get("group") == 126 and 0 < done.get("session", 0) < 200, done
    resumed = fit_images(root / "model.json", progress=False, inference=options,
                         checkpoint=CheckpointFolder(tmp_path / "ck", params, resume=True, every=0))
    for name in whole.maps:
        for stat in ("p_perm", "p_fwe"):
            assert np.array_equal(whole.maps[name][stat], resumed.maps[name][stat], equal_nan=True)


def test_dry_run_and_refusals(study, tmp_path: Path) -> None:
    root, _, _ = study
    code, out, err = run("fit", str(root / "model.json"), "--out", str(tmp_path / "d"), "--dry-run",
                         "--permutations", "20")
    assert code == 0, err
    assert "images of 10 participants; each hypothesis in its error stratum (group: between" in out
    assert not (tmp_path / "d").exists()
    spec = json.loads((root / "model.json").read_text())
    (root / "blocks.json").write_text(json.dumps({**spec, "inference": {"blocks": "group"}}))
    code, _, err = run("fit", str(root / "blocks.json"), "--out", str(tmp_path / "b"), "--dry-run",
                       "--permutations", "20")
    assert code == 1 and "exchangeability blocks are set by the strata" in err
    (root / "vg.json").write_text(json.dumps({**spec, "variance_groups": "group"}))
    code, _, err = run("fit", str(root / "vg.json"), "--out", str(tmp_path / "v"))
    assert code == 2 and "$.variance_groups" in err and "observations" in err
    assert len(err.strip().splitlines()) == 1
