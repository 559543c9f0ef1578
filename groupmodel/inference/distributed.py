"""Permutation inference on a cluster: the driver's tasks, run where a Dask scheduler puts them.

The work of one contrast is split by chunks of voxels and by groups of batches of rearrangements:

* one observed task per chunk: the first group of batches (it starts with the identity), giving the
  chunk's observed statistics and thresholds, its counts and maxima;
* one null task per chunk and later group, given the observed task of its chunk (passed worker to worker);
* with TFCE or clusters, groups of one batch, and one whole-map task per batch that takes the statistic
  maps of every chunk of that batch (worker to worker) and returns the TFCE and cluster maxima.

Every task calls the same pure functions as the local engine (:func:`~.kernel.observed_chunk`,
:func:`~.kernel.chunk_nulls`, :func:`~.map_tasks.map_nulls`) on the same chunks, tiles and batches, and reads
its chunk itself through a reader (an object with ``read(s, e)``, e.g. :class:`groupmodel.images.ColumnReader`),
so the client never sends the data.  The client combines counts by sum and maxima by maximum, by position,
in whatever order the tasks finish, so results equal the local run's.  A lost worker's tasks are rerun by
the scheduler with the same inputs and give the same outputs.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..runtime.cores import single_threaded_blas
from .driver import _Accumulated, _check, _chunks, permutation_result
from .freedman_lane import ContrastPlan, plan_contrast, stack_rows
from .kernel import ChunkNulls, ObservedChunk, Scratch, UnitChunk, chunk_nulls, observed_chunk, tile_width
from .map_tasks import map_nulls
from .rearrangements import permutation_set
from .results import PermutationResult
from .settings import ContrastTest, Execution, MapSettings, Rearrangements
from .whole_maps import InlineMaps, MapNulls, observe_maps

__all__ = ["ClusterWork", "cached_columns", "home_worker", "run_on_cluster"]

_NO_MAPS = MapSettings()
_EXECUTION = Execution()


@dataclass(frozen=True)
class ClusterWork:
    """How the work of a contrast is cut for a cluster (results do not depend on it).

    Attributes
    ----------
    tasks_per_worker : int
        Aim for at least this many tasks of each contrast per worker thread (load balance, progress).
    groups_ahead : int
        Groups of batches submitted ahead of the ones collected, per worker thread (bounds the memory the
        cluster holds in results not yet collected, and the statistic maps of TFCE and clusters).
    cache_bytes : int
        Each worker keeps the residualised chunks it read, up to this many bytes, for later tasks.
    """

    tasks_per_worker: int = 4
    groups_ahead: int = 2
    cache_bytes: int = 1 << 30


_WORK = ClusterWork()


@dataclass(frozen=True, eq=False)
class _Job:
    """One chunk of one contrast's run: the key of its cached data, its columns, the tile width."""

    key: str
    s: int
    e: int
    tile: int
    batch_size: int
    cache_bytes: int


@dataclass(frozen=True, eq=False)
class _ChunkOut:
    """What a chunk task returns for a group of rearrangements starting at ``r0``."""

    r0: int
    s: int
    e: int
    observed: ObservedChunk | None
    counts: np.ndarray
    maxima: np.ndarray
    maps: np.ndarray | None

    def small(self) -> _ChunkOut:
        return replace(self, maps=None)


# ------------------------------------------------------------------------------------------------
# On the workers
# ------------------------------------------------------------------------------------------------

_CACHE: OrderedDict[tuple[Any, ...], Any] = OrderedDict()
_CACHE_LOCK = threading.Lock()


def _cached(key: tuple[Any, ...], make: Callable[[], Any], cache_bytes: int) -> Any:
    """This worker's copy of ``make()`` under ``key``, kept (least recently used first out) within
    ``cache_bytes`` (speed only: a value dropped is made again, the same)."""
    with _CACHE_LOCK:
        got = _CACHE.get(key)
        if got is not None:
            _CACHE.move_to_end(key)
            return got
    value = make()
    with _CACHE_LOCK:
        _CACHE[key] = value
        total = sum(_nbytes(v) for v in _CACHE.values())
        while len(_CACHE) > 1 and total > cache_bytes:
            _, old = _CACHE.popitem(last=False)
            total -= _nbytes(old)
        if total > cache_bytes:
            _CACHE.clear()
    return value


def _nbytes(value: Any) -> int:
    return int(value.W.nbytes if isinstance(value, UnitChunk) else value.nbytes)


def _unit(reader: Any, plan: ContrastPlan, job: _Job) -> UnitChunk:
    """The chunk residualised and scaled for this contrast; the chunk's data as read are kept too, for the
    other contrasts of the fit (the cache is for speed only)."""
    from .kernel import unit_columns

    return _cached(("unit", job.key, job.s),
                   lambda: unit_columns(plan, cached_columns(reader, job.s, job.e, job.cache_bytes)), job.cache_bytes)


def cached_columns(reader: Any, s: int, e: int, cache_bytes: int) -> np.ndarray:
    """Columns ``s:e`` as read by ``reader`` (do not modify), kept on this worker for later tasks within
    ``cache_bytes`` (the parametric fit and every contrast read each chunk once where it fits)."""
    return _cached(("data", getattr(reader, "token", id(reader)), s, e), lambda: reader.read(s, e), cache_bytes)


def _chunk_task(reader: Any, plan: ContrastPlan, job: _Job, rearr: tuple[int, Any, Any], observed: Any,
                want_maps: bool) -> _ChunkOut:
    """Counts and maxima of one chunk for a group of rearrangements (from ``r0``, in the run's batches);
    the group starting at 0 also gives the observed statistics (``observed`` None), later ones count
    against the thresholds of the chunk's observed task."""
    r0, perm, flips = rearr
    unit = _unit(reader, plan, job)
    size = (perm if perm is not None else flips).shape[0]
    v = job.e - job.s
    maps = np.empty((size, v)) if want_maps else None
    scratch = Scratch()
    counts = np.zeros(v, dtype=np.int64)
    maxima = np.empty(size)
    first: ObservedChunk | None = None
    threshold = None if observed is None else observed.observed.threshold
    with single_threaded_blas():
        for b0 in range(0, size, job.batch_size):
            b1 = min(size, b0 + job.batch_size)
            A = stack_rows(plan, None if perm is None else perm[b0:b1], None if flips is None else flips[b0:b1])
            part_maps = None if maps is None else maps[b0:b1]
            if threshold is None:
                first, nulls = observed_chunk(plan, A, unit, job.tile, part_maps, scratch)
                threshold = first.threshold
            else:
                nulls = chunk_nulls(plan, A, unit, threshold, job.tile, part_maps, scratch)
            counts += nulls.counts
            maxima[b0:b1] = nulls.maxima
    return _ChunkOut(r0, job.s, job.e, first, counts, maxima, maps)


def _small(out: _ChunkOut) -> _ChunkOut:
    """A chunk task's result without its statistic maps (what the client collects)."""
    return out.small()


def _whole_map_task(outs: list[_ChunkOut], spec: Any, adjacency: Any) -> tuple[int, np.ndarray, np.ndarray]:
    """The TFCE and cluster maxima of one batch, from the statistic maps of all its chunks (in column order)."""
    outs = sorted(outs, key=lambda o: o.s)
    maps = np.concatenate([o.maps for o in outs], axis=1)
    tmax, cmax = map_nulls(maps, spec, adjacency)
    return outs[0].r0, tmax, cmax


# ------------------------------------------------------------------------------------------------
# On the client
# ------------------------------------------------------------------------------------------------


def home_worker(addresses: list[Any], c: int, n_chunks: int, g: int = 0) -> Any:
    """The worker chunk ``c``'s task of group ``g`` should preferably run on, where the chunk is likely
    cached: chunks spread over the workers; with fewer chunks than workers, each chunk's groups spread
    over its share of the workers (speed only: any worker may run any task)."""
    W = len(addresses)
    share = max(1, W // n_chunks)
    return addresses[(c + n_chunks * (g % share)) % W]


def _groups(J: int, batch_size: int, per_group: int, resume_at: int = 0) -> list[tuple[int, int]]:
    """Rearrangement ranges of whole batches (the run's batch boundaries): the first batch alone (the
    observed pass, which every other task waits for), then ``per_group`` batches each, from ``resume_at``
    when a checkpoint holds the state up to there."""
    first = min(J, batch_size)
    step = batch_size * per_group
    return [(0, first)] + [(r0, min(J, r0 + step)) for r0 in range(max(first, resume_at), J, step)]


class _Collector:
    """Combines what the tasks return, by position: counts by sum, maxima by maximum (any order).

    With a checkpoint the counts of each group of rearrangements are held back until the group and every
    earlier one are complete, so that the state saved is that after a prefix of the rearrangements, as a local
    run's (the maxima go in at once: a rearrangement's maximum over some chunks is at most its maximum over
    all, so a saved partial maximum is raised to the right value on resuming)."""

    def __init__(self, acc: _Accumulated, map_nulls: MapNulls | None, groups: list[tuple[int, int]],
                 tasks_per_group: int, checkpoint: Any = None, resumed: bool = False) -> None:
        self.acc, self.map_nulls, self.groups, self.checkpoint = acc, map_nulls, groups, checkpoint
        self.left = {r0: tasks_per_group for r0, _ in groups}
        self.held: dict[int, np.ndarray] = {}
        self.next = 0  # the first group not yet counted in acc
        self.skip_first = resumed  # the saved counts hold the first batch's already

    def chunk(self, out: _ChunkOut) -> None:
        if out.observed is not None:
            self.acc.observe(out.s, out.e, out.observed)
        if self.checkpoint is None:
            self.acc.add(out.r0, out.s, out.e, ChunkNulls(out.counts, out.maxima))
            return
        self.acc.add(out.r0, out.s, out.e, ChunkNulls(np.zeros_like(out.counts), out.maxima))
        held = self.held.setdefault(out.r0, np.zeros_like(self.acc.count))
        held[out.s : out.e] += out.counts
        self._done(out.r0)

    def whole(self, found: tuple[int, np.ndarray, np.ndarray]) -> None:
        assert self.map_nulls is not None
        r0, tmax, cmax = found
        self.map_nulls.tfce_max[r0 : r0 + tmax.size] = tmax
        self.map_nulls.cluster_max[r0 : r0 + cmax.size] = cmax
        if self.checkpoint is not None:
            self._done(r0)

    def _done(self, r0: int) -> None:
        """One task of the group at ``r0`` is in; count the complete groups of the prefix, and save."""
        self.left[r0] -= 1
        advanced = False
        while self.next < len(self.groups) and self.left[self.groups[self.next][0]] == 0:
            g0 = self.groups[self.next][0]
            held = self.held.pop(g0, None)
            if held is not None and not (self.next == 0 and self.skip_first):
                self.acc.count += held
            self.next += 1
            advanced = True
        if advanced:
            done = self.groups[self.next][0] if self.next < len(self.groups) else self.acc.max_null.size
            if self.checkpoint.due(final=done == self.acc.max_null.size):
                self.checkpoint.save(self._state(done))

    def _state(self, done: int) -> Any:
        from .checkpoint import BatchState

        m = self.map_nulls
        return BatchState(done, self.acc.count.copy(), self.acc.max_null.copy(),
                          None if m is None else m.tfce_max.copy(), None if m is None else m.cluster_max.copy())

    def restore(self, saved: Any) -> None:
        """The counts and maxima of a checkpoint, before any task of this run is collected."""
        from .driver import _restore_arrays

        _restore_arrays(self.acc, saved)

    def restore_maps(self, saved: Any) -> None:
        """The TFCE and cluster maxima of a checkpoint (once the whole-map nulls exist)."""
        if self.map_nulls is not None and saved is not None:
            if saved.tfce_max is not None:
                self.map_nulls.tfce_max[:] = saved.tfce_max
            if saved.cluster_max is not None:
                self.map_nulls.cluster_max[:] = saved.cluster_max


def run_on_cluster(
    executor: Any,
    reader: Any,
    test: ContrastTest,
    rearrangements: Rearrangements,
    maps: MapSettings = _NO_MAPS,
    execution: Execution = _EXECUTION,
    work: ClusterWork = _WORK,
    progress: Callable[[int, int], None] | None = None,
    checkpoint: Any = None,
) -> PermutationResult:
    """:func:`~groupmodel.inference.driver.run_permutations` on a :class:`groupmodel.runtime.cluster.DaskExecutor`,
    the data read by the workers through ``reader`` (shape (n, V), ``read(s, e)``, pickles).

    ``execution`` gives the batch and chunk sizes (as for the local run; the same results); ``progress``
    is called with (tasks done, tasks in all); ``checkpoint`` (a
    :class:`~groupmodel.inference.checkpoint.ContrastCheckpoint`) saves the state after each complete prefix
    of the rearrangements and resumes from a saved one (made here or by a local run: the same format).
    """
    X, V = _check(test, reader, maps, replace(execution, workers=None))
    r = rearrangements
    plan = plan_contrast(X, test.weights, kind=test.kind, tail=test.tail, name=test.name, method=r.method,
                         blocks=r.blocks, whole_blocks=r.whole_blocks)
    pset = permutation_set(X.shape[0], r.n_perm, plan.method, blocks=r.blocks, whole_blocks=r.whole_blocks,
                           seed=r.seed, classes=plan.classes)
    run = _ClusterRun(executor, reader, plan, pset, V, execution, maps, work, checkpoint)
    acc = run.go(progress)
    return permutation_result(test, plan, pset, acc, run.map_nulls)


class _ClusterRun:
    """One contrast on the cluster: the jobs (chunks), the groups of batches, the tasks in flight."""

    def __init__(self, executor: Any, reader: Any, plan: ContrastPlan, pset: Any, V: int, execution: Execution,
                 maps: MapSettings, work: ClusterWork, checkpoint: Any = None) -> None:
        import uuid

        self.executor, self.reader, self.plan, self.pset, self.V = executor, reader, plan, pset, V
        self.maps, self.work = maps, work
        J, size = pset.size, execution.batch_size
        tile = tile_width(plan.m * min(size, J))  # as the local run: fixed by the batch size
        key = uuid.uuid4().hex
        self.jobs = [_Job(key, s, e, tile, size, work.cache_bytes) for s, e in _chunks(V, execution.chunk_size)]
        self.threads = max(1, int(executor.workers))
        self.addresses = executor.addresses() or [None]
        n_later = -(-J // size) - 1  # batches after the first
        if maps.wanted:  # a whole-map task per batch
            per_group = 1
        else:
            wanted = max(1, -(-work.tasks_per_worker * self.threads // len(self.jobs)))
            per_group = max(1, -(-n_later // wanted))
        saved = checkpoint.load() if checkpoint is not None else None
        # a state saved inside the first batch (a local run's smaller batches) is not used: all is recomputed
        self.saved = saved if saved is not None and saved.done >= min(J, size) else None
        self.groups = _groups(J, size, per_group, self.saved.done if self.saved is not None else 0)
        per_task = len(self.jobs) + (1 if maps.wanted else 0)
        self.total = per_task * len(self.groups)
        self.done = 0
        self.map_nulls: MapNulls | None = None
        self.acc = _Accumulated.empty(V, J)
        self.collector = _Collector(self.acc, None, self.groups, per_task, checkpoint, self.saved is not None)
        if self.saved is not None:
            self.collector.restore(self.saved)

    def _rearr(self, r0: int, r1: int) -> Any:
        return self.executor.put((r0, *self.pset.batch(r0, r1)))

    def go(self, progress: Callable[[int, int], None] | None) -> _Accumulated:
        ex = self.executor
        self.progress = progress
        reader_f, plan_f = ex.put(self.reader), ex.put(self.plan)
        want = self.maps.wanted
        rearr0 = self._rearr(*self.groups[0])
        first = [ex.submit(_chunk_task, reader_f, plan_f, job, rearr0, None, want, near=self._home(c, 0))
                 for c, job in enumerate(self.jobs)]
        observed = [ex.submit(_small, f) for f in first] if want else first
        in_flight: dict[Any, str] = {}
        try:
            spec_f = adj_f = None
            if want:  # the whole-map tasks need the observed map, here
                for fut in ex.completed(observed):
                    self._take(fut, "chunk")
                spec_f, adj_f = self._observe_maps()
                in_flight[ex.submit(_whole_map_task, first, spec_f, adj_f)] = "whole"
            else:  # later tasks wait for their chunk's observed task on the cluster
                in_flight.update(dict.fromkeys(observed, "chunk"))
            del first
            pending = list(enumerate(self.groups))[1:]
            limit = self.work.groups_ahead * self.threads * (len(self.jobs) + (1 if want else 0))
            while pending or in_flight:
                while pending and len(in_flight) < limit:
                    g, (r0, r1) = pending.pop(0)
                    in_flight.update(self._submit_group(g, reader_f, plan_f, self._rearr(r0, r1), observed,
                                                        spec_f, adj_f))
                for fut in ex.first_done(list(in_flight)):
                    self._take(fut, in_flight.pop(fut))
        except BaseException:
            ex.cancel(list(in_flight))
            raise
        return self.acc

    def _home(self, c: int, g: int) -> str | None:
        return home_worker(self.addresses, c, len(self.jobs), g)

    def _submit_group(self, g: int, reader_f: Any, plan_f: Any, rearr_f: Any, observed: list[Any], spec_f: Any,
                      adj_f: Any) -> dict[Any, str]:
        ex, want = self.executor, self.maps.wanted
        tasks = [ex.submit(_chunk_task, reader_f, plan_f, job, rearr_f, obs, want, near=self._home(c, g))
                 for c, (job, obs) in enumerate(zip(self.jobs, observed, strict=True))]
        if not want:
            return dict.fromkeys(tasks, "chunk")
        out = {ex.submit(_small, t): "chunk" for t in tasks}
        out[ex.submit(_whole_map_task, tasks, spec_f, adj_f)] = "whole"
        return out

    def _take(self, fut: Any, kind: str) -> None:
        found = fut.result()
        if kind == "chunk":
            self.collector.chunk(found)
        else:
            self.collector.whole(found)
        self.done += 1
        if self.progress is not None:
            self.progress(self.done, self.total)

    def _observe_maps(self) -> tuple[Any, Any]:
        """The observed TFCE map and clusters (here, from the observed statistics), and the spec and
        adjacency every whole-map task needs, sent once to every worker."""
        adjacency = self.maps.adjacency
        assert adjacency is not None
        observed = observe_maps(self.acc.stat.copy(), self.plan, self.maps)
        self.map_nulls = MapNulls(observed, self.pset.size, InlineMaps(adjacency), owned=False)
        self.collector.map_nulls = self.map_nulls
        self.collector.restore_maps(self.saved)
        if "grid" not in adjacency._cache:  # build the tables once, ship them with the adjacency
            adjacency.neighbour_table()
            adjacency.neighbour_chain()
        return self.executor.put(observed.spec), self.executor.put(adjacency)

