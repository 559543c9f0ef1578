"""Permutation inference with variance groups (Welch's v and G) on a cluster: the local run's tasks, on Dask.

The work of one contrast is split as the local run (:mod:`groupmodel.analysis.welch_inference`) splits it: by
chunks of voxels and by the batches of :data:`~.settings.BATCH_SIZE` rearrangements, each batch one call of the
pure :func:`~.welch_nulls.welch_batch` on one chunk.  Per chunk, an observed task runs the first batch (it starts
with the identity: the observed v or G); later tasks, each a group of batches, take the observed statistic of
their chunk's observed task (worker to worker).  The workers read their chunks themselves (``reader``); the
client adds the counts and takes the maxima by position, in whatever order the tasks finish (integers and
maxima: the same bits as the local run).  A lost worker's tasks are rerun by the scheduler with the same inputs.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..runtime.cores import single_threaded_blas
from .distributed import ClusterWork, _groups, cached_columns, home_worker
from .settings import BATCH_SIZE
from .welch_nulls import WelchNullPlan, oriented_welch, welch_batch

__all__ = ["WelchTotals", "welch_on_cluster"]


@dataclass(frozen=True)
class WelchTotals:
    """What a contrast's rearrangements add up to: the observed statistic (V,), counts (V,), maxima (J,)."""

    stat: np.ndarray
    counts: np.ndarray
    maxima: np.ndarray


@dataclass(frozen=True, eq=False)
class _Out:
    r0: int
    s: int
    e: int
    stat: np.ndarray | None
    counts: np.ndarray
    maxima: np.ndarray


def _welch_task(reader: Any, plan: WelchNullPlan, s: int, e: int, rearr: tuple[int, Any, Any], observed: Any,
                cache_bytes: int) -> _Out:
    """Counts and maxima of chunk ``s:e`` for the rearrangements of ``rearr`` (from ``r0``, in batches of
    BATCH_SIZE as locally); ``observed`` None for the group that starts with the identity, else its result."""
    r0, perm, flips = rearr
    y = cached_columns(reader, s, e, cache_bytes)
    size = (perm if perm is not None else flips).shape[0]
    counts = np.zeros(e - s, dtype=np.int64)
    maxima = np.full(size, -np.inf)
    stat = None
    oriented = None if observed is None else oriented_welch(plan, observed.stat)
    with single_threaded_blas():
        for b0 in range(0, size, BATCH_SIZE):
            b1 = min(size, b0 + BATCH_SIZE)
            got = welch_batch(plan, None if perm is None else perm[b0:b1], None if flips is None else flips[b0:b1],
                              y, oriented)
            if got.stat is not None:
                stat, oriented = got.stat, oriented_welch(plan, got.stat)
            counts += got.counts
            maxima[b0:b1] = got.maxima
    return _Out(r0, s, e, stat, counts, maxima)


def welch_on_cluster(executor: Any, reader: Any, plan: WelchNullPlan, pset: Any, chunk_voxels: int,
                     work: ClusterWork, progress: Callable[[int, int], None] | None = None) -> WelchTotals:
    """The counts and maxima of one contrast's rearrangements ``pset`` over the columns of ``reader``, in chunks
    of ``chunk_voxels`` (as locally), on a :class:`groupmodel.runtime.cluster.DaskExecutor`; ``progress`` is
    called with (tasks done, tasks in all)."""
    V, J = reader.n_columns, pset.size
    chunks = [(s, min(V, s + chunk_voxels)) for s in range(0, V, chunk_voxels)]
    threads = max(1, int(executor.workers))
    n_later = -(-J // BATCH_SIZE) - 1
    wanted = max(1, -(-work.tasks_per_worker * threads // max(1, len(chunks))))
    groups = _groups(J, BATCH_SIZE, max(1, -(-n_later // wanted)))
    addresses = executor.addresses() or [None]
    totals = WelchTotals(np.full(V, np.nan), np.zeros(V, dtype=np.int64), np.full(J, -np.inf))
    reader_f, plan_f = executor.put(reader), executor.put(plan)

    def submit(g: int, obs: list[Any] | None) -> list[Any]:
        r0, r1 = groups[g]
        rearr = executor.put((r0, *pset.batch(r0, r1)))
        return [executor.submit(_welch_task, reader_f, plan_f, s, e, rearr, None if obs is None else obs[c],
                                work.cache_bytes, near=home_worker(addresses, c, len(chunks), g))
                for c, (s, e) in enumerate(chunks)]

    observed = submit(0, None)
    in_flight = list(observed)
    pending = list(range(1, len(groups)))
    limit = work.groups_ahead * threads * len(chunks)
    done, total = 0, len(groups) * len(chunks)
    try:
        while pending or in_flight:
            while pending and len(in_flight) < limit:
                in_flight += submit(pending.pop(0), observed)
            for fut in executor.first_done(in_flight):
                in_flight.remove(fut)
                _add(totals, fut.result())
                done += 1
                if progress is not None:
                    progress(done, total)
    except BaseException:
        executor.cancel(in_flight)
        raise
    return totals


def _add(totals: WelchTotals, out: _Out) -> None:
    """One task's counts (sum) and maxima (maximum), by position; the observed statistic of its chunk."""
    if out.stat is not None:
        totals.stat[out.s : out.e] = out.stat
    totals.counts[out.s : out.e] += out.counts
    part = totals.maxima[out.r0 : out.r0 + out.maxima.size]
    np.maximum(part, out.maxima, out=part)
