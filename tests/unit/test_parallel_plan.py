"""Worker processes of TFCE/cluster nulls are counted inside --memory: about 250 MB each, together at most a fifth
of the budget (floor(0.2 * budget / 250 MB) workers; arithmetic by hand beside each case)."""

from __future__ import annotations

import pytest

from groupmodel.analysis import parallel
from groupmodel.analysis.parallel import parallel_plan
from groupmodel.model.options import InferenceOptions
from groupmodel.runtime.cores import CoreLimit
from groupmodel.runtime.memory import MemoryBudget

MB = 2**20


@pytest.fixture(autouse=True)
def eight_cores(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(parallel, "core_limit", lambda: CoreLimit(8, "8 cores available"))


def test_workers_fit_the_budget() -> None:
    tfce = InferenceOptions(permutations=100, tfce=True)
    assert parallel_plan(tfce, MemoryBudget(2048 * MB)).workers == 0  # 409.6 MB: 1 worker, i.e. none
    assert parallel_plan(tfce, MemoryBudget(4096 * MB)).workers == 3  # 819.2 MB: 3 workers
    assert parallel_plan(tfce, MemoryBudget(64 * 1024 * MB)).workers == 8  # capped by the cores
    assert parallel_plan(tfce, MemoryBudget(4096 * MB)).as_dict() == {
        "cores": 8, "cores_from": "8 cores available", "threads": 8, "worker_processes": 3}


def test_no_workers_without_whole_maps_and_explicit_jobs_warned() -> None:
    assert parallel_plan(InferenceOptions(permutations=100), MemoryBudget(64 * 1024 * MB)).workers == 0
    plan = parallel_plan(InferenceOptions(permutations=100, tfce=True, jobs=4, threads=2), MemoryBudget(1024 * MB))
    assert (plan.workers, plan.threads) == (4, 2)
    assert plan.warning is not None and "about 1000 MB" in plan.warning and "205 MB" in plan.warning


def test_a_budget_too_small_for_the_data_says_what_it_costs() -> None:
    # 10 MiB of data, a 4 MiB budget (data share 0.6 * 4 = 2.4 MiB); 3 hypotheses x ceil(250 / 100) batches = 9
    text = parallel.spill_warning(10 * MB, MemoryBudget(4 * MB), 40, InferenceOptions(permutations=250), 3)
    assert text == ("--memory 4 MB: the image data (10 MB) do not fit its 2.4 MB data share and are read from a file "
                    "on disk in 40 chunks: 1 pass for the fit, then at least 9 more for the permutations (one per "
                    "batch of rearrangements and hypothesis); a --memory of about 16.7 MB would keep them in memory")
