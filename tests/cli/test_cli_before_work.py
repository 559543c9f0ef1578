"""Checks before a long job: every image problem at once, ``fit --dry-run``, and what ``--force`` may replace.

Reference: the exit-code convention of the README (0 ok, 1 model/data problem, 2 usage or unreadable input);
counts of problems checked by hand against the files this test breaks.
"""

from __future__ import annotations

import gzip
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def _run(cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    return subprocess.run([sys.executable, "-m", "groupmodel.cli", *args], capture_output=True, text=True,
                          env=env, cwd=cwd, timeout=300)


@pytest.fixture
def study(tmp_path: Path) -> Path:
    shutil.copytree(EXAMPLE, tmp_path / "study", ignore=shutil.ignore_patterns("faulty", "*.py"))
    return tmp_path / "study"


def _break_images(study: Path) -> None:
    maps = study / "maps"
    for pid in ("sub-002", "sub-010", "sub-020"):
        (maps / f"{pid}_effect.nii.gz").unlink()
    nib.save(nib.Nifti1Image(np.zeros((3, 3, 3), np.float32), np.eye(4)), maps / "sub-030_effect.nii.gz")
    (maps / "sub-040_effect.nii.gz").write_bytes(b"not an image")


def _listing(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


def test_every_image_problem_reported_at_once(study: Path) -> None:
    _break_images(study)
    for extra in ([], ["--dry-run"]):
        before = _listing(study.parent)
        proc = _run(study.parent, "fit", str(study / "model.json"), "--out", "res", *extra)
        assert proc.returncode == 2, proc.stderr
        err = proc.stderr
        assert "5 of 59 images cannot be used (3 missing, 1 on another grid, 1 unreadable" in err, err
        for pid in ("sub-002", "sub-010", "sub-020", "sub-030", "sub-040"):
            assert pid in err
        assert "Traceback" not in err
        assert _listing(study.parent) == before  # nothing written, no lock left


def test_data_unreadable_after_a_good_header_found_by_the_dry_run(study: Path) -> None:
    path = study / "maps" / "sub-005_effect.nii.gz"
    raw = gzip.decompress(path.read_bytes())
    path.write_bytes(gzip.compress(raw)[: len(gzip.compress(raw)) // 2])  # header intact, values cut off
    proc = _run(study.parent, "fit", str(study / "model.json"), "--out", "res", "--dry-run")
    assert proc.returncode == 2 and "sub-005" in proc.stderr, proc.stderr


def test_dry_run_says_what_the_run_would_do_and_writes_nothing(study: Path) -> None:
    before = _listing(study.parent)
    proc = _run(study.parent, "fit", str(study / "model.json"), "--out", "res", "--dry-run", "--permutations", "100",
                "--tfce")
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout
    for line in ("observations: 59", "voxels: 2984 in the mask", "hypotheses: 8 (", "permutations: 100",
                 "memory: image data 0.7 MB (within", "estimated time of the permutations: about"):
        assert line in out, out
    assert _listing(study.parent) == before


def test_build_refuses_when_every_image_is_missing(study: Path) -> None:
    for image in (study / "maps").glob("*_effect.nii.gz"):
        image.unlink()
    proc = _run(study.parent, "build", str(study / "model.json"), "--out", "design", "--no-pictures")
    assert proc.returncode == 2 and "59 of 59 images cannot be used (59 missing" in proc.stderr, proc.stderr
    assert not (study.parent / "design").exists()


def test_build_warns_when_some_images_are_missing(study: Path) -> None:
    (study / "maps" / "sub-002_effect.nii.gz").unlink()
    proc = _run(study.parent, "build", str(study / "model.json"), "--out", "design", "--no-pictures")
    assert proc.returncode == 0 and "warning: image for sub-002 not found" in proc.stderr, proc.stderr


def test_force_replaces_only_groupmodel_outputs(study: Path) -> None:
    cwd = study.parent
    args = ("build", str(study / "model.json"), "--no-pictures", "--force", "--out")
    notes = cwd / "notes"
    notes.mkdir()
    (notes / "notes.txt").write_text("mine")
    proc = _run(cwd, *args, "notes")
    assert proc.returncode == 2 and "not a groupmodel output folder" in proc.stderr, proc.stderr
    assert (notes / "notes.txt").read_text() == "mine"

    assert _run(cwd, *args, "design").returncode == 0
    assert _run(cwd, *args, "design").returncode == 0  # its own output: replaced
    (cwd / "design" / "notes.txt").write_text("mine")
    proc = _run(cwd, *args, "design")
    assert proc.returncode == 2 and "files groupmodel did not write (notes.txt)" in proc.stderr, proc.stderr
    assert (cwd / "design" / "notes.txt").exists()

    other = cwd / "described"
    other.mkdir()
    (other / "dataset_description.json").write_text(json.dumps({"GeneratedBy": [{"Name": "groupmodel"}]}))
    assert _run(cwd, *args, "described").returncode == 0


def test_out_may_not_hold_the_working_directory_or_the_inputs(study: Path) -> None:
    for cwd, out, words in ((study, ".", "working directory"), (study.parent, str(study), "holds an input")):
        proc = _run(cwd, "fit", str(study / "model.json"), "--force", "--out", out, "--permutations", "50")
        assert proc.returncode == 2 and words in proc.stderr, proc.stderr
    assert (study / "model.json").exists()


@pytest.mark.parametrize("extra", [("--permutations", "100"), ("--tfce",), ("--cluster-threshold", "3.1"),
                                   ("--checkpoint", "ckpt")])
def test_voxelwise_options_with_outcome_refused_before_any_work(study: Path, extra: tuple[str, ...]) -> None:
    """A table fit (``--outcome``) has no permutation inference: asking for it on the command line is a usage
    error naming the option, not a run that silently reports parametric p."""
    proc = _run(study, "fit", "model.json", "--outcome", "hippocampus_signal", "--out", "roi", *extra)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert proc.stderr.count("\n") == 1 and extra[0] in proc.stderr and "--outcome" in proc.stderr, proc.stderr
    assert not (study / "roi").exists() and not list(study.glob(".roi*"))
