"""Checkpoints of permutations run on a Dask cluster (a LocalCluster of 2 worker processes): a run stopped mid-way
and resumed gives the maps of a run never stopped, bit for bit, and a checkpoint made on the cluster resumes here
and one made here resumes on the cluster (the same format).

Reference: the local engine with the same seed, never stopped (its own checkpoints are checked against an
uninterrupted run in tests/cli/test_cli_resume.py; the engine against scipy and brute force in tests/reference/).
The claim is bit identity of the permutation p maps, so they are compared exactly.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed", reason='Dask is an optional extra: pip install -e ".[cluster]"')

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "unit"))
from test_fit_voxelwise import make_study  # noqa: E402

from groupmodel.analysis.corrections import InferenceOptions  # noqa: E402
from groupmodel.analysis.voxel_fit import open_images  # noqa: E402
from groupmodel.fit import fit_images  # noqa: E402
from groupmodel.images import load_masked  # noqa: E402
from groupmodel.images.columns import ColumnReader  # noqa: E402
from groupmodel.inference.checkpoint import CheckpointFolder, ContrastCheckpoint  # noqa: E402
from groupmodel.inference.distributed import ClusterWork, run_on_cluster  # noqa: E402
from groupmodel.inference.driver import run_permutations  # noqa: E402
from groupmodel.inference.settings import ContrastTest, Execution, Rearrangements  # noqa: E402
from groupmodel.model.assembly import build  # noqa: E402
from groupmodel.model.spec import load_spec  # noqa: E402
from groupmodel.runtime.cluster import DaskExecutor  # noqa: E402
from groupmodel.runtime.log import StageLog  # noqa: E402

REARR = Rearrangements(n_perm=600, seed=5)
EXECUTION = Execution(threads=1, batch_size=20, chunk_size=30)
KEY = {"permutations": 600, "seed": 5, "method": "auto"}


class _Stop(Exception):
    """Stands for the job being killed."""


def _stop_after(rearrangements: int):
    def progress(done: int, total: int) -> None:
        if done >= rearrangements:
            raise _Stop
    return progress


def _partial(path: Path, J: int) -> bool:
    """A state of part of the rearrangements is saved there."""
    return path.exists() and 0 < _saved(path) < J


def _stop_when_partial(path: Path, J: int, ck: object = None):
    """Stop (as a kill would) once a checkpoint of part of the rearrangements is saved."""
    def progress(done: int, total: int) -> None:
        if _partial(path, J):
            raise _Stop(ck)
    return progress


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_study(tmp_path_factory.mktemp("checkpoint") / "study", n=20)


@pytest.fixture(scope="module")
def contrast(study: Path):
    model, source, _ = open_images(build(load_spec(study)))
    h = model.hypotheses["group"]
    test = ContrastTest(model.design.matrix, h.weights, kind=h.test, tail=h.test_tail, name=h.name)
    with load_masked(source, None, 10**8) as data:
        local = run_permutations(test, data.data, REARR, execution=EXECUTION)
        yield test, data.data.copy(), ColumnReader.of(source, data), local


def _saved(path: Path) -> int:
    with np.load(path) as z:
        return int(z["done"])


def _stopped(run, attempts: int = 5):
    """The checkpoint of the first of ``run(attempt)`` that is stopped mid-way.  (Rarely, on a busy machine, the
    client collects a first-batch task after every later one: its first save then holds all the rearrangements,
    and the run is not stopped; it is tried again.)"""
    for attempt in range(attempts):
        try:
            run(attempt)
        except _Stop as stop:
            return stop.args[0]
    raise AssertionError(f"none of {attempts} runs could be stopped mid-way")


def _assert_same(res, local) -> None:
    np.testing.assert_array_equal(res.p_perm, local.p_perm)
    np.testing.assert_array_equal(res.p_fwe, local.p_fwe)
    np.testing.assert_array_equal(res.max_null, local.max_null)
    np.testing.assert_allclose(res.stat, local.stat, rtol=1e-12)


def test_stopped_on_the_cluster_resumed_on_the_cluster_or_here(client, contrast, tmp_path: Path) -> None:
    test, _, reader, local = contrast
    ex, work = DaskExecutor(client), ClusterWork(tasks_per_worker=8, cache_bytes=10**7)
    for resume_here in (False, True):
        def run(attempt: int, resume_here: bool = resume_here) -> ContrastCheckpoint:
            ck = ContrastCheckpoint(tmp_path / f"{resume_here}{attempt}.npz", KEY, every=0)
            run_on_cluster(ex, reader, test, REARR, execution=EXECUTION, work=work,
                           progress=_stop_when_partial(ck.path, 600, ck), checkpoint=ck)
            return ck

        ck = _stopped(run)
        assert 0 < _saved(ck.path) < 600  # stopped mid-way, a prefix of the rearrangements saved
        if resume_here:
            res = run_permutations(test, contrast[1], REARR, execution=EXECUTION, checkpoint=ck)
        else:
            res = run_on_cluster(ex, reader, test, REARR, execution=EXECUTION, work=work, checkpoint=ck)
        assert _saved(ck.path) == 600
        _assert_same(res, local)


def test_stopped_here_resumed_on_the_cluster(client, contrast, tmp_path: Path) -> None:
    test, y, reader, local = contrast
    ck = ContrastCheckpoint(tmp_path / "here.npz", KEY, every=0)
    with pytest.raises(_Stop):
        run_permutations(test, y, REARR, execution=EXECUTION, progress=_stop_after(200),
                         checkpoint=ck)
    assert 0 < _saved(ck.path) < 600
    res = run_on_cluster(DaskExecutor(client), reader, test, REARR, execution=EXECUTION,
                         work=ClusterWork(cache_bytes=10**7), checkpoint=ck)
    _assert_same(res, local)


class _StopLog(StageLog):
    """Stops the fit (as a kill would) once a hypothesis is done and the next has saved part of its rearrangements."""

    def __init__(self, folder: Path, J: int) -> None:
        super().__init__(quiet=True)
        self.folder, self.J = folder, J

    def progress(self, name: str, done: int, total: int, unit: str = "") -> None:
        saved = [_saved(p) for p in self.folder.glob("*.npz")]
        if self.J in saved and any(0 < s < self.J for s in saved):
            raise _Stop(self.folder)


def test_tfce_and_clusters_resumed_on_the_cluster_equal_a_run_never_stopped(client, study: Path,
                                                                             tmp_path: Path) -> None:
    opts = InferenceOptions(permutations=300, seed=7, tfce=True, cluster_threshold=2.3, threads=1, jobs=1)
    whole = fit_images(study, progress=False, inference=opts)

    def run(attempt: int) -> None:
        folder = tmp_path / f"ck{attempt}"
        fit_images(study, progress=False, inference=opts, client=client, log=_StopLog(folder, 300),
                   checkpoint=CheckpointFolder(folder, {"run": 1}, resume=False, every=0))

    folder = _stopped(run)
    saved = sorted(_saved(p) for p in folder.glob("*.npz"))
    assert 300 in saved and any(0 < s < 300 for s in saved), saved  # stopped inside a hypothesis
    resumed = fit_images(study, progress=False, inference=opts, client=client,
                         checkpoint=CheckpointFolder(folder, {"run": 1}, resume=True, every=0))
    for name, maps in whole.maps.items():
        for stat in ("p_perm", "p_fwe", "p_tfce_fwe", "p_cluster_fwe"):
            np.testing.assert_array_equal(resumed.maps[name][stat], maps[stat], err_msg=f"{name} {stat}")
    assert resumed.tables.keys() == whole.tables.keys()
