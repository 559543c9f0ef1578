"""Permutation inference for the general linear model, voxel- or vertex-wise: the driver.

Array-level code: it knows nothing about files or specs.  Given a design ``X`` (n, p), a contrast
``L`` (q, p) and data ``Y`` (n, V) (an array or a numpy memmap, read in chunks of voxels), it
returns for the contrast the observed statistic, the uncorrected permutation p, the voxel-wise FWE p
from the maximum statistic (Nichols and Holmes 2002), and optionally TFCE (Smith and Nichols 2009)
and cluster-extent FWE p values, with the null distributions of the maxima.

The parts: the Freedman-Lane plan of the contrast (:mod:`.freedman_lane`), the rearrangements
(:mod:`.rearrangements`), the pure per-chunk tasks (:mod:`.kernel`), the whole-map nulls
(:mod:`.whole_maps`), the results (:mod:`.results`).  The driver runs the first batch of rearrangements,
which starts with the identity (the observed pass: statistics, thresholds, the observed TFCE map and
clusters), then the other batches (the nulls), and combines the tasks' counts by sum and maxima by maximum.

Reproducibility: the rearrangements depend only on (n, blocks, method, J, seed); each chunk's
statistics are a pure function of (design, contrast, rearrangements, chunk of data)
(:func:`~groupmodel.inference.kernel.chunk_statistics`), so results do not depend on the chunk size, on
``threads``, on ``n_jobs`` or on the order chunks are processed, apart from the last bits that a BLAS
product may change with its shape (counts and p values are unaffected thanks to the tolerance of
:func:`~groupmodel.inference.kernel.at_least`).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..engine.ols import design_matrix
from ..errors import InputError
from ..runtime.cores import available_cores, single_threaded_blas
from ..runtime.executors import InlineExecutor, ThreadExecutor, thread_executor
from .checkpoint import BatchState, ContrastCheckpoint
from .freedman_lane import ContrastPlan, plan_contrast, stack_rows
from .kernel import (
    ChunkNulls,
    ObservedChunk,
    Scratch,
    UnitChunk,
    chunk_nulls,
    observed_chunk,
    oriented_stat,
    tile_width,
    unit_columns,
)
from .rearrangements import PermutationSet, permutation_set
from .results import PermutationResult, fwe_p
from .settings import ContrastTest, Execution, MapSettings, Rearrangements
from .whole_maps import MapNulls, observe_maps, shared_workers

__all__ = ["run_permutations", "run_tests"]

_REARRANGEMENTS = Rearrangements()
_NO_MAPS = MapSettings()
_EXECUTION = Execution()


def _chunks(V: int, chunk_size: int | None) -> list[tuple[int, int]]:
    size = V if not chunk_size or chunk_size >= V else int(chunk_size)
    if size < 1:
        raise InputError(f"chunk_size must be >= 1; got {chunk_size} (in run_permutations)")
    return [(s, min(V, s + size)) for s in range(0, V, size)]


def _parts(start: int, stop: int, threads: int, tile: int) -> list[tuple[int, int]]:
    """Split a chunk into at most ``threads`` contiguous parts of whole tiles, one per thread."""
    n_tiles = -(-(stop - start) // tile)
    per = max(1, -(-n_tiles // threads)) * tile
    return [(s, min(stop, s + per)) for s in range(start, stop, per)]


def _check(test: ContrastTest, data: Any, maps: MapSettings, execution: Execution) -> tuple[np.ndarray, int]:
    """The design as a matrix and the number of elements V, after the checks that need no plan."""
    X = design_matrix(test.design, " (in permutation inference)")
    n, where = X.shape[0], test.name or "run_permutations"
    data_shape = getattr(data, "shape", None)
    if data_shape is None or len(data_shape) != 2 or data_shape[0] != n:
        raise InputError(
            f"data of shape ({n}, V) were expected (one row per design row); got {data_shape} "
            f"(in {where}); pass observations as rows"
        )
    V = int(data_shape[1])
    if execution.batch_size < 1:
        raise InputError(f"batch_size must be >= 1; got {execution.batch_size} (in run_permutations)")
    if maps.wanted and maps.adjacency is None:
        raise InputError(
            "TFCE and cluster inference need the neighbourhood of the elements; got no adjacency "
            f"(in {where}); pass grid_adjacency(mask) or mesh_adjacency(faces)"
        )
    if execution.workers is not None and execution.workers.adjacency is not maps.adjacency:
        raise InputError(
            f"the worker processes were started on another adjacency (in {where}); "
            "start MapWorkers with the adjacency passed here"
        )
    if maps.adjacency is not None and maps.adjacency.n != V:
        raise InputError(
            f"the adjacency has {maps.adjacency.n} elements but the data have {V} columns "
            f"(in {where}); build the adjacency from the same mask"
        )
    return X, V


class _ChunkSource:
    """The data of a part of a chunk, residualised and scaled (:func:`unit_columns`), kept in memory between
    batches when it fits.  Each part is read by one task per batch, in that task's thread."""

    def __init__(self, plan: ContrastPlan, data: Any, keep: bool) -> None:
        self.plan, self.data, self.keep = plan, data, keep
        self.cache: dict[int, UnitChunk] = {}  # part start -> unit-scaled residuals

    def get(self, s: int, e: int) -> UnitChunk:
        got = self.cache.get(s)
        if got is None:
            got = unit_columns(self.plan, self.data[:, s:e])
            if self.keep:
                self.cache[s] = got
        return got


@dataclass
class _Accumulated:
    """What the batches build up: the observed statistics (from the first batch), counts per element
    (summed), the largest statistic of each rearrangement (maximum over parts)."""

    stat: np.ndarray
    work: np.ndarray
    threshold: np.ndarray
    count: np.ndarray
    max_null: np.ndarray

    @classmethod
    def empty(cls, V: int, J: int) -> _Accumulated:
        nan = np.full(V, np.nan)
        return cls(nan, nan.copy(), nan.copy(), np.zeros(V, dtype=np.int64), np.full(J, -np.inf))

    def observe(self, s: int, e: int, part: ObservedChunk) -> None:
        self.stat[s:e], self.work[s:e], self.threshold[s:e] = part.stat, part.work, part.threshold

    def add(self, b0: int, s: int, e: int, part: ChunkNulls) -> None:
        self.count[s:e] += part.counts
        b1 = b0 + part.maxima.size
        np.fmax(self.max_null[b0:b1], part.maxima, out=self.max_null[b0:b1])


@dataclass(frozen=True, eq=False)
class _Batch:
    """One batch of rearrangements: where it starts, its stacked design side, the maps it fills (or None)."""

    b0: int
    A: np.ndarray
    maps: np.ndarray | None


#: A task handed out for the elements s .. e - 1 of a batch.
_Pending = tuple[int, int, "Future[ChunkNulls]"]


class _Run:
    """One contrast's run: the fixed layout (tile width, the parts of each chunk), the tasks of each batch
    on the thread executor, and what they accumulate."""

    def __init__(self, plan: ContrastPlan, pset: PermutationSet, data: Any, V: int, execution: Execution) -> None:
        self.plan, self.pset, self.V = plan, pset, V
        n, J = plan.rows.shape[1], pset.size
        chunks = _chunks(V, execution.chunk_size)
        cache_ok = isinstance(data, np.ndarray) and not isinstance(data, np.memmap)
        self.source = _ChunkSource(plan, data, cache_ok and n * V * 8 <= execution.cache_bytes)
        n_threads = available_cores() if execution.threads is None else int(execution.threads)
        if n_threads < 1:
            raise InputError(f"threads must be >= 1; got {execution.threads} (in run_permutations)")
        self.n_threads = n_threads
        # The tile width and the parts each thread takes are fixed for the run (not per batch), so that
        # the cached residualised parts are reused by every batch.
        self.tile = tile_width(plan.m * min(execution.batch_size, J))
        self.parts = [_parts(s, e, n_threads, self.tile) for s, e in chunks]
        self.scratch = Scratch()
        self.acc = _Accumulated.empty(V, J)

    def observed_batch(self, pool: InlineExecutor | ThreadExecutor, batch: _Batch) -> None:
        """The first batch (identity first): observed statistics and thresholds, then its counts."""
        for chunk_parts in self.parts:
            futures = [pool.submit(self._observed_task, batch, s, e) for s, e in chunk_parts]
            # Each task writes only its own elements; the row maxima are combined here (the maximum does
            # not depend on the order, so neither do the results).
            for (s, e), future in zip(chunk_parts, futures, strict=True):
                observed, nulls = future.result()
                self.acc.observe(s, e, observed)
                self.acc.add(batch.b0, s, e, nulls)

    def submit_nulls(self, pool: InlineExecutor | ThreadExecutor, batch: _Batch) -> list[_Pending]:
        """Hand out the tasks of a later batch (counts against the observed thresholds, and maxima)."""
        return [(s, e, pool.submit(self._null_task, batch, s, e)) for chunk_parts in self.parts for s, e in chunk_parts]

    def collect_nulls(self, batch: _Batch, pending: list[_Pending]) -> None:
        """Wait for a later batch's tasks and add what they found (only here, in the calling thread)."""
        for s, e, future in pending:
            self.acc.add(batch.b0, s, e, future.result())

    def _observed_task(self, batch: _Batch, s: int, e: int) -> tuple[ObservedChunk, ChunkNulls]:
        maps = None if batch.maps is None else batch.maps[:, s:e]
        return observed_chunk(self.plan, batch.A, self.source.get(s, e), self.tile, maps, self.scratch)

    def _null_task(self, batch: _Batch, s: int, e: int) -> ChunkNulls:
        maps = None if batch.maps is None else batch.maps[:, s:e]
        threshold = self.acc.threshold[s:e]
        return chunk_nulls(self.plan, batch.A, self.source.get(s, e), threshold, self.tile, maps, self.scratch)

    def result(self, test: ContrastTest, map_nulls: MapNulls | None) -> PermutationResult:
        return permutation_result(test, self.plan, self.pset, self.acc, map_nulls)


def permutation_result(test: ContrastTest, plan: ContrastPlan, pset: PermutationSet, acc: _Accumulated,
                       map_nulls: MapNulls | None) -> PermutationResult:
    """The result of one contrast from what its batches accumulated (wherever they ran)."""
    with np.errstate(invalid="ignore"):
        p_perm = np.where(np.isnan(acc.stat), np.nan, acc.count / pset.size)
    max_null = acc.max_null.copy()
    max_null[np.isneginf(max_null)] = np.nan
    p_fwe = fwe_p(acc.work, max_null)
    return PermutationResult(
        name=test.name,
        kind=test.kind,
        tail=test.tail,
        df=plan.df,
        q=plan.q,
        stat=acc.stat,
        p_perm=p_perm,
        p_fwe=p_fwe,
        max_null=oriented_stat(plan, max_null),
        n_perm=pset.size,
        exhaustive=pset.exhaustive,
        method=pset.method,
        seed=pset.seed,
        n_possible=pset.n_possible,
        whole_maps=map_nulls.results(acc.stat) if map_nulls is not None else (),
    )


def _restore_arrays(acc: _Accumulated, saved: BatchState) -> None:
    """Put back the counts and maxima per rearrangement of a checkpoint (here or on a cluster)."""
    if saved.count.shape != acc.count.shape or saved.max_null.shape != acc.max_null.shape:
        raise InputError(
            f"the checkpoint holds {saved.count.size} elements and {saved.max_null.size} rearrangements, this run "
            f"{acc.count.size} and {acc.max_null.size}; resume with the same data, or remove the checkpoint"
        )
    acc.count[:] = saved.count
    acc.max_null[:] = saved.max_null


def _restore(run: _Run, map_nulls: MapNulls | None, saved: BatchState) -> None:
    """Put back the counts and maxima of a checkpoint (after the observed batch was recomputed)."""
    _restore_arrays(run.acc, saved)
    if map_nulls is not None:
        map_nulls.drain()
        if saved.tfce_max is not None:
            map_nulls.tfce_max[:] = saved.tfce_max
        if saved.cluster_max is not None:
            map_nulls.cluster_max[:] = saved.cluster_max


def _state(run: _Run, map_nulls: MapNulls | None, done: int) -> BatchState:
    """The counts and maxima after the rearrangements ``0 .. done - 1`` (whole-map batches waited for)."""
    if map_nulls is not None:
        map_nulls.drain()
    return BatchState(done, run.acc.count.copy(), run.acc.max_null.copy(),
                      None if map_nulls is None else map_nulls.tfce_max.copy(),
                      None if map_nulls is None else map_nulls.cluster_max.copy())


@dataclass
class _Loop:
    """What the batch loop needs besides the run: where tasks go, what to report and save, the whole-map nulls."""

    pool: InlineExecutor | ThreadExecutor
    maps: MapSettings
    execution: Execution
    progress: Callable[[int, int], None] | None
    checkpoint: ContrastCheckpoint | None
    saved: BatchState | None
    map_nulls: MapNulls | None = None

    def finished(self, run: _Run, batch: _Batch, b1: int) -> None:
        """After a batch's results are in: its maps to the whole-map nulls, the saved state put back (after the
        observed batch of a resumed run), progress and checkpoint."""
        plan, J = run.plan, run.pset.size
        if batch.maps is not None:
            if self.map_nulls is None:
                assert self.maps.adjacency is not None
                observed = observe_maps(batch.maps[0], plan, self.maps)
                self.map_nulls = MapNulls.start(observed, J, self.maps.adjacency, self.execution.n_jobs,
                                                self.execution.workers)
            self.map_nulls.submit(batch.b0, batch.maps)
        if batch.b0 == 0 and self.saved is not None:
            _restore(run, self.map_nulls, self.saved)
            b1 = self.saved.done  # the state now counts the rearrangements 0 .. saved.done - 1
        if self.progress is not None:
            self.progress(b1, J)
        if self.checkpoint is not None and self.checkpoint.due(final=b1 == J):
            self.checkpoint.save(_state(run, self.map_nulls, b1))


def _batches(
    run: _Run,
    maps: MapSettings,
    execution: Execution,
    pool: InlineExecutor | ThreadExecutor,
    progress: Callable[[int, int], None] | None,
    checkpoint: ContrastCheckpoint | None = None,
) -> MapNulls | None:
    """Every batch of rearrangements, the observed one first; the whole-map nulls (if asked for) collected.
    With a checkpoint holding a saved state, the observed batch is recomputed and the run goes on after the
    rearrangements the state counts.

    The tasks of the next null batch are handed out before those of the last one are waited for (when no map
    buffer is shared between batches), so that a thread that finishes its part early starts on the next batch
    instead of waiting for the others: the results are added in batch order, in this thread, and counts and
    maxima do not depend on the order anyway."""
    plan, pset = run.plan, run.pset
    J, size = pset.size, execution.batch_size
    # Reused by every batch: a fresh (B, V) array per batch costs page faults.
    maps_buffer = np.empty((min(size, J), run.V)) if maps.wanted else None
    depth = 2 if maps_buffer is None else 1  # null batches in flight
    saved = checkpoint.load() if checkpoint is not None else None
    loop = _Loop(pool, maps, execution, progress, checkpoint, saved)
    starts = [0, *range(saved.done, J, size)] if saved is not None and saved.done > 0 else range(0, J, size)
    in_flight: deque[tuple[_Batch, int, list[_Pending]]] = deque()

    def collect(keep: int) -> None:  # the oldest null batches, until ``keep`` are left in flight
        while len(in_flight) > keep:
            done, done_b1, pending = in_flight.popleft()
            run.collect_nulls(done, pending)
            loop.finished(run, done, done_b1)

    try:
        for b0 in starts:
            b1 = min(J, b0 + size)
            batch_maps = None if maps_buffer is None else maps_buffer[: b1 - b0]
            batch = _Batch(b0, stack_rows(plan, *pset.batch(b0, b1)), batch_maps)
            if b0 == 0:
                run.observed_batch(pool, batch)
                loop.finished(run, batch, b1)
            else:
                in_flight.append((batch, b1, run.submit_nulls(pool, batch)))
                collect(depth - 1)
        collect(0)
        if loop.map_nulls is not None:
            loop.map_nulls.finish()
    except BaseException:
        if loop.map_nulls is not None:
            loop.map_nulls.abort()
        raise
    return loop.map_nulls


def run_permutations(
    test: ContrastTest,
    data: Any,
    rearrangements: Rearrangements = _REARRANGEMENTS,
    maps: MapSettings = _NO_MAPS,
    execution: Execution = _EXECUTION,
    progress: Callable[[int, int], None] | None = None,
    checkpoint: ContrastCheckpoint | None = None,
) -> PermutationResult:
    """Freedman-Lane permutation inference for one contrast (see :mod:`groupmodel.inference.freedman_lane`).

    Parameters
    ----------
    test : ContrastTest
        Design, contrast, kind (t or F), tail and name.
    data : ndarray or numpy.memmap, shape (n, V)
        One row per observation, one column per voxel/vertex (in-mask elements only).
    rearrangements : Rearrangements
        J, method, exchangeability blocks, seed.
    maps : MapSettings
        Adjacency, TFCE settings, cluster-forming z (default: neither TFCE nor clusters).
    execution : Execution
        Threads, worker processes, batch and chunk sizes, cache (results do not depend on them).
    progress : callable(done, total), optional
        Called after each batch with the number of rearrangements done.
    checkpoint : ContrastCheckpoint, optional
        Where the counts and maxima are saved between batches, and loaded from to resume
        (:mod:`groupmodel.inference.checkpoint`); the results are the same bits either way.

    Returns
    -------
    PermutationResult
    """
    X, V = _check(test, data, maps, execution)
    r = rearrangements
    plan = plan_contrast(
        X, test.weights, kind=test.kind, tail=test.tail, name=test.name, method=r.method, blocks=r.blocks,
        whole_blocks=r.whole_blocks,
    )
    pset = permutation_set(
        X.shape[0], r.n_perm, plan.method, blocks=r.blocks, whole_blocks=r.whole_blocks, seed=r.seed,
        classes=plan.classes,
    )
    run = _Run(plan, pset, data, V, execution)
    pool = thread_executor(run.n_threads, "groupmodel-perm")
    try:
        with single_threaded_blas():
            map_nulls = _batches(run, maps, execution, pool, progress, checkpoint)
    finally:
        pool.close(cancel=True)
    return run.result(test, map_nulls)


def run_tests(
    design: np.ndarray,
    tests: Sequence[Any],
    data: Any,
    rearrangements: Rearrangements = _REARRANGEMENTS,
    maps: MapSettings = _NO_MAPS,
    execution: Execution = _EXECUTION,
) -> list[PermutationResult]:
    """:func:`run_permutations` for each test (objects with ``name``, ``weights``, ``kind``, ``tail``,
    such as :class:`groupmodel.engine.ols.Test`), with the same settings and seed.  With ``n_jobs > 1`` and
    TFCE or clusters, one set of worker processes serves every test."""
    n_jobs = execution.n_jobs if execution.workers is None else 1
    with shared_workers(n_jobs, maps.adjacency, maps.wanted) as workers:
        if workers is not None:
            execution = replace(execution, workers=workers)
        return [
            run_permutations(
                ContrastTest(design, t.weights, t.kind, getattr(t, "tail", "two-sided"), t.name),
                data, rearrangements, maps, execution,
            )
            for t in tests
        ]
