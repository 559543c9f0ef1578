"""``groupmodel fit`` on bad images, masks and designs: one clear line, the right exit code, nothing written.

Reference: the issue's list of bad inputs and the error rules of the project (exit code 2 for unreadable or
mismatching input, 1 for model problems; one line on stderr saying what was expected, what came instead,
where, and the fix; no traceback; no output folder).
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupmodel.cli import main

AFFINE = np.array([[2.0, 0, 0, -4.0], [0, 2.0, 0, -4.0], [0, 0, 2.0, -3.0], [0, 0, 0, 1.0]])
SHAPE = (4, 4, 3)
N = 12


def make_study(root: Path, n: int = N) -> Path:
    rng = np.random.default_rng(8)
    (root / "maps").mkdir(parents=True)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    arm = np.array(["drug", "placebo"])[np.arange(n) % 2]
    pd.DataFrame({"participant_id": ids, "arm": arm, "weight": np.round(rng.normal(70, 9, n), 1)}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    for pid in ids:
        save(root / "maps" / f"{pid}.nii.gz", rng.normal(1, 1, SHAPE))
    spec = {"participants": "participants.tsv",
            "factors": {"arm": {"levels": ["placebo", "drug"], "coding": "effect"}},
            "covariates": {"weight": {"center": "mean"}},
            "terms": ["arm", "weight"],
            "hypotheses": {"drug_vs_placebo": {"compare": {"arm": ["drug", "placebo"]}},
                           "arm": {"main": "arm"}},
            "images": "maps/{participant_id}.nii.gz"}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


def save(path: Path, data: np.ndarray, affine: np.ndarray = AFFINE, dtype=np.float32) -> None:
    nib.save(nib.Nifti1Image(np.asarray(data).astype(dtype), affine), path)


def edit_spec(spec: Path, **changes) -> None:
    raw = json.loads(spec.read_text())
    raw.update(changes)
    spec.write_text(json.dumps(raw))


@pytest.fixture
def spec(tmp_path: Path) -> Path:
    return make_study(tmp_path / "study")


def fails(capsys, spec: Path, *extra: str, code: int = 2) -> str:
    """Run ``groupmodel fit``; check the exit code, one line on stderr, no traceback, nothing written."""
    out = spec.parent.parent / "results"
    rc = main(["fit", str(spec), "--out", str(out), *extra])
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert rc == code, captured.err
    assert len(lines) == 1, captured.err
    assert lines[0].startswith("groupmodel: error:")
    assert "Traceback" not in captured.err and "Traceback" not in captured.out
    assert not out.exists()
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]  # no temporary folder left
    return lines[0]


def test_images_of_different_shapes(spec: Path, capsys) -> None:
    save(spec.parent / "maps" / "sub-05.nii.gz", np.ones((4, 4, 4)))
    msg = fails(capsys, spec)
    assert "sub-05" in msg and "4x4x3" in msg and "4x4x4" in msg


def test_images_with_different_affines(spec: Path, capsys) -> None:
    shifted = AFFINE.copy()
    shifted[0, 3] += 1.0  # 1 mm
    save(spec.parent / "maps" / "sub-07.nii.gz", np.ones(SHAPE), shifted)
    msg = fails(capsys, spec)
    assert "sub-07" in msg and "-4" in msg and "-3" in msg and "affine" in msg


def test_affines_within_tolerance_are_accepted(spec: Path, capsys, tmp_path: Path) -> None:
    # positive control for the test above: 1e-6 mm is below the 1e-4 mm tolerance
    nudged = AFFINE.copy()
    nudged[1, 3] += 1e-6
    save(spec.parent / "maps" / "sub-07.nii.gz", np.ones(SHAPE) * 2, nudged)
    assert main(["fit", str(spec), "--out", str(tmp_path / "ok")]) == 0
    assert capsys.readouterr().err == ""


def test_4d_file_with_the_wrong_number_of_volumes(spec: Path, capsys) -> None:
    save(spec.parent / "all.nii.gz", np.ones((*SHAPE, N - 1)))
    edit_spec(spec, images="all.nii.gz")
    msg = fails(capsys, spec)
    assert f"{N} volumes" in msg and f"{N - 1}" in msg


def test_a_4d_image_where_one_volume_is_expected(spec: Path, capsys) -> None:
    save(spec.parent / "maps" / "sub-02.nii.gz", np.ones((*SHAPE, 3)))
    msg = fails(capsys, spec)
    assert "sub-02" in msg and "3 volumes" in msg


def test_a_file_that_is_not_an_image(spec: Path, capsys) -> None:
    (spec.parent / "maps" / "sub-03.nii.gz").write_text("participant 3 withdrew; no scan\n")
    msg = fails(capsys, spec)
    assert "sub-03" in msg and "sub-03.nii.gz" in msg


def test_images_with_a_suffix_that_is_not_an_image(spec: Path, capsys) -> None:
    for i in range(1, N + 1):
        (spec.parent / "maps" / f"sub-{i:02d}.txt").write_text("1 2 3\n")
    edit_spec(spec, images="maps/{participant_id}.txt")
    msg = fails(capsys, spec)
    assert "sub-01" in msg and ".txt" in msg


def test_complex_valued_image(spec: Path, capsys) -> None:
    save(spec.parent / "maps" / "sub-04.nii.gz", np.ones(SHAPE), dtype=np.complex64)
    msg = fails(capsys, spec)
    assert "sub-04" in msg and "complex" in msg


def test_missing_image(spec: Path, capsys) -> None:
    (spec.parent / "maps" / "sub-09.nii.gz").unlink()
    msg = fails(capsys, spec)
    assert "sub-09" in msg and "sub-09.nii.gz" in msg and "--drop-missing-images" in msg


def test_missing_image_dropped_on_request(spec: Path, capsys) -> None:
    (spec.parent / "maps" / "sub-09.nii.gz").unlink()
    out = spec.parent.parent / "results"
    assert main(["fit", str(spec), "--out", str(out), "--drop-missing-images"]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert "sub-09" in captured.out
    summary = json.loads((out / "summary.json").read_text())
    assert summary["n_observations"] == N - 1
    excluded = [e for e in summary["excluded"] if "sub-09" in json.dumps(e)]
    assert len(excluded) == 1 and "sub-09.nii.gz" in json.dumps(excluded[0])
    design = pd.read_csv(out / "design.tsv", sep="\t")
    assert "sub-09" not in set(design["participant_id"]) and len(design) == N - 1


def test_all_nan_image(spec: Path, capsys) -> None:
    save(spec.parent / "maps" / "sub-06.nii.gz", np.full(SHAPE, np.nan))
    msg = fails(capsys, spec)
    assert "sub-06" in msg and "NaN" in msg


def test_mask_on_another_grid(spec: Path, capsys) -> None:
    save(spec.parent / "mask.nii.gz", np.ones((5, 4, 3)), dtype=np.uint8)
    msg = fails(capsys, spec, "--mask", str(spec.parent / "mask.nii.gz"))
    assert "mask.nii.gz" in msg and "5x4x3" in msg and "4x4x3" in msg


def test_mask_with_another_affine(spec: Path, capsys) -> None:
    other = AFFINE.copy()
    other[2, 3] = 10.0
    save(spec.parent / "mask.nii.gz", np.ones(SHAPE), other, dtype=np.uint8)
    msg = fails(capsys, spec, "--mask", str(spec.parent / "mask.nii.gz"))
    assert "mask.nii.gz" in msg and "affine" in msg


def test_empty_mask(spec: Path, capsys) -> None:
    save(spec.parent / "mask.nii.gz", np.zeros(SHAPE), dtype=np.uint8)
    msg = fails(capsys, spec, "--mask", str(spec.parent / "mask.nii.gz"))
    assert "mask.nii.gz" in msg and "empty" in msg


def test_mask_given_in_the_spec_that_is_empty(spec: Path, capsys) -> None:
    save(spec.parent / "mask.nii.gz", np.zeros(SHAPE), dtype=np.uint8)
    edit_spec(spec, mask="mask.nii.gz")
    msg = fails(capsys, spec)
    assert "mask.nii.gz" in msg


def test_more_design_columns_than_participants(tmp_path: Path, capsys) -> None:
    spec = make_study(tmp_path / "study", n=4)
    edit_spec(spec, factors={"arm": {"levels": ["placebo", "drug"], "coding": "effect"}},
              covariates={"weight": {"center": "mean"}, "age": {"center": "mean"}},
              terms=["arm*weight", "age"])
    table = pd.read_csv(spec.parent / "participants.tsv", sep="\t")
    table["age"] = [31.0, 45.5, 28.0, 52.5]
    table.to_csv(spec.parent / "participants.tsv", sep="\t", index=False)
    msg = fails(capsys, spec, code=1)
    assert "5 columns" in msg and "4 observations" in msg
