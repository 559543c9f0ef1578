"""Where work runs: cores and CPU quotas, single-threaded BLAS, and executors (inline, threads, processes)."""

from .cores import available_cores, core_limit, cpu_quota, single_threaded_blas
from .executors import Executor, InlineExecutor, ProcessExecutor, ThreadExecutor, thread_executor

__all__ = [
    "Executor",
    "InlineExecutor",
    "ProcessExecutor",
    "ThreadExecutor",
    "available_cores",
    "core_limit",
    "cpu_quota",
    "single_threaded_blas",
    "thread_executor",
]
