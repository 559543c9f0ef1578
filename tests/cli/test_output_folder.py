"""The output folder: a BIDS derivatives dataset, one folder per hypothesis, an index of every file, the
provenance of the run in every sidecar, and per-hypothesis peaks in the summary.

References: the BIDS specification, version 1.10.0 ("Modality agnostic files": dataset_description.json,
``Name`` and ``BIDSVersion`` REQUIRED; "Derivatives": ``DatasetType`` "derivative" and ``GeneratedBy``
REQUIRED, each ``GeneratedBy`` object with a REQUIRED ``Name``; ``SourceDatasets`` RECOMMENDED, objects with
``URL``, ``DOI``, ``Version``); Python's hashlib (SHA-256); nibabel (``load``, ``affines.apply_affine``) and
numpy (``argmax``) for the peak of a map read back from its file; pandas for the cluster tables; RFC 1952
(gzip member header: bytes 4-7 hold MTIME).
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import scipy

from groupmodel.cli import main
from groupmodel.outputs.index import KINDS, find, read_index
from groupmodel.outputs.provenance import TIME_KEYS

SHAPE = (7, 6, 5)
# not diagonal and not at the origin, so voxel indices and mm differ in every axis
AFFINE = np.array([[-2.0, 0.0, 0.0, 30.0], [0.0, 2.5, 0.0, -40.0], [0.0, 0.0, 3.0, -12.0], [0, 0, 0, 1]])
HYPOTHESES = {"b_vs_a": {"compare": {"group": ["b", "a"]}},
              "b_gt_a": {"compare": {"group": ["b", "a"]}, "tail": "greater"},
              "group": {"main": "group"}}


def make_study(root: Path, surface: bool = False, n: int = 20, seed: int = 4) -> Path:
    """Two groups of ``n / 2``; group b higher in a 2x2x2 patch; volumes (NIfTI) or flattened (GIFTI)."""
    rng = np.random.default_rng(seed)
    (root / "maps").mkdir(parents=True)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    group = np.array(["a", "b"])[np.arange(n) % 2]
    age = np.round(rng.normal(40, 8, n), 1)
    pd.DataFrame({"participant_id": ids, "group": group, "age": age}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    (root / "participants.json").write_text(json.dumps({"group": {"Levels": {"a": "group a", "b": "group b"}}}))
    for pid, g in zip(ids, group, strict=True):
        vol = rng.normal(0.0, 1.0, SHAPE)
        vol[2:4, 1:3, 2:4] += 3.0 * (g == "b")
        vol = vol.astype(np.float32)
        if surface:
            darray = nib.gifti.GiftiDataArray(vol.ravel(), datatype="NIFTI_TYPE_FLOAT32")
            nib.save(nib.gifti.GiftiImage(darrays=[darray]), root / "maps" / f"{pid}.gii")
        else:
            nib.save(nib.Nifti1Image(vol, AFFINE), root / "maps" / f"{pid}.nii.gz")
    spec = {"participants": "participants.tsv",
            "factors": {"group": {"levels": ["a", "b"], "coding": "effect"}},
            "covariates": {"age": {"center": "mean"}},
            "terms": ["group", "age"], "hypotheses": HYPOTHESES,
            "images": "maps/{participant_id}." + ("gii" if surface else "nii.gz")}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


def files_in(folder: Path) -> set[str]:
    """The files of a folder, hidden ones (the run's own record) left out, as the index does."""
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file() and not p.name.startswith(".")}


@pytest.fixture(scope="module")
def voxel_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("vox")
    spec = make_study(root / "study")
    out = root / "out"
    assert main(["fit", str(spec), "--out", str(out), "--permutations", "40", "--seed", "3", "--tfce",
                 "--cluster-threshold", "2.3"]) == 0
    return out


@pytest.fixture(scope="module")
def other_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A build, a table fit and a surface fit."""
    root = tmp_path_factory.mktemp("other")
    spec = make_study(root / "study")
    surface = make_study(root / "surface_study", surface=True)
    outs = {"build": root / "build", "table": root / "table", "surface": root / "surface"}
    assert main(["build", str(spec), "--out", str(outs["build"])]) == 0
    assert main(["fit", str(spec), "--outcome", "age", "--out", str(outs["table"])]) == 0
    assert main(["fit", str(surface), "--out", str(outs["surface"]), "--permutations", "20", "--seed", "1"]) == 0
    return outs


def all_runs(voxel_run: Path, other_runs: dict[str, Path]) -> list[Path]:
    return [voxel_run, *other_runs.values()]


# --------------------------------------------------------------------------------------------------
# BIDS derivatives dataset
# --------------------------------------------------------------------------------------------------
def test_every_folder_is_a_bids_derivative_dataset(voxel_run: Path, other_runs: dict[str, Path]) -> None:
    # Reference: BIDS specification 1.10.0, dataset_description.json (required fields; derivatives).
    for out in all_runs(voxel_run, other_runs):
        desc = json.loads((out / "dataset_description.json").read_text())
        assert isinstance(desc["Name"], str) and desc["Name"]
        assert desc["BIDSVersion"] == "1.10.0"
        assert desc["DatasetType"] == "derivative"
        assert isinstance(desc["GeneratedBy"], list) and desc["GeneratedBy"]
        generated = desc["GeneratedBy"][0]
        assert generated["Name"] == "groupmodel"
        assert isinstance(generated["Version"], str) and generated["Version"]
        assert generated["Description"].startswith("command line: groupmodel ")
        assert f"--out {out}" in generated["Description"]
        assert "SourceDatasets" not in desc  # the study folder is no BIDS dataset: nothing known


def test_source_dataset_named_when_the_participants_table_is_in_a_bids_dataset(tmp_path: Path) -> None:
    # Reference: BIDS 1.10.0, SourceDatasets (objects with URL, DOI, Version).
    spec = make_study(tmp_path / "study")
    (tmp_path / "study" / "dataset_description.json").write_text(json.dumps(
        {"Name": "invented study", "BIDSVersion": "1.10.0", "DatasetDOI": "doi:10.0000/invented"}))
    assert main(["build", str(spec), "--out", str(tmp_path / "out")]) == 0
    desc = json.loads((tmp_path / "out" / "dataset_description.json").read_text())
    assert desc["SourceDatasets"] == [{"URL": (tmp_path / "study").resolve().as_uri(),
                                       "DOI": "doi:10.0000/invented"}]


# --------------------------------------------------------------------------------------------------
# Layout and index
# --------------------------------------------------------------------------------------------------
def test_index_lists_every_file_once(voxel_run: Path, other_runs: dict[str, Path]) -> None:
    for out in all_runs(voxel_run, other_runs):
        entries = read_index(out)
        paths = [e.path for e in entries]
        assert len(paths) == len(set(paths))
        assert set(paths) == files_in(out) - {"outputs.json"}, out
        assert {e.kind for e in entries} <= set(KINDS)
        assert "outputs.json" not in paths


def test_maps_sit_in_one_folder_per_hypothesis(voxel_run: Path) -> None:
    top = {p.name for p in voxel_run.iterdir()}
    assert top == {"dataset_description.json", "outputs.json", "design.tsv", "design.json", "design.png",
                   "contrasts.tsv", "contrasts.json", "contrasts.png", "summary.tsv", "summary.json",
                   "mask.nii.gz", "mask.json", "residual_variance.nii.gz", "residual_variance.json", "hypotheses",
                   "participants_included.tsv", "mean_input.nii.gz", "mean_input.json", "participants_residuals.tsv",
                   "report.html", ".groupmodel-output.json"}
    assert {p.name for p in (voxel_run / "hypotheses").iterdir()} == set(HYPOTHESES)
    t_files = {p.name for p in (voxel_run / "hypotheses" / "b_vs_a").iterdir()}
    for stat in ("effect", "se", "t", "z", "p", "mlog10p", "p_fdr", "p_bonferroni", "p_perm", "p_fwe", "tfce",
                 "p_tfce_fwe", "p_cluster_fwe"):
        assert {f"{stat}.nii.gz", f"{stat}.json"} <= t_files, stat
    for kind in ("voxel_fwe", "tfce_fwe", "cluster_extent_fwe"):
        assert {f"clusters_{kind}.tsv", f"clusters_{kind}.json"} <= t_files, kind


def test_index_entries_agree_with_the_files(voxel_run: Path) -> None:
    # Each sidecar says which hypothesis and statistic it belongs to: the index must say the same, for the
    # sidecar and for the map or table beside it.
    entries = read_index(voxel_run)
    by_path = {e.path: e for e in entries}
    for e in entries:
        if e.kind != "sidecar":
            continue
        side = json.loads((voxel_run / e.path).read_text())
        assert (e.hypothesis, e.statistic) == (side.get("hypothesis"), side["statistic"]), e.path
        stem = e.path[: -len(".json")]
        partners = [by_path[p] for p in (stem + ".nii.gz", stem + ".tsv") if p in by_path]
        assert len(partners) == 1, e.path
        assert (partners[0].hypothesis, partners[0].statistic) == (e.hypothesis, e.statistic)
        assert partners[0].kind in ("map", "table", "mask")
    assert find(voxel_run, "b_vs_a", "t") == voxel_run / "hypotheses/b_vs_a/t.nii.gz"
    assert find(voxel_run, "group", "F", kind="sidecar") == voxel_run / "hypotheses/group/F.json"
    assert find(voxel_run, "b_gt_a", "clusters_tfce_fwe", kind="table") == \
        voxel_run / "hypotheses/b_gt_a/clusters_tfce_fwe.tsv"
    assert find(voxel_run, None, "residual_variance") == voxel_run / "residual_variance.nii.gz"
    assert find(voxel_run, None, "mask", kind="mask") == voxel_run / "mask.nii.gz"
    assert find(voxel_run, "b_vs_a", "no_such_statistic") is None
    kinds = {e.path: e.kind for e in entries}
    assert kinds["design.tsv"] == kinds["design.json"] == "design"
    assert kinds["summary.json"] == "summary" and kinds["dataset_description.json"] == "dataset"
    assert kinds["design.png"] == "picture"


def test_a_new_statistic_lands_in_its_place_without_edits(tmp_path: Path) -> None:
    # The layout is derived from (hypothesis, statistic): a map another part of the program adds appears at
    # hypotheses/<name>/<statistic> and in the index, with a sidecar of the same hypothesis and statistic.
    from groupmodel.fit import fit_images, write_voxel_fit

    fit = fit_images(make_study(tmp_path / "study"), progress=False)
    fit.maps["b_vs_a"]["ci_lower"] = fit.maps["b_vs_a"]["effect"] - 1.0
    write_voxel_fit(fit, tmp_path / "out", pictures=False)
    path = find(tmp_path / "out", "b_vs_a", "ci_lower")
    assert path == tmp_path / "out" / "hypotheses/b_vs_a/ci_lower.nii.gz"
    side = json.loads(find(tmp_path / "out", "b_vs_a", "ci_lower", kind="sidecar").read_text())
    assert side["statistic"] == "ci_lower" and side["hypothesis"] == "b_vs_a"


# --------------------------------------------------------------------------------------------------
# Provenance
# --------------------------------------------------------------------------------------------------
def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()  # Python's hashlib, on the whole file


def test_every_sidecar_records_the_inputs_and_versions(voxel_run: Path, other_runs: dict[str, Path]) -> None:
    # Reference: hashlib.sha256 of each input file; the versions the libraries report of themselves.
    study = voxel_run.parent / "study"
    for out in all_runs(voxel_run, other_runs):
        for e in read_index(out):
            if not e.path.endswith(".json") or e.kind == "dataset":
                continue
            record = json.loads((out / e.path).read_text())["provenance"]
            inputs = record["inputs"]
            if out == voxel_run:
                assert inputs["spec"]["sha256"] == _sha256(study / "model.json")
                assert inputs["participants"]["sha256"] == _sha256(study / "participants.tsv")
                assert inputs["participants_sidecar"]["sha256"] == _sha256(study / "participants.json")
                assert inputs["mask"] is None
                assert record["images"]["count"] == 20
                assert record["images"]["total_bytes"] == sum(p.stat().st_size for p in (study / "maps").iterdir())
            assert record["software_versions"]["numpy"] == np.__version__
            assert record["software_versions"]["scipy"] == scipy.__version__
            assert record["software_versions"]["nibabel"] == nib.__version__
            assert record["software_versions"]["groupmodel"] == json.loads(
                (out / "dataset_description.json").read_text())["GeneratedBy"][0]["Version"]
            assert set(TIME_KEYS) <= set(record) and record["wall_time_seconds"] >= 0
            assert record["started"].endswith("Z")
    surface_record = json.loads((other_runs["surface"] / "summary.json").read_text())["provenance"]
    assert surface_record["images"]["count"] == 20


def test_the_image_list_digest_follows_the_documented_rule(voxel_run: Path) -> None:
    # The digest is reproducible from outside: one line per image (path, volume, size, mtime in ns).
    study = voxel_run.parent / "study"
    record = json.loads((voxel_run / "summary.json").read_text())["provenance"]
    pids = pd.read_csv(study / "participants.tsv", sep="\t")["participant_id"]
    lines = []
    for pid in pids:
        path = study / "maps" / f"{pid}.nii.gz"
        st = path.stat()
        lines.append(f"{path}\t\t{st.st_size}\t{st.st_mtime_ns}\n")
    assert record["images"]["list_sha256"] == hashlib.sha256("".join(lines).encode()).hexdigest()


def test_one_changed_byte_of_participants_tsv_changes_the_recorded_hash(tmp_path: Path) -> None:
    spec = make_study(tmp_path / "study")
    assert main(["build", str(spec), "--out", str(tmp_path / "one")]) == 0
    table = tmp_path / "study" / "participants.tsv"
    data = bytearray(table.read_bytes())
    at = data.rindex(b".")  # the last age's decimal point: one byte, still a number
    data[at + 1] = ord("0") if data[at + 1] != ord("0") else ord("1")
    table.write_bytes(bytes(data))
    assert main(["build", str(spec), "--out", str(tmp_path / "two")]) == 0
    one = json.loads((tmp_path / "one" / "design.json").read_text())["provenance"]["inputs"]
    two = json.loads((tmp_path / "two" / "design.json").read_text())["provenance"]["inputs"]
    assert one["participants"]["sha256"] != two["participants"]["sha256"]
    assert two["participants"]["sha256"] == _sha256(table)
    assert one["spec"] == two["spec"] and one["participants_sidecar"] == two["participants_sidecar"]


def test_a_mask_file_given_is_hashed(tmp_path: Path) -> None:
    spec = make_study(tmp_path / "study")
    mask = np.zeros(SHAPE, np.uint8)
    mask[1:6, 1:5, 1:4] = 1
    nib.save(nib.Nifti1Image(mask, AFFINE), tmp_path / "mask.nii.gz")
    out = tmp_path / "out"
    assert main(["fit", str(spec), "--out", str(out), "--mask", str(tmp_path / "mask.nii.gz"),
                 "--no-pictures"]) == 0
    record = json.loads((out / "hypotheses/b_vs_a/t.json").read_text())["provenance"]
    assert record["inputs"]["mask"] == {"path": str(tmp_path / "mask.nii.gz"),
                                        "sha256": _sha256(tmp_path / "mask.nii.gz")}


def _without_time(value: object) -> object:
    if isinstance(value, dict):
        return {k: _without_time(v) for k, v in value.items() if k not in TIME_KEYS}
    if isinstance(value, list):
        return [_without_time(v) for v in value]
    return value


def test_identical_inputs_give_identical_files_apart_from_the_time_fields(tmp_path: Path) -> None:
    spec = make_study(tmp_path / "study")
    out = tmp_path / "out"
    args = ["fit", str(spec), "--out", str(out), "--permutations", "30", "--seed", "5", "--tfce",
            "--cluster-threshold", "2.3"]
    assert main(args) == 0
    shutil.move(out, tmp_path / "first")
    assert main(args) == 0
    first, second = tmp_path / "first", out
    assert files_in(first) == files_in(second)
    differs_in_time = 0
    for rel in sorted(files_in(first)):
        a, b = (first / rel).read_bytes(), (second / rel).read_bytes()
        if rel.endswith(".json"):
            ja, jb = json.loads(a), json.loads(b)
            assert _without_time(ja) == _without_time(jb), rel
            differs_in_time += ja != jb
        else:
            assert a == b, rel  # maps (gzip included), tables and pictures byte for byte
        if rel.endswith(".gz"):
            assert a[:2] == b"\x1f\x8b" and a[4:8] == b"\0\0\0\0", rel  # RFC 1952: MTIME not set
    assert differs_in_time > 0  # the time fields are there and did change (else the check proves nothing)


# --------------------------------------------------------------------------------------------------
# Summary: peaks, counts, clusters
# --------------------------------------------------------------------------------------------------
def test_summary_peaks_are_where_the_maps_say(voxel_run: Path) -> None:
    # Reference: the statistic map read back with nibabel, its peak found with numpy.argmax, its mm
    # coordinates with nibabel.affines.apply_affine; cluster counts from the tables read with pandas.
    summary = pd.read_csv(voxel_run / "summary.tsv", sep="\t").set_index("hypothesis")
    records = json.loads((voxel_run / "summary.json").read_text())["hypotheses"]
    mask = np.asanyarray(nib.load(voxel_run / "mask.nii.gz").dataobj).astype(bool)
    for name in HYPOTHESES:
        stat = "F" if name == "group" else "t"
        img = nib.load(find(voxel_run, name, stat))
        values = np.where(mask, np.asanyarray(img.dataobj, dtype=np.float64), 0.0)
        ijk = np.unravel_index(np.argmax(np.abs(values)), values.shape)
        row = summary.loc[name]
        assert (row["peak_i"], row["peak_j"], row["peak_k"]) == tuple(int(v) for v in ijk)
        np.testing.assert_allclose(row[["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float),
                                   nib.affines.apply_affine(img.affine, ijk), rtol=0, atol=1e-9)
        np.testing.assert_allclose(row["peak_statistic"], values[ijk], rtol=1e-6)  # maps are float32
        assert 2 <= ijk[0] <= 3 and 1 <= ijk[1] <= 2 and 2 <= ijk[2] <= 3  # inside the planted patch
        for kind in ("voxel_fwe", "tfce_fwe", "cluster_extent_fwe"):
            table = pd.read_csv(find(voxel_run, name, f"clusters_{kind}", kind="table"), sep="\t")
            assert row[f"clusters_{kind}"] == int((table["p_fwe"] < 0.05).sum()), (name, kind)
        assert row["clusters_voxel_fwe"] >= 1
        p = np.asanyarray(nib.load(find(voxel_run, name, "p")).dataobj)[mask]
        assert row["voxels_p_lt_0.05"] == int((p < 0.05).sum())
        record = records[name]
        assert record["peak_i"] == row["peak_i"] and record["clusters_tfce_fwe"] == row["clusters_tfce_fwe"]
        assert record["peak_statistic"] == pytest.approx(row["peak_statistic"], rel=1e-12)


def test_surface_summary_gives_the_peak_vertex(other_runs: dict[str, Path]) -> None:
    out = other_runs["surface"]
    summary = pd.read_csv(out / "summary.tsv", sep="\t").set_index("hypothesis")
    assert "peak_i" not in summary.columns and "peak_x_mm" not in summary.columns
    for name in HYPOTHESES:
        stat = "F" if name == "group" else "t"
        values = nib.load(find(out, name, stat)).darrays[0].data.astype(np.float64)
        assert summary.loc[name, "peak_vertex"] == int(np.argmax(np.abs(values)))


def test_refresh_index_adds_a_file_written_later(tmp_path: Path) -> None:
    # e.g. a report rebuilt from a finished folder: the index is rewritten from the files there.
    from groupmodel.outputs.index import refresh_index

    spec = make_study(tmp_path / "study")
    out = tmp_path / "out"
    assert main(["build", str(spec), "--out", str(out), "--no-pictures"]) == 0
    (out / "report.html").write_text("<!doctype html><title>t</title>")
    refresh_index(out)
    entries = {e.path: e for e in read_index(out)}
    assert set(entries) == files_in(out) - {"outputs.json"}
    assert entries["report.html"].kind == "report"
    # no temporary file of the atomic rewrite left behind (the run's record is the one hidden file)
    assert [p.name for p in out.iterdir() if p.name.startswith(".")] == [".groupmodel-output.json"]
