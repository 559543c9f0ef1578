"""Cores this process may use (CPU affinity capped by a control-group CPU quota), and single-threaded BLAS."""

from __future__ import annotations

import math
import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["available_cores", "cpu_quota", "single_threaded_blas"]


def cpu_quota(cgroup_root: str = "/sys/fs/cgroup") -> float | None:
    """CPUs' worth of time the control group allows (a container's or batch job's quota), or None.

    Reads cgroup v2 ``cpu.max`` ("max 100000" or "200000 100000") or cgroup v1
    ``cpu/cpu.cfs_quota_us`` and ``cpu.cfs_period_us`` (quota -1: none).
    """
    root = Path(cgroup_root)
    try:
        if (root / "cpu.max").exists():
            quota, period = (root / "cpu.max").read_text().split()[:2]
            return None if quota == "max" else int(quota) / int(period)
        v1 = root / "cpu"
        if (v1 / "cpu.cfs_quota_us").exists():
            quota_us = int((v1 / "cpu.cfs_quota_us").read_text())
            period_us = int((v1 / "cpu.cfs_period_us").read_text())
            return None if quota_us <= 0 or period_us <= 0 else quota_us / period_us
    except (OSError, ValueError):
        return None
    return None


def available_cores() -> int:
    """Cores this process may use: its CPU affinity, capped by a control-group CPU quota if any.

    On a shared node a container or batch job often sees every core but may use only a few; running
    more threads than that only adds contention.
    """
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    quota = cpu_quota()
    if quota is not None:
        cores = min(cores, math.ceil(quota))
    return max(1, cores)


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
