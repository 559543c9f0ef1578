"""Bad input that used to end in a traceback or be accepted silently: files not in UTF-8, a folder named as a file,
numbers no float holds, absurd nesting, negative counts and seeds, an empty table field, and what a killed run
leaves beside ``--out``.

Reference: the project's error rules (README "Exit codes and errors": one line ``groupmodel: error: ...`` naming
the file, row, column or JSON path and the fix; exit 2 for usage or unreadable input; nothing written) and the
BIDS rule that a missing value in participants.tsv is written ``n/a``.
"""

from __future__ import annotations

import contextlib
import io
import json
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from groupmodel import cli
from groupmodel.errors import InputError, SpecError
from groupmodel.model.options import InferenceOptions
from groupmodel.model.spec import load_spec, spec_from_dict
from groupmodel.outputs.folder import OutputFolder
from groupmodel.runtime.memory import MemoryBudget

TSV = (
    "participant_id\tgroup\tage\n"
    "sub-01\tpatient\t31\n"
    "sub-02\tcontrol\t45\n"
    "sub-03\tpatient\t27\n"
    "sub-04\tcontrol\t52\n"
    "sub-05\tpatient\t39\n"
    "sub-06\tcontrol\t33\n"
)
SPEC = {
    "participants": "participants.tsv",
    "factors": {"group": {"levels": ["patient", "control"]}},
    "covariates": {"age": {"center": "mean"}},
    "terms": ["group", "age"],
    "hypotheses": {"group": {"compare": {"group": ["patient", "control"]}}},
}
SIDECAR = {"group": {"Description": "Group", "Levels": {"patient": "Patiënt", "control": "Control"}}}


def study(root: Path, spec: dict | None = None, tsv: str = TSV, images: bool = False) -> Path:
    (root / "participants.tsv").write_text(tsv, encoding="utf-8")
    raw = json.loads(json.dumps(spec if spec is not None else SPEC))
    if images:
        (root / "maps").mkdir()
        rng = np.random.default_rng(0)
        for line in tsv.splitlines()[1:]:
            pid = line.split("\t")[0]
            nib.save(nib.Nifti1Image(rng.normal(size=(3, 3, 2)).astype(np.float32), np.eye(4)),
                     root / "maps" / f"{pid}.nii.gz")
        raw["images"] = "maps/{participant_id}.nii.gz"
    (root / "model.json").write_text(json.dumps(raw), encoding="utf-8")
    return root / "model.json"


def fails(spec: Path, code: int, *fragments: str, command: tuple[str, ...] = ("build",),
          extra: tuple[str, ...] = ()) -> str:
    """Run the command in-process: exit code, one line on stderr, no traceback, nothing written."""
    out = spec.parent / "out"
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        try:
            got = cli.main([*command, str(spec), "--out", str(out), *extra])
        except SystemExit as exc:  # refused by the argument parser
            got = exc.code
    err = stderr.getvalue()
    assert got == code, (got, err)
    assert err.startswith("groupmodel: error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err + stdout.getvalue()
    assert not out.exists() and not list(spec.parent.glob(".out*"))
    for fragment in fragments:
        assert fragment in err, (fragment, err)
    return err


# ---------------------------------------------------------------------------------------------------------------
# Files that are not UTF-8, or not files
# ---------------------------------------------------------------------------------------------------------------
def test_participants_json_not_in_utf8(tmp_path: Path) -> None:
    spec = study(tmp_path)
    (tmp_path / "participants.json").write_bytes(json.dumps(SIDECAR, ensure_ascii=False).encode("latin-1"))
    fails(spec, 2, "participants sidecar", "participants.json line 1", "not UTF-8", "save the file as UTF-8")


def test_participants_sidecar_naming_a_folder(tmp_path: Path) -> None:
    (tmp_path / "sidecars").mkdir()
    spec = study(tmp_path, {**SPEC, "participants_sidecar": "sidecars"})
    fails(spec, 2, "participants sidecar", "sidecars", "found a folder", "participants_sidecar")


def test_participants_json_nested_too_deeply(tmp_path: Path) -> None:
    spec = study(tmp_path)
    (tmp_path / "participants.json").write_text('{"group": ' + "[" * 100_000 + "]" * 100_000 + "}")
    fails(spec, 2, "participants sidecar", "nested too deeply")


def test_participants_tsv_not_in_utf8(tmp_path: Path) -> None:
    spec = study(tmp_path)
    (tmp_path / "participants.tsv").write_bytes(TSV.replace("sub-03\tpatient", "sub-03\tpatiënt").encode("cp1252"))
    fails(spec, 2, "participants table", "participants.tsv line 4", "not UTF-8", "save the file as UTF-8")


def test_spec_not_in_utf8(tmp_path: Path) -> None:
    spec = study(tmp_path)
    spec.write_bytes(json.dumps({**SPEC, "description": "étude"}, ensure_ascii=False).encode("latin-1"))
    fails(spec, 2, "model spec", "model.json line 1", "not UTF-8")


# ---------------------------------------------------------------------------------------------------------------
# Numbers no float holds, and nesting no spec needs
# ---------------------------------------------------------------------------------------------------------------
def _with_text(tmp_path: Path, spec: dict, marker: str, replacement: str) -> Path:
    path = study(tmp_path, spec)
    path.write_text(path.read_text().replace(marker, replacement))
    return path


@pytest.mark.parametrize("number", ["1" + "0" * 400, "-" + "9" * 400, "1e999", "-1e400", "NaN", "Infinity"],
                         ids=["401-digit", "negative-400-digit", "1e999", "-1e400", "NaN", "Infinity"])
def test_center_no_float_holds(tmp_path: Path, number: str) -> None:
    spec = {**SPEC, "covariates": {"age": {"center": 12345}}}
    path = _with_text(tmp_path, spec, "12345", number)
    fails(path, 2, "$.covariates.age.center", "64-bit float")


@pytest.mark.parametrize("number", ["7" * 400, "1e999"], ids=["400-digit", "1e999"])
def test_at_value_no_float_holds(tmp_path: Path, number: str) -> None:
    spec = {**SPEC, "hypotheses": {"group_old": {"compare": {"group": ["patient", "control"]}, "at": {"age": 12345}}}}
    path = _with_text(tmp_path, spec, "12345", number)
    fails(path, 2, "$.hypotheses.group_old.at.age", "64-bit float", "write a smaller number")


def test_5000_digit_integer(tmp_path: Path) -> None:
    path = _with_text(tmp_path, {**SPEC, "inference": {"seed": 12345}}, "12345", "9" * 5000)
    fails(path, 2, "$.inference.seed", "5000-digit integer")


@pytest.mark.parametrize("depth", [40, 100_000])
def test_deeply_nested_arrays(tmp_path: Path, depth: int) -> None:
    path = _with_text(tmp_path, {**SPEC, "terms": "TERMS"}, '"TERMS"', "[" * depth + "]" * depth)
    fails(path, 2, "model spec", "nested")


def test_numbers_no_float_holds_from_the_api(tmp_path: Path) -> None:
    """A spec given as a dict is checked the same way (with the JSON path)."""
    study(tmp_path)
    raw = {**SPEC, "covariates": {"age": {"center": float("inf")}}}
    with pytest.raises(SpecError, match=r"\$\.covariates\.age\.center"):
        spec_from_dict(raw, tmp_path / "model.json")
    assert load_spec(tmp_path / "model.json").covariates["age"].center == "mean"  # the good one still loads


# ---------------------------------------------------------------------------------------------------------------
# Counts, seeds and budgets
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("extra, fragment", [
    (("--seed", "-1", "--permutations", "10"), "argument --seed: expected a whole number >= 0, found -1"),
    (("--permutations", "-5"), "argument --permutations: expected a whole number >= 0, found -5"),
    (("--memory", "0"), "argument --memory"),
    (("--memory=-1GB",), "argument --memory"),
    (("--memory", "inf"), "argument --memory"),
    (("--cluster-threshold", "nan", "--permutations", "10"), "argument --cluster-threshold"),
])
def test_bad_numbers_on_the_command_line(tmp_path: Path, extra: tuple[str, ...], fragment: str) -> None:
    spec = study(tmp_path, images=True)
    fails(spec, 2, fragment, command=("fit",), extra=extra)


@pytest.mark.parametrize("settings, fragment", [
    ({"permutations": -5}, "--permutations must be a whole number >= 0; got -5"),
    ({"permutations": 10, "seed": -1}, "--seed must be a whole number >= 0; got -1"),
    ({"permutations": 2.5}, "--permutations must be a whole number"),
    ({"permutations": 10, "cluster_threshold": float("nan")}, "--cluster-threshold must be a finite number"),
    ({"permutations": 10, "tfce": True, "tfce_step": 0.0}, "tfce_step must be > 0"),
])
def test_inference_options_for_api_callers(settings: dict, fragment: str) -> None:
    with pytest.raises(InputError) as exc:
        InferenceOptions(**settings).validated()
    assert fragment in str(exc.value)


@pytest.mark.parametrize("value", ["95", "0", "1", "-0.5"])
@pytest.mark.parametrize("table", [False, True])
def test_ci_level_outside_zero_and_one(tmp_path: Path, value: str, table: bool) -> None:
    spec = study(tmp_path, images=not table)
    extra = ("--ci-level", value, *(("--outcome", "age") if table else ()))
    fails(spec, 2, "--ci-level (inference.ci_level) must be a number between 0 and 1", "--ci-level 0.95",
          command=("fit",), extra=extra)


def test_ci_level_outside_zero_and_one_in_the_spec(tmp_path: Path) -> None:
    fails(study(tmp_path, {**SPEC, "inference": {"ci_level": 95}}), 2, "$.inference.ci_level")


def test_ci_level_for_api_callers() -> None:
    with pytest.raises(InputError, match="between 0 and 1; got True"):
        InferenceOptions(ci_level=True).validated()  # type: ignore[arg-type]


def test_negative_seed_in_the_spec(tmp_path: Path) -> None:
    fails(study(tmp_path, {**SPEC, "inference": {"seed": -1}}), 2, "$.inference.seed", "minimum of 0")


@pytest.mark.parametrize("total", [0, -1, float("inf")])
def test_memory_budget_for_api_callers(total: float) -> None:
    with pytest.raises(InputError, match="memory budget"):
        MemoryBudget(total)  # type: ignore[arg-type]


# ---------------------------------------------------------------------------------------------------------------
# An empty field (BIDS writes missing values as n/a)
# ---------------------------------------------------------------------------------------------------------------
def test_empty_field_in_a_column_the_model_reads(tmp_path: Path) -> None:
    spec = study(tmp_path, tsv=TSV.replace("sub-04\tcontrol\t52", "sub-04\tcontrol\t"))
    fails(spec, 2, "participants.tsv row 4, column 'age'", "empty", "n/a")


def test_empty_field_in_a_column_the_model_does_not_read(tmp_path: Path) -> None:
    tsv = "\n".join(line + ("\tnotes" if i == 0 else "\t") for i, line in enumerate(TSV.splitlines())) + "\n"
    spec = study(tmp_path, tsv=tsv)
    with contextlib.redirect_stdout(io.StringIO()):
        assert cli.main(["build", str(spec), "--out", str(tmp_path / "ok"), "--no-pictures"]) == 0


# ---------------------------------------------------------------------------------------------------------------
# What a killed run leaves beside --out
# ---------------------------------------------------------------------------------------------------------------
KILLED_WHILE_WRITING = """
import os, signal, sys
from groupmodel.outputs.folder import OutputFolder
folder = OutputFolder(sys.argv[1]).__enter__()
folder.write_text("design.tsv", "half")
os.kill(os.getpid(), signal.SIGKILL)
"""


def test_the_next_run_removes_what_a_killed_run_left(tmp_path: Path) -> None:
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-c", KILLED_WHILE_WRITING, str(out)])
    assert proc.wait(timeout=120) == -9
    (left,) = tmp_path.glob(".out.partial-*")
    stdout = io.StringIO()
    with contextlib.redirect_stdout(stdout):
        assert cli.main(["build", str(study(tmp_path)), "--out", str(out), "--no-pictures"]) == 0
    assert not left.exists()
    removed = [line for line in stdout.getvalue().splitlines() if line.startswith("removed ")]
    assert len(removed) == 1 and left.name in removed[0] and f"process {proc.pid}" in removed[0]
    assert sorted(p.name for p in out.iterdir()) == [".groupmodel-output.json", "contrasts.json", "contrasts.tsv",
                                                     "dataset_description.json", "design.json", "design.tsv",
                                                     "outputs.json", "participants_included.tsv", "report.html"]


def test_a_live_run_and_unknown_folders_are_left_alone(tmp_path: Path) -> None:
    out = tmp_path / "out"
    live = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        stranger = tmp_path / ".out.partial-stranger"  # no owner file: not ours to judge
        stranger.mkdir()
        running = tmp_path / ".out.partial-running"
        running.mkdir()
        with OutputFolder(tmp_path / "elsewhere") as probe:  # the owner file of this host, as a run writes it
            owner = json.loads((probe.path / ".groupmodel-owner.json").read_text()) | {"pid": live.pid}
            owner.pop("process_start")
        (running / ".groupmodel-owner.json").write_text(json.dumps(owner))
        other_host = tmp_path / ".out.partial-otherhost"
        other_host.mkdir()
        (other_host / ".groupmodel-owner.json").write_text(json.dumps({**owner, "pid": 2**22 + 7,
                                                                       "host": "another-host"}))
        folder = OutputFolder(out)
        assert folder.removed == ()
        assert stranger.exists() and running.exists() and other_host.exists()
    finally:
        live.kill()
        live.wait()
    assert [r.path for r in OutputFolder(out).removed] == [running]  # its process has ended now


def test_a_finished_folder_holds_no_owner_file(tmp_path: Path) -> None:
    with OutputFolder(tmp_path / "out") as folder:
        folder.write_text("a.txt", "x")
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [".groupmodel-output.json", "a.txt"]
    with OutputFolder(tmp_path / "out", force=True) as folder:
        folder.write_text("b.txt", "y")
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [".groupmodel-output.json", "b.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["out"]
