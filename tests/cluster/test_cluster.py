"""Fits and permutations on a Dask cluster (a LocalCluster of 2 worker processes) equal the local run.

Reference: the local engine on the same data and seed (itself checked against scipy.stats.permutation_test,
brute-force Freedman-Lane and the TFCE plateau in tests/reference/); p maps must be identical, statistics equal
to 1e-12 relative, whatever the chunking, the number of workers or the order tasks finish in.  The parametric
t of the cluster fit is also checked against statsmodels OLS at a few voxels.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

distributed = pytest.importorskip("distributed", reason='Dask is an optional extra: pip install -e ".[cluster]"')

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "unit"))
from test_fit_voxelwise import make_study  # noqa: E402

from groupmodel.analysis.cluster_fit import cluster_ready  # noqa: E402
from groupmodel.analysis.corrections import InferenceOptions  # noqa: E402
from groupmodel.analysis.voxel_fit import open_images  # noqa: E402
from groupmodel.cli import main  # noqa: E402
from groupmodel.errors import ImageError, InputError  # noqa: E402
from groupmodel.fit import fit_images  # noqa: E402
from groupmodel.images import load_masked  # noqa: E402
from groupmodel.images.columns import ColumnReader  # noqa: E402
from groupmodel.inference.distributed import ClusterWork, run_on_cluster  # noqa: E402
from groupmodel.inference.driver import run_permutations  # noqa: E402
from groupmodel.inference.settings import ContrastTest, Execution, Rearrangements  # noqa: E402
from groupmodel.model.assembly import build  # noqa: E402
from groupmodel.model.spec import load_spec  # noqa: E402
from groupmodel.runtime import cluster as cluster_module  # noqa: E402
from groupmodel.runtime.cluster import DaskExecutor, open_scheduler  # noqa: E402

OPTS = InferenceOptions(permutations=60, seed=11, tfce=True, cluster_threshold=2.3, threads=1, jobs=1)
STAT_RTOL = 1e-12
#: Permutation p maps: counts of rearrangements, identical for any chunking.
PERM_P = ("p_perm", "p_fwe", "p_tfce_fwe", "p_cluster_fwe")
#: Parametric p maps: functions of the statistic, identical with the same chunks (the same products), else
#: equal to the last bits a BLAS product may change with its shape.
PARAMETRIC_P = ("p", "mlog10p", "p_fdr", "p_bonferroni")


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_study(tmp_path_factory.mktemp("cluster") / "study", n=20)


@pytest.fixture(scope="module")
def local_fit(study: Path):
    return fit_images(study, progress=False, inference=OPTS)


def _assert_same(a, b, label: str, same_chunks: bool) -> None:
    assert np.array_equal(a.mask, b.mask)
    np.testing.assert_allclose(a.residual_variance, b.residual_variance, rtol=STAT_RTOL, err_msg=label)
    for name, maps in a.maps.items():
        assert set(maps) == set(b.maps[name])
        for stat, values in maps.items():
            where = f"{label}: {name} {stat}"
            if stat in PERM_P or (same_chunks and stat in PARAMETRIC_P):
                np.testing.assert_array_equal(b.maps[name][stat], values, err_msg=where)
            else:
                np.testing.assert_allclose(b.maps[name][stat], values, rtol=STAT_RTOL, atol=0, err_msg=where)
    if a.mean_input is not None:  # the same mean per voxel; the residual sums per participant added in chunk order
        np.testing.assert_array_equal(b.mean_input, a.mean_input, err_msg=label)
        res_a, res_b = a.participant_residuals, b.participant_residuals
        assert list(res_a.columns) == list(res_b.columns) and list(res_a.participant_id) == list(res_b.participant_id)
        np.testing.assert_allclose(res_b.mean_abs_residual, res_a.mean_abs_residual, rtol=0 if same_chunks else 1e-12,
                                   atol=0, err_msg=label)
    assert a.warnings == b.warnings, label


def test_cluster_fit_equals_the_local_fit_for_any_chunking(client, study: Path, local_fit) -> None:
    # Parametric maps, voxel max-statistic, TFCE and cluster-extent FWE with a fixed seed.
    for chunk in (None, 37):
        on_cluster = fit_images(study, progress=False, inference=OPTS, client=client, chunk_voxels=chunk)
        _assert_same(local_fit, on_cluster, f"chunk {chunk}", same_chunks=chunk is None)
    # With the same 30 chunks here, finished in any order there: the per-participant sums to the bit (added in
    # chunk order; added as they arrive from the workers they differed in the last bits, when tried).
    here, there = (fit_images(study, progress=False, inference=InferenceOptions(), chunk_voxels=7, client=c)
                   for c in (None, client))
    pd.testing.assert_frame_equal(there.participant_residuals, here.participant_residuals, check_exact=True)
    assert {"p_fwe", "p_tfce_fwe", "p_cluster_fwe"} <= set(local_fit.maps["age"])


def test_the_workers_find_the_mask_and_the_client_reads_no_matrix(client, study: Path, local_fit,
                                                                   monkeypatch) -> None:
    # The client no longer reads the images into the data matrix (nor spills it): the workers scan them for the
    # mask (groupmodel.images.mask_scan), with the same mask, exclusion counts and warnings as the local read.
    import groupmodel.images as images_module

    def refuse(*args, **kwargs):
        raise AssertionError("load_masked called on the client")

    monkeypatch.setattr(images_module, "load_masked", refuse)
    on_cluster = fit_images(study, progress=False, inference=OPTS, client=client)
    _assert_same(local_fit, on_cluster, "workers' mask", same_chunks=True)
    assert on_cluster.mask_report == local_fit.mask_report and on_cluster.mask_report["voxels_in_mask"] > 0


def test_an_image_without_finite_values_found_by_a_worker_is_one_image_error(client, tmp_path: Path) -> None:
    spec = make_study(tmp_path / "nan", n=9)
    _, source, _ = open_images(build(load_spec(spec)))
    bad = source.refs[4].path
    img = nib.load(bad)
    nib.save(nib.Nifti1Image(np.full(img.shape, np.nan, dtype=np.float32), img.affine), bad)
    with pytest.raises(ImageError, match="NaN/inf everywhere") as caught:
        fit_images(spec, progress=False, inference=InferenceOptions(), client=client)
    assert source.refs[4].label in str(caught.value) and caught.value.exit_code == 2


def test_cluster_t_matches_statsmodels(client, study: Path) -> None:
    # Reference: statsmodels OLS and its t_test of the hypothesis's weights, voxel by voxel.
    sm = pytest.importorskip("statsmodels.api")
    fit = fit_images(study, progress=False, inference=InferenceOptions(), client=client)
    model = build(load_spec(study))
    model, source, _ = open_images(model)
    with load_masked(source, None, 10**8) as data:
        y = np.asarray(data.data, dtype=np.float64)
    X = model.design.matrix
    for voxel in (0, 50, 111):
        res = sm.OLS(y[:, voxel], X).fit()
        t = float(np.squeeze(res.t_test(model.hypotheses["age"].weights).tvalue))
        np.testing.assert_allclose(fit.maps["age"]["t"][voxel], t, rtol=1e-8)


def test_workers_read_the_values_the_loader_keeps(study: Path, tmp_path: Path) -> None:
    # .nii.gz files, one 4-D file, uncompressed .nii: the same values as load_masked's matrix, bit for bit.
    for kind in ("nii.gz", "4d", "nii"):
        spec = make_study(tmp_path / kind, n=9, kind=kind)
        model, source, _ = open_images(build(load_spec(spec)))
        with load_masked(source, None, 10**8) as data:
            reader = ColumnReader.of(source, data)
            np.testing.assert_array_equal(reader.read(0, data.n_in_mask), data.data, err_msg=kind)
            np.testing.assert_array_equal(reader.read(17, 40), data.data[:, 17:40], err_msg=kind)


def test_a_worker_killed_mid_run_changes_nothing(client, study: Path) -> None:
    model, source, _ = open_images(build(load_spec(study)))
    h = model.hypotheses["group"]
    test = ContrastTest(model.design.matrix, h.weights, kind=h.test, tail=h.test_tail, name=h.name)
    rearr = Rearrangements(n_perm=600, seed=5)
    execution = Execution(threads=1, batch_size=20, chunk_size=30)
    pids = client.run(os.getpid)
    killed: list[int] = []

    def progress(done: int, total: int) -> None:
        if done == 8 and not killed:
            victim = sorted(pids.values())[0]
            os.kill(victim, signal.SIGKILL)
            killed.append(victim)

    with load_masked(source, None, 10**8) as data:
        local = run_permutations(test, data.data, rearr, execution=execution)
        reader = ColumnReader.of(source, data)
        ex = DaskExecutor(client)
        remote = run_on_cluster(ex, reader, test, rearr, execution=execution,
                                work=ClusterWork(tasks_per_worker=60, cache_bytes=10**7), progress=progress)
    assert killed, "no worker was killed"
    client.wait_for_workers(2, timeout=60)
    assert killed[0] not in client.run(os.getpid).values()  # a new worker process took its place
    np.testing.assert_array_equal(remote.p_perm, local.p_perm)
    np.testing.assert_array_equal(remote.p_fwe, local.p_fwe)
    np.testing.assert_allclose(remote.stat, local.stat, rtol=STAT_RTOL)
    np.testing.assert_allclose(remote.max_null, local.max_null, rtol=STAT_RTOL)


def test_a_worker_without_the_images_is_exit_2_naming_the_first_missing_path(client, study: Path,
                                                                               tmp_path: Path) -> None:
    copy = tmp_path / "study"
    shutil.copytree(study.parent, copy)
    model, source, _ = open_images(build(load_spec(copy / "model.json")))
    gone = source.refs[3].path
    gone.unlink()  # checked here by open_images; the workers now cannot read it
    with pytest.raises(ImageError) as caught:
        cluster_ready(client, source)  # what a fit asks before any image is read
    assert str(gone) in str(caught.value) and caught.value.exit_code == 2


def test_unreachable_scheduler_is_one_line_and_exit_2(study: Path, tmp_path: Path, capsys, monkeypatch) -> None:
    with pytest.raises(InputError, match="no Dask scheduler answered within 1 s"):
        open_scheduler("tcp://127.0.0.1:9", timeout=1)
    monkeypatch.setattr(cluster_module, "CONNECT_TIMEOUT", 1.0)
    code = main(["fit", str(study), "--out", str(tmp_path / "out"), "--scheduler", "tcp://127.0.0.1:9"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "tcp://127.0.0.1:9" in err[0]
    for bad in ("local:0", "local:x", "127.0.0.1:8786"):
        with pytest.raises(InputError, match="--scheduler"):
            open_scheduler(bad)


def test_cli_scheduler_address_writes_the_local_maps(client, study: Path, tmp_path: Path) -> None:
    # The running test cluster's scheduler, by its tcp:// address (local:N starts a cluster the same way).
    args = ["fit", str(study), "--permutations", "20", "--seed", "2", "--jobs", "1", "--no-pictures"]
    assert main([*args, "--out", str(tmp_path / "here")]) == 0
    assert main([*args, "--out", str(tmp_path / "there"), "--scheduler", client.scheduler.address]) == 0
    import nibabel as nib

    for name, stat in (("group", "p_fwe"), ("age", "p_perm"), ("age", "t"), ("b_vs_a", "cohens_d"),
                      ("", "mean_input")):
        here, there = (tmp_path / d / ("hypotheses/" + name if name else "") / f"{stat}.nii.gz"
                       for d in ("here", "there"))
        assert here.is_file() and there.is_file(), (name, stat)
        np.testing.assert_array_equal(np.asanyarray(nib.load(there).dataobj), np.asanyarray(nib.load(here).dataobj),
                                      err_msg=f"{name} {stat}")
    tables = [(tmp_path / d / "participants_residuals.tsv").read_text() for d in ("here", "there")]
    assert tables[0] == tables[1]
    # The same files and the same index; the scheduler is in the run record, and only there.
    files = sorted(str(p.relative_to(tmp_path / "here")) for p in (tmp_path / "here").rglob("*") if p.is_file())
    assert files == sorted(str(p.relative_to(tmp_path / "there")) for p in (tmp_path / "there").rglob("*")
                           if p.is_file())
    index = [json.loads((tmp_path / d / "outputs.json").read_text()) for d in ("here", "there")]
    assert _without_times(index[0]) == _without_times(index[1])
    runtime = [json.loads((tmp_path / d / "summary.json").read_text())["runtime"] for d in ("here", "there")]
    assert "scheduler" not in runtime[0]
    assert runtime[1]["scheduler"]["asked"] == client.scheduler.address and runtime[1]["scheduler"]["workers"] == 2


def _without_times(value):
    """A JSON value without the keys that differ between any two runs (times, folders, digests of them)."""
    if isinstance(value, dict):
        return {k: _without_times(v) for k, v in value.items()
                if not any(w in k for w in ("time", "date", "seconds", "command", "path", "sha"))}
    if isinstance(value, list):
        return [_without_times(v) for v in value]
    return value


def test_cli_checkpoint_with_a_scheduler(client, study: Path, tmp_path: Path) -> None:
    # Stopped and resumed runs on the cluster: tests/cluster/test_cluster_checkpoint.py; here the options together.
    import nibabel as nib

    args = ["fit", str(study), "--permutations", "40", "--seed", "8", "--tfce", "--no-pictures", "--quiet"]
    assert main([*args, "--out", str(tmp_path / "here")]) == 0
    ck = tmp_path / "ck"
    assert main([*args, "--out", str(tmp_path / "there"), "--checkpoint", str(ck), "--checkpoint-every", "0",
                 "--scheduler", client.scheduler.address]) == 0
    assert not ck.exists()  # removed once the results are written
    for stat in ("p_perm", "p_fwe", "p_tfce_fwe"):
        here, there = (nib.load(tmp_path / d / "hypotheses" / "age" / f"{stat}.nii.gz") for d in ("here", "there"))
        np.testing.assert_array_equal(np.asanyarray(there.dataobj), np.asanyarray(here.dataobj), err_msg=stat)


def test_within_participant_factors_with_a_scheduler_are_one_line_and_exit_2(client, tmp_path: Path,
                                                                             capsys) -> None:
    # Within-participant factors are fitted on this machine only: refused with a scheduler, before the images.
    import nibabel as nib

    (tmp_path / "maps").mkdir()
    rng = np.random.default_rng(2)
    ids = [f"sub-{i}" for i in range(6)]
    pd.DataFrame({"participant_id": ids, "group": ["a", "b"] * 3}).to_csv(tmp_path / "participants.tsv", sep="\t",
                                                                         index=False)
    rows = [{"participant_id": p, "session": s} for p in ids for s in ("s0", "s1")]
    pd.DataFrame(rows).to_csv(tmp_path / "observations.tsv", sep="\t", index=False)
    for r in rows:
        nib.save(nib.Nifti1Image(rng.normal(size=(2, 2, 2)).astype(np.float32), np.eye(4)),
                 tmp_path / "maps" / f"{r['participant_id']}_{r['session']}.nii.gz")
    spec = {"participants": "participants.tsv", "observations": "observations.tsv",
            "images": "maps/{participant_id}_{session}.nii.gz",
            "factors": {"group": {}, "session": {"within": True}}, "terms": ["group*session"],
            "hypotheses": {"session": {"main": "session"}}}
    (tmp_path / "model.json").write_text(json.dumps(spec))
    code = main(["fit", str(tmp_path / "model.json"), "--out", str(tmp_path / "out"),
                 "--scheduler", client.scheduler.address])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "within-participant" in err[0] and "--scheduler" in err[0], err
    assert not (tmp_path / "out").exists()
