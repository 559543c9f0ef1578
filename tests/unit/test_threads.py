"""How many threads the permutation loop uses: the smallest of CPU affinity, the process's own control-group CPU
quota (found through /proc/self/cgroup), SLURM_CPUS_PER_TASK and OMP_NUM_THREADS.

The file formats are those of the Linux kernel's cgroup documentation (cgroup v2 ``cpu.max``: "$MAX
$PERIOD" with "max" for no limit; cgroup v1 ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us`` with -1 for no
limit; /proc/<pid>/cgroup lines "hierarchy-ID:controller-list:cgroup-path", "0::path" for v2) [memory].
"""

from __future__ import annotations

from pathlib import Path

import pytest

from groupmodel.runtime import cores
from groupmodel.runtime.cores import CgroupFiles, CoreLimit, available_cores, core_limit, cpu_quota


def _fake(root: Path, membership: str) -> CgroupFiles:
    """A fake /proc/self/cgroup naming the process's groups, and an empty /sys/fs/cgroup under ``root``."""
    (root / "sys").mkdir(parents=True, exist_ok=True)
    (root / "proc_self_cgroup").write_text(membership)
    return CgroupFiles(root / "proc_self_cgroup", root / "sys")


def _v2(root: Path, text: str, group: str = "") -> CgroupFiles:
    files = _fake(root, f"0::/{group}\n")
    (files.root / "cgroup.controllers").write_text("cpu memory\n")
    (files.root / group).mkdir(parents=True, exist_ok=True)
    (files.root / group / "cpu.max").write_text(text)
    return files


def _v1(root: Path, quota: int, period: int, group: str = "", mount: str = "cpu") -> CgroupFiles:
    files = _fake(root, f"5:memory:/{group}\n4:{mount}:/{group}\n")
    folder = files.root / mount / group
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "cpu.cfs_quota_us").write_text(f"{quota}\n")
    (folder / "cpu.cfs_period_us").write_text(f"{period}\n")
    return files


def test_cgroup_v2_quota_at_the_root(tmp_path: Path) -> None:
    assert cpu_quota(_v2(tmp_path / "a", "150000 100000\n")) == 1.5
    assert cpu_quota(_v2(tmp_path / "b", "max 100000\n")) is None


def test_cgroup_v2_quota_of_the_process_own_group(tmp_path: Path) -> None:
    """A batch job's quota sits on the job's group, not on the root (the root has no cpu.max at all)."""
    files = _v2(tmp_path, "50000 100000\n", "system.slice/job_42/step_0")
    assert not (files.root / "cpu.max").exists()
    assert cpu_quota(files) == 0.5
    assert core_limit({}, files).describe() == "using 1 core (cgroup quota 0.5 CPU)"


def test_cgroup_v2_quota_of_an_ancestor_counts(tmp_path: Path) -> None:
    files = _v2(tmp_path, "max 100000\n", "job_7/step_0")
    (files.root / "job_7" / "cpu.max").write_text("200000 100000\n")
    assert cpu_quota(files) == 2.0


def test_cgroup_v1_quota(tmp_path: Path) -> None:
    assert cpu_quota(_v1(tmp_path / "a", 300000, 100000)) == 3.0
    assert cpu_quota(_v1(tmp_path / "b", -1, 100000)) is None
    assert cpu_quota(_v1(tmp_path / "c", 50000, 100000, "slurm/uid_1/job_9", "cpu,cpuacct")) == 0.5


def test_no_cgroup_files_or_unreadable_ones(tmp_path: Path) -> None:
    assert cpu_quota(CgroupFiles(tmp_path / "none", tmp_path / "none2")) is None
    assert cpu_quota(_v2(tmp_path / "bad", "garbage")) is None


def test_smallest_of_affinity_quota_slurm_and_omp_wins(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cores.os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    files = _v2(tmp_path, "250000 100000\n", "job")
    assert core_limit({}, files) == CoreLimit(3, "cgroup quota 2.5 CPU")  # a fraction of a core gets a thread
    assert core_limit({"SLURM_CPUS_PER_TASK": "2"}, files) == CoreLimit(2, "SLURM_CPUS_PER_TASK=2")
    assert core_limit({"SLURM_CPUS_PER_TASK": "2", "OMP_NUM_THREADS": "1"}, files).cores == 1
    assert core_limit({"OMP_NUM_THREADS": "16"}, files).cores == 3
    nothing = CgroupFiles(tmp_path / "none", tmp_path / "none2")
    unusable = {"OMP_NUM_THREADS": "x", "SLURM_CPUS_PER_TASK": "0"}
    assert core_limit(unusable, nothing) == CoreLimit(8, "8 cores available")
    assert core_limit({}, nothing).describe() == "using 8 cores (8 cores available)"


def test_available_cores_reads_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cores.os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    monkeypatch.setattr(cores, "cpu_quota", lambda files=None: None)
    monkeypatch.delenv("SLURM_CPUS_PER_TASK", raising=False)
    monkeypatch.setenv("OMP_NUM_THREADS", "3")
    assert available_cores() == 3
    monkeypatch.delenv("OMP_NUM_THREADS")
    assert available_cores() == 8
    monkeypatch.setattr(cores, "cpu_quota", lambda files=None: 0.2)
    assert available_cores() == 1


def test_executors_return_results_in_order_and_hand_back_failures() -> None:
    from groupmodel.runtime.executors import InlineExecutor, ThreadExecutor, thread_executor

    assert isinstance(thread_executor(1), InlineExecutor)
    for executor in (InlineExecutor(), ThreadExecutor(2)):
        with executor:
            assert executor.map(pow, [2, 3, 4], [3, 2, 1]) == [8, 9, 4]
            failed = executor.submit(divmod, 1, 0)
            with pytest.raises(ZeroDivisionError):
                failed.result()


def test_process_executor_starts_every_worker_while_the_main_module_is_hidden(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """All workers exist when the constructor returns, none left to be started later with the main module
    visible: here each start-up task is made to finish before the next is submitted (what a loaded machine
    can do), so the pool alone would have started one worker and the rest on demand."""
    import sys
    from concurrent.futures import ProcessPoolExecutor

    from groupmodel.runtime import executors

    class Eager(ProcessPoolExecutor):
        def submit(self, fn, /, *args, **kwargs):  # type: ignore[no-untyped-def]
            future = super().submit(fn, *args, **kwargs)
            if fn is executors._noop:
                future.result()
            return future

    monkeypatch.setattr(executors, "ProcessPoolExecutor", Eager)
    main = sys.modules["__main__"]
    before = (getattr(main, "__spec__", None), getattr(main, "__file__", None))
    pool = executors.ProcessExecutor(3)
    try:
        assert len(pool._pool._processes) == 3
        assert (getattr(main, "__spec__", None), getattr(main, "__file__", None)) == before  # restored
        assert [f.result() for f in [pool.submit(abs, -k) for k in range(6)]] == list(range(6))
    finally:
        pool.close()
