"""Cores this process may use, and single-threaded BLAS.

The smallest of these wins (:func:`core_limit`):

* the CPU affinity (``sched_getaffinity``: the cores a batch system or ``taskset`` pinned the process to);
* the CPU quota of the process's own control group and of its ancestors, found through ``/proc/self/cgroup``
  (cgroup v2 ``cpu.max``, cgroup v1 ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us``), rounded up to whole cores;
* the workload manager's allocation ``SLURM_CPUS_PER_TASK``;
* ``OMP_NUM_THREADS`` when set (the usual way to tell a program how many threads to run).

joblib's process pool (loky) has a ``cpu_count`` too, but it reads only the root of ``/sys/fs/cgroup`` (not
the process's own group, where a batch job's quota is) and knows neither of the two variables; hence this module.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

__all__ = ["CgroupFiles", "CoreLimit", "available_cores", "core_limit", "cpu_quota", "single_threaded_blas"]


@dataclass(frozen=True)
class CgroupFiles:
    """Where the control-group files are (injectable, so tests can use fake ones)."""

    proc_self_cgroup: Path = Path("/proc/self/cgroup")
    root: Path = Path("/sys/fs/cgroup")


def _membership(files: CgroupFiles) -> tuple[str | None, str | None]:
    """The process's cgroup v2 path and its cgroup v1 ``cpu`` path (either None when absent)."""
    v2 = v1 = None
    try:
        lines = files.proc_self_cgroup.read_text().splitlines()
    except OSError:
        return None, None
    for line in lines:
        parts = line.split(":", 2)
        if len(parts) != 3:
            continue
        hierarchy, controllers, path = parts
        if hierarchy == "0" and controllers == "":
            v2 = path
        elif "cpu" in controllers.split(","):
            v1 = path
    return v2, v1


def _own_and_ancestors(mount: Path, path: str | None) -> list[Path]:
    """``mount/path`` and each of its parents up to ``mount`` (a quota may sit on any of them); just ``mount``
    when the path is not found under it (a container whose cgroup is the root it sees)."""
    folders = [mount]
    if path:
        here = mount / path.strip("/")
        if here.is_dir():
            folders = [here, *[p for p in here.parents if p.is_relative_to(mount)]]
    return folders


def _read_quota(folder: Path, v1: bool) -> float | None:
    try:
        if v1:
            quota_us = int((folder / "cpu.cfs_quota_us").read_text())
            period_us = int((folder / "cpu.cfs_period_us").read_text())
            return None if quota_us <= 0 or period_us <= 0 else quota_us / period_us
        quota, period = (folder / "cpu.max").read_text().split()[:2]
        return None if quota == "max" else int(quota) / int(period)
    except (OSError, ValueError):
        return None


def cpu_quota(files: CgroupFiles | None = None) -> float | None:
    """CPUs' worth of time the process's control group allows (a container's or batch job's quota), or None.

    The smallest quota of the process's own group and its ancestors counts (cgroup v2 ``cpu.max``: "max
    100000" or "50000 100000"; cgroup v1 under ``cpu`` or ``cpu,cpuacct``: quota -1 means none).
    """
    files = files or CgroupFiles()
    v2_path, v1_path = _membership(files)
    candidates: list[tuple[Path, bool]] = []
    if (files.root / "cgroup.controllers").exists() or v2_path is not None and v1_path is None:
        candidates += [(f, False) for f in _own_and_ancestors(files.root, v2_path)]
    for mount in ("cpu", "cpu,cpuacct", "cpuacct,cpu"):
        if (files.root / mount).is_dir():
            candidates += [(f, True) for f in _own_and_ancestors(files.root / mount, v1_path)]
            break
    quotas = [q for f, v1 in candidates if (q := _read_quota(f, v1)) is not None]
    return min(quotas) if quotas else None


@dataclass(frozen=True)
class CoreLimit:
    """The cores to use and what set the number (for the one line printed: ``using 1 core (cgroup quota
    0.5 CPU)``)."""

    cores: int
    reason: str

    def describe(self) -> str:
        return f"using {self.cores} core{'s' if self.cores != 1 else ''} ({self.reason})"


def _positive_int(text: str | None) -> int | None:
    try:
        value = int(str(text).strip())
    except ValueError:
        return None
    return value if value >= 1 else None


def core_limit(env: Mapping[str, str] | None = None, files: CgroupFiles | None = None) -> CoreLimit:
    """The cores this process may use: the smallest of affinity, cgroup quota, SLURM_CPUS_PER_TASK and
    OMP_NUM_THREADS (see the module's docstring)."""
    env = os.environ if env is None else env
    try:
        affinity = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        affinity = os.cpu_count() or 1
    limits: list[tuple[int, str]] = [(affinity, f"{affinity} core{'s' if affinity != 1 else ''} available")]
    quota = cpu_quota(files)
    if quota is not None:
        limits.append((max(1, math.ceil(quota)), f"cgroup quota {quota:g} CPU"))
    for name in ("SLURM_CPUS_PER_TASK", "OMP_NUM_THREADS"):
        value = _positive_int(env.get(name))
        if value is not None:
            limits.append((value, f"{name}={value}"))
    cores, reason = min(limits, key=lambda item: item[0])  # the first of equal ones: the affinity
    return CoreLimit(max(1, cores), reason)


def available_cores() -> int:
    """Cores this process may use (:func:`core_limit`).

    On a shared node a container or batch job often sees every core but may use only a few; running
    more threads than that only adds contention.
    """
    return core_limit().cores


@contextmanager
def single_threaded_blas() -> Iterator[None]:
    """Limit BLAS to one thread while the block runs (threads of our own share the cores instead).

    The permutation loop runs one thread per core, each doing its own products and the element-wise
    work after them; a multi-threaded BLAS inside each would oversubscribe the cores.  The limit is
    process-wide (BLAS has no per-thread setting) and is restored on exit.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield
