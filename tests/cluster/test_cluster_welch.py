"""Variance groups (Welch's v and G) on a Dask cluster (a LocalCluster of 2 worker processes) equal the local run.

Reference: the local engine with the same seed and data; the local Welch fit and permutations are themselves
checked against scipy (``scipy.stats.ttest_ind(equal_var=False)``, ``scipy.stats.f_oneway(equal_var=False)`` and
the rearrangements recomputed with scipy) in tests/reference/test_welch_voxelwise_reference.py.  Permutation p
maps (counts of rearrangements) must be identical bit for bit, statistics equal to 1e-12 relative.
"""

from __future__ import annotations

import json
import os
import signal
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

distributed = pytest.importorskip("distributed", reason='Dask is an optional extra: pip install -e ".[cluster]"')

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "unit"))
from test_fit_voxelwise import make_study  # noqa: E402

from groupmodel.analysis.corrections import InferenceOptions  # noqa: E402
from groupmodel.cli import main  # noqa: E402
from groupmodel.fit import fit_images  # noqa: E402
from groupmodel.runtime.log import StageLog  # noqa: E402

STAT_RTOL = 1e-12
OPTS = InferenceOptions(permutations=250, seed=4, threads=1, jobs=1)


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    spec = make_study(tmp_path_factory.mktemp("welch") / "study", n=30)
    body = json.loads(spec.read_text())
    body["variance_groups"] = "group"
    spec.write_text(json.dumps(body))
    return spec


@pytest.fixture(scope="module")
def local_fit(study: Path):
    return fit_images(study, progress=False, inference=OPTS)


def _assert_same(a, b, label: str) -> None:
    assert a.variance_groups == b.variance_groups and a.records == b.records, label
    for name, maps in a.maps.items():
        assert set(maps) == set(b.maps[name]), label
        for stat, values in maps.items():
            where = f"{label}: {name} {stat}"
            if stat in ("p_perm", "p_fwe"):
                np.testing.assert_array_equal(b.maps[name][stat], values, err_msg=where)
            else:
                np.testing.assert_allclose(b.maps[name][stat], values, rtol=STAT_RTOL, atol=0, err_msg=where)
    assert a.warnings == b.warnings, label
    # the mean image and the per-participant residual sums (added in chunk order), from the same chunks
    np.testing.assert_array_equal(b.mean_input, a.mean_input, err_msg=label)
    pd.testing.assert_frame_equal(b.participant_residuals, a.participant_residuals, check_exact=True)


def test_welch_permutations_on_the_cluster_equal_the_local_run(client, study: Path, local_fit) -> None:
    maps = local_fit.maps
    assert "v" in maps["age"] and "G" in maps["group"] and "p_fwe" in maps["age"]
    methods = {rec["method"] for rec in local_fit.records.values()}
    assert {"permutation", "sign_flip"} <= methods, methods  # both kinds of rearrangement are exercised
    for chunk in (None, 37):
        on_cluster = fit_images(study, progress=False, inference=OPTS, client=client, chunk_voxels=chunk)
        if chunk is None:
            _assert_same(local_fit, on_cluster, "default chunks")
        else:  # the same chunks here: the same bits
            _assert_same(fit_images(study, progress=False, inference=OPTS, chunk_voxels=chunk), on_cluster,
                         f"chunk {chunk}")


class _KillOnce(StageLog):
    """A log that kills one worker process when the third permutation task is reported done."""

    def __init__(self, pid: int) -> None:
        super().__init__(quiet=True)
        self.pid, self.killed = pid, False

    def progress(self, name: str, done: int, total: int, unit: str = "") -> None:
        if name == "permutation tasks" and done >= 3 and not self.killed:
            os.kill(self.pid, signal.SIGKILL)
            self.killed = True


def test_welch_on_the_cluster_survives_a_killed_worker(client, study: Path) -> None:
    log = _KillOnce(sorted(client.run(os.getpid).values())[0])
    on_cluster = fit_images(study, progress=False, inference=OPTS, client=client, chunk_voxels=23, log=log)
    assert log.killed, "no worker was killed"
    client.wait_for_workers(2, timeout=60)
    assert log.pid not in client.run(os.getpid).values()  # a new worker process took its place
    _assert_same(fit_images(study, progress=False, inference=OPTS, chunk_voxels=23), on_cluster, "killed worker")


def test_cli_welch_with_scheduler_writes_the_local_maps(client, study: Path, tmp_path: Path) -> None:
    import nibabel as nib

    args = ["fit", str(study), "--permutations", "120", "--seed", "6", "--no-pictures", "--quiet"]
    assert main([*args, "--out", str(tmp_path / "here")]) == 0
    assert main([*args, "--out", str(tmp_path / "there"), "--scheduler", client.scheduler.address]) == 0
    for name, stat in (("age", "v"), ("age", "p_perm"), ("age", "p_fwe"), ("group", "G"), ("group", "p_fwe")):
        here, there = (nib.load(tmp_path / d / "hypotheses" / name / f"{stat}.nii.gz") for d in ("here", "there"))
        np.testing.assert_array_equal(np.asanyarray(there.dataobj), np.asanyarray(here.dataobj), err_msg=stat)
