"""Whole-map nulls (TFCE, cluster extent): the observed pass, the batches of null maps, the results.

TFCE and cluster extent need whole maps: for each batch the statistic maps of all chunks are
assembled before enhancing (optionally in worker processes, ``n_jobs``).  TFCE is applied to the t
(or F) map; for "less" to -t (reported with a negative sign).  TFCE of a two-sided t map enhances
the positive and negative parts separately and keeps the sign; its null statistic is
``max |TFCE|``.  The step dh is fixed once, from the observed map (default: its largest enhanced
value / 100, to 6 significant digits: :func:`groupmodel.inference.tfce.default_step`), and used for every
rearrangement, so that all maps are enhanced by one function.
Cluster-extent inference uses a cluster-forming threshold given as a z value, applied to the
statistic with the same p (:func:`groupmodel.inference.clusters.stat_threshold`); the null
statistic is the largest cluster size.
"""

from __future__ import annotations

import math
from concurrent.futures import Future
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from functools import partial

import numpy as np

from ..errors import InputError
from ..runtime.executors import InlineExecutor, ProcessExecutor
from .clusters import Clusters, label_clusters, stat_threshold
from .freedman_lane import ContrastPlan
from .graph import Adjacency
from .map_slots import MapSlots, slot_nulls
from .map_tasks import MapSpec, enhance_input, map_nulls, warm_kernels, worker_init, worker_nulls
from .results import ClusterResult, TfceResult, WholeMapResult, fwe_p
from .settings import MapSettings
from .tfce import default_step, tfce

__all__ = ["InlineMaps", "MapNulls", "MapWorkers", "ObservedMaps", "observe_maps", "shared_workers"]


class MapWorkers:
    """Worker processes that compute the TFCE and cluster nulls of whole maps on one adjacency.

    Starting a worker costs about a second (a fresh interpreter importing numpy and scipy), so one
    set of workers serves every contrast of a fit: pass it to :func:`run_permutations` in
    ``Execution(workers=...)``.  Use as a context manager, or call :meth:`close`.

    Parameters
    ----------
    n_jobs : int
        Worker processes (>= 2; with 1 the nulls are computed in the calling process instead).
    adjacency : Adjacency
        Neighbourhood of the elements, shipped to each worker once.
    """

    #: The maps of a batch are copied here (into a slot, or for a pickle): the buffer is refilled while they travel.
    copies = False

    def __init__(self, n_jobs: int, adjacency: Adjacency) -> None:
        if n_jobs < 2:
            raise InputError(f"worker processes are for n_jobs >= 2; got {n_jobs} (in MapWorkers)")
        self.n_jobs, self.adjacency = int(n_jobs), adjacency
        if "grid" not in adjacency._cache:  # build the tables once, ship them with the adjacency
            adjacency.neighbour_table()
            adjacency.neighbour_chain()
        warm_kernels()  # compiled here once (if not cached yet), so that the workers only load the cache
        self.pool = ProcessExecutor(self.n_jobs, initializer=worker_init, initargs=(adjacency,))
        self.slots: MapSlots | None = None
        self._slots_tried = False

    def submit(self, maps: np.ndarray, spec: MapSpec) -> Future:
        """The nulls of a part of a batch; the maps go through a shared-memory slot when there is one."""
        slots = self._slots_for(maps)
        ref = slots.put(maps) if slots is not None else None
        if slots is None or ref is None:
            return self.pool.submit(worker_nulls, maps.copy(), spec)
        future = self.pool.submit(slot_nulls, ref, spec)
        future.add_done_callback(partial(slots.release, ref))
        return future

    def _slots_for(self, maps: np.ndarray) -> MapSlots | None:
        """Slots sized by the first part submitted (a batch's parts are never larger), made once."""
        if not self._slots_tried:
            self._slots_tried = True
            # MapNulls keeps at most 3 parts per worker in flight (2 per worker waiting, plus a batch).
            self.slots = MapSlots.create(maps.shape[0], maps.shape[1], 3 * self.n_jobs + 1)
        return self.slots if self.slots is not None and self.slots.fits(maps) else None

    def close(self, cancel: bool = False) -> None:
        try:
            self.pool.close(cancel=cancel)
        finally:
            if self.slots is not None:
                self.slots.close()

    def __enter__(self) -> MapWorkers:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close(cancel=exc[0] is not None)


class InlineMaps:
    """The whole-map task in the calling process (the counterpart of :class:`MapWorkers` for one job)."""

    copies = False
    n_jobs = 1

    def __init__(self, adjacency: Adjacency) -> None:
        self.adjacency = adjacency
        self.pool = InlineExecutor()

    def submit(self, maps: np.ndarray, spec: MapSpec) -> Future:
        return self.pool.submit(map_nulls, maps, spec, self.adjacency)

    def close(self, cancel: bool = False) -> None:
        return None


def shared_workers(
    n_jobs: int, adjacency: Adjacency | None, whole_maps: bool
) -> AbstractContextManager[MapWorkers | None]:
    """Worker processes for several contrasts as a context manager, or ``None`` when none are needed
    (one job, no adjacency, or neither TFCE nor clusters asked for)."""
    if n_jobs > 1 and adjacency is not None and whole_maps:
        return MapWorkers(n_jobs, adjacency)
    return nullcontext()


def _orient(stat: np.ndarray, kind: str, tail: str) -> np.ndarray:
    if kind == "t" and tail == "two-sided":
        return np.abs(stat)
    if kind == "t" and tail == "less":
        return np.negative(stat)
    return stat


@dataclass(frozen=True, eq=False)
class ObservedMaps:
    """The observed pass of the whole-map inferences: the spec every null map is enhanced with (TFCE
    step and cluster threshold fixed from the observed map), and the observed TFCE map and clusters
    (None where not asked for; the results carry only what was asked for)."""

    spec: MapSpec
    z: float | None
    tfce: np.ndarray | None
    clusters: Clusters | None


def observe_maps(stat: np.ndarray, plan: ContrastPlan, settings: MapSettings) -> ObservedMaps:
    """Fix the TFCE step and the cluster threshold (in stat units) from the observed map, and enhance it."""
    assert settings.adjacency is not None
    observed = _orient(stat.copy(), plan.kind, plan.tail)
    params = c_thr = None
    if settings.tfce is not None:
        dh = settings.tfce.dh
        if dh is None:
            dh = default_step(float(np.nanmax(observed)) if np.any(np.isfinite(observed)) else np.nan)
        params = settings.tfce.with_dh(dh)
    if settings.cluster_z is not None:
        c_thr = stat_threshold(settings.cluster_z, plan.kind, plan.df, plan.q)
    spec = MapSpec(plan.kind, plan.tail, params, c_thr)
    x, two = enhance_input(stat, spec)
    enhanced = clusters = None
    if params is not None:
        enhanced = tfce(x, settings.adjacency, params.dh, params.E, params.H, params.rule, two_sided=two)
        if plan.kind == "t" and plan.tail == "less":
            enhanced = -enhanced
    if c_thr is not None:
        clusters = label_clusters(x, c_thr, settings.adjacency, two_sided=two)
    z = float(settings.cluster_z) if settings.cluster_z is not None else None
    return ObservedMaps(spec, z, enhanced, clusters)


class MapNulls:
    """The whole-map nulls of one contrast: batches of maps go to the inline executor or to worker
    processes; their maxima come back into two arrays of J values (by position, so in any order)."""

    def __init__(self, observed: ObservedMaps, J: int, executor: MapWorkers | InlineMaps, owned: bool) -> None:
        self.observed, self.executor, self.owned = observed, executor, owned
        self.tfce_max = np.full(J, np.nan)
        self.cluster_max = np.full(J, np.nan)
        self.pending: list[tuple[int, Future]] = []

    @classmethod
    def start(
        cls, observed: ObservedMaps, J: int, adjacency: Adjacency, n_jobs: int, workers: MapWorkers | None
    ) -> MapNulls:
        """On the given workers, else on ``n_jobs`` new ones (closed by :meth:`finish`), else inline."""
        owned = workers is None and n_jobs > 1
        executor = MapWorkers(n_jobs, adjacency) if owned else workers or InlineMaps(adjacency)
        return cls(observed, J, executor, owned)

    def submit(self, start: int, maps: np.ndarray) -> None:
        """Send the maps of the rearrangements ``start, start + 1, ...`` (split over the workers)."""
        n_jobs = self.executor.n_jobs
        size = math.ceil(maps.shape[0] / n_jobs)
        for s in range(0, maps.shape[0], size):
            part = maps[s : s + size].copy() if self.executor.copies else maps[s : s + size]
            self.pending.append((start + s, self.executor.submit(part, self.observed.spec)))
        # Bound the memory held by maps in flight (see whole_map_batch).
        while len(self.pending) > 2 * n_jobs:
            self._collect_one()

    def _collect_one(self) -> None:
        start, fut = self.pending.pop(0)
        tmax, cmax = fut.result()
        self.tfce_max[start : start + tmax.size] = tmax
        self.cluster_max[start : start + cmax.size] = cmax

    def drain(self) -> None:
        """Wait for every batch submitted so far (its maxima collected); the workers stay."""
        while self.pending:
            self._collect_one()

    def finish(self) -> None:
        self.drain()
        if self.owned:
            self.executor.close()

    def abort(self) -> None:
        for _, fut in self.pending:
            fut.cancel()
        self.pending.clear()
        if self.owned:
            self.executor.close(cancel=True)

    def results(self, stat: np.ndarray) -> tuple[WholeMapResult, ...]:
        """The TFCE and cluster results, from the observed maps and the collected maxima."""
        obs, no_data = self.observed, np.isnan(stat)
        parts: list[WholeMapResult] = []
        if obs.tfce is not None:
            assert obs.spec.tfce is not None
            enhanced = obs.tfce
            enhanced[no_data] = np.nan
            parts.append(TfceResult(enhanced, fwe_p(np.abs(enhanced), self.tfce_max), self.tfce_max, obs.spec.tfce))
        if obs.clusters is not None:
            assert obs.z is not None and obs.spec.cluster_threshold is not None
            cp = fwe_p(obs.clusters.sizes.astype(np.float64), self.cluster_max)
            p_map = np.ones(stat.size)
            inside = obs.clusters.labels > 0
            p_map[inside] = cp[obs.clusters.labels[inside] - 1]
            p_map[no_data] = np.nan
            parts.append(ClusterResult(obs.z, obs.spec.cluster_threshold, obs.clusters, cp, p_map, self.cluster_max))
        return tuple(parts)
