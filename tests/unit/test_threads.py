"""How many threads the permutation loop uses: CPU affinity capped by a control-group CPU quota.

The file formats are those of the Linux kernel's cgroup documentation (cgroup v2 ``cpu.max``: "$MAX
$PERIOD" with "max" for no limit; cgroup v1 ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us`` with -1 for no
limit) [memory].
"""

from __future__ import annotations

from pathlib import Path

import pytest

from groupmodel.runtime import cores
from groupmodel.runtime.cores import available_cores, cpu_quota


def _v2(root: Path, text: str) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    (root / "cpu.max").write_text(text)
    return root


def _v1(root: Path, quota: int, period: int) -> Path:
    (root / "cpu").mkdir(parents=True, exist_ok=True)
    (root / "cpu" / "cpu.cfs_quota_us").write_text(f"{quota}\n")
    (root / "cpu" / "cpu.cfs_period_us").write_text(f"{period}\n")
    return root


def test_cgroup_v2_quota(tmp_path: Path) -> None:
    assert cpu_quota(str(_v2(tmp_path / "a", "150000 100000\n"))) == 1.5
    assert cpu_quota(str(_v2(tmp_path / "b", "max 100000\n"))) is None


def test_cgroup_v1_quota(tmp_path: Path) -> None:
    assert cpu_quota(str(_v1(tmp_path / "a", 300000, 100000))) == 3.0
    assert cpu_quota(str(_v1(tmp_path / "b", -1, 100000))) is None


def test_no_cgroup_files_or_unreadable_ones(tmp_path: Path) -> None:
    assert cpu_quota(str(tmp_path / "none")) is None
    assert cpu_quota(str(_v2(tmp_path / "bad", "garbage"))) is None


def test_available_cores_is_capped_by_the_quota(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cores.os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    monkeypatch.setattr(cores, "cpu_quota", lambda: 2.5)
    assert available_cores() == 3  # a fraction of a core still gets a thread
    monkeypatch.setattr(cores, "cpu_quota", lambda: None)
    assert available_cores() == 8
    monkeypatch.setattr(cores, "cpu_quota", lambda: 0.2)
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
