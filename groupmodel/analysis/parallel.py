"""How many threads and worker processes a fit's permutations use: within the cores this process may use
(:func:`groupmodel.runtime.cores.core_limit`) and, for worker processes, within the memory budget."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ..runtime.cores import CoreLimit, core_limit
from ..runtime.memory import DATA_SHARE, WORKER_BYTES, WORKER_SHARE, MemoryBudget


@dataclass(frozen=True)
class ParallelPlan:
    """Threads for the permutation products, worker processes for TFCE/cluster nulls (0: none), and why."""

    cores: CoreLimit
    threads: int
    workers: int
    warning: str | None = None

    @property
    def jobs(self) -> int:
        """The ``n_jobs`` of the engine (1: whole maps in the main process)."""
        return max(1, self.workers)

    def as_dict(self) -> dict[str, Any]:
        return {"cores": self.cores.cores, "cores_from": self.cores.reason, "threads": self.threads,
                "worker_processes": self.workers}


def parallel_plan(options: Any, budget: MemoryBudget) -> ParallelPlan:
    """Threads and worker processes for ``options`` (InferenceOptions) within the cores and ``budget``."""
    cores = core_limit()
    threads = options.threads if options.threads is not None else cores.cores
    whole_maps = options.active and (options.tfce or options.cluster_threshold is not None)
    if not whole_maps:
        return ParallelPlan(cores, threads, 0)
    fit = budget.worker_processes()
    if options.jobs is None:
        jobs = min(cores.cores, fit)
        return ParallelPlan(cores, threads, jobs if jobs >= 2 else 0)
    jobs = int(options.jobs)
    warning = None
    if jobs >= 2 and jobs > fit:
        share = budget.total * WORKER_SHARE / 2**20
        warning = (f"--jobs {jobs}: {jobs} worker processes need about {jobs * WORKER_BYTES / 2**20:.0f} MB, more "
                   f"than the {share:.0f} MB of --memory they may take; raise --memory or lower --jobs if the job's "
                   "memory is limited")
    return ParallelPlan(cores, threads, jobs if jobs >= 2 else 0, warning)


def spill_warning(data_bytes: int, budget: MemoryBudget, n_chunks: int, options: Any, n_hypotheses: int) -> str:
    """What a --memory too small for the image data costs: the data are read from disk, pass after pass."""
    from ..inference.settings import BATCH_SIZE

    passes = n_hypotheses * -(-options.permutations // BATCH_SIZE) if options.active else 0
    more = (f", then at least {passes} more for the permutations (one per batch of rearrangements and hypothesis)"
            if passes else "")
    return (f"--memory {_mb(budget.total)}: the image data ({_mb(data_bytes)}) do not fit its {_mb(budget.data_bytes)} "
            f"data share and are read from a file on disk in {n_chunks} chunks: 1 pass for the fit{more}; a --memory "
            f"of about {_mb(data_bytes / DATA_SHARE)} would keep them in memory")


def _mb(n: float) -> str:
    return f"{n / 2**20:.3g} MB"
