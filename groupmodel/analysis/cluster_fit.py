"""A voxelwise fit on a Dask cluster: the workers read their chunks of the images and run the same pure tasks.

:func:`groupmodel.analysis.voxel_fit.fit_images` with ``client=`` comes here for the work: the parametric
fit chunk by chunk (:class:`~groupmodel.analysis.chunk_fit.ChunkFit`) and the permutation tasks
(:func:`groupmodel.inference.distributed.run_on_cluster`, and with variance groups
:func:`groupmodel.inference.welch_distributed.welch_on_cluster`).  The client sends each task the chunk's fit
(the prepared design), the paths of the images (once per worker) and the columns of its chunk; the workers
read the images from the shared file system themselves.  The analysis mask is found by the workers too
(:func:`cluster_mask`): each scans groups of the images for finite and nonzero values and the client combines the
groups (:mod:`groupmodel.images.mask_scan`), so the client never holds or spills the data matrix.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ImageError, InputError
from ..images.columns import ColumnReader, first_unreadable, image_paths
from ..images.mask_scan import ScanPart, masked_columns, scan_part
from ..inference.distributed import cached_columns, home_worker
from ..runtime.cluster import CONNECT_TIMEOUT, DaskExecutor, dask_executor
from .chunk_fit import ChunkFit, ChunkParts

__all__ = ["ClusterSession", "cluster_mask", "cluster_ready", "cluster_session", "fitted_chunks"]


@dataclass(frozen=True, eq=False)
class ClusterSession:
    """Where a fit's tasks run (a :class:`DaskExecutor`) and how its workers read the data."""

    executor: DaskExecutor
    reader: ColumnReader
    cache_bytes: int

    def record(self) -> dict[str, Any]:
        """What the run record says of the cluster (it does not change the results)."""
        return {"scheduler": self.executor.record()}


#: Groups of images per worker thread when the workers find the mask (a few each, so that a slow worker
#: does not hold up the others).
SCAN_GROUPS_PER_THREAD = 4


def cluster_ready(client: Any, source: Any) -> DaskExecutor:
    """The executor of a fit on ``client``, once a worker has joined and every worker can read every image.

    Raises
    ------
    InputError
        No worker joined the scheduler within :data:`CONNECT_TIMEOUT` seconds.
    ImageError
        A worker cannot read an image (the first such path is named).
    """
    executor = dask_executor(client)
    try:
        executor.client.wait_for_workers(1, timeout=CONNECT_TIMEOUT)
    except (TimeoutError, OSError):
        raise InputError(f"the Dask scheduler has no workers after {CONNECT_TIMEOUT:g} s; start workers "
                         "(dask worker <scheduler address>, or a batch job of them) and run again") from None
    missing = executor.on_every_worker(first_unreadable, image_paths(source))
    for worker, path in sorted(missing.items()):
        if path is not None:
            raise ImageError(f"Dask worker {worker}: cannot read image {path} (from {source.origin}); the workers "
                             "must see the images at the same paths as this machine: put them on a file system "
                             "shared with the workers")
    return executor


def cluster_mask(executor: DaskExecutor, source: Any, mask: Any, mask_label: str = "mask",
                 progress: Callable[[int, int], None] | None = None) -> Any:
    """The analysis mask found by the workers of ``executor`` (:func:`cluster_ready`), each scanning groups of the
    images (one image at a time), and a :class:`~groupmodel.images.MaskedData` whose columns are read from the
    files when asked for (:func:`groupmodel.images.mask_scan.masked_columns`): the same mask, exclusions and
    warnings as reading the images here.  ``progress(done, total)`` counts images.

    Raises
    ------
    ImageError
        An image has no finite value (or cannot be read after all).
    """

    def run(groups: list[tuple[int, ...]], cand: Any) -> Iterator[ScanPart]:
        source_f, cand_f = executor.put(source), executor.put(cand)
        futures = [executor.submit(scan_part, source_f, i, g, cand_f, 1) for i, g in enumerate(groups)]
        done = 0
        try:
            for fut in executor.completed(futures):
                part = fut.result()
                done += len(part.positions)
                if progress is not None:
                    progress(done, len(source))
                yield part
        finally:
            executor.cancel(futures)

    return masked_columns(source, mask, mask_label, run, groups=SCAN_GROUPS_PER_THREAD * executor.workers)


def cluster_session(executor: DaskExecutor, source: Any, data: Any, cache_bytes: int) -> ClusterSession:
    """The session of one fit on the workers of ``executor`` (:func:`cluster_ready`), reading the columns of
    ``data``'s mask; ``cache_bytes``: what each worker may keep of the data it read, for later tasks."""
    return ClusterSession(executor, ColumnReader.of(source, data), int(cache_bytes))


def _fit_task(reader: ColumnReader, work: ChunkFit, s: int, e: int, cache_bytes: int) -> tuple[int, int, ChunkParts]:
    """One chunk's parametric fit, read by the worker (float64 from the storage dtype, as locally); the
    chunk is kept on the worker for the permutations when it fits."""
    y = np.array(cached_columns(reader, s, e, cache_bytes), dtype=np.float64, order="C")
    return s, e, work(y)


def fitted_chunks(session: ClusterSession, work: ChunkFit, chunk_voxels: int,
                  progress: Callable[[int, int], None] | None = None) -> Iterator[tuple[slice, ChunkParts]]:
    """``(columns, parts)`` of every chunk (:class:`~.chunk_fit.ChunkFit`), as the workers finish them (each
    chunk once; any order)."""
    ex = session.executor
    reader_f, work_f = ex.put(session.reader), ex.put(work)
    V = session.reader.n_columns
    starts = range(0, V, chunk_voxels)
    addresses = ex.addresses() or [None]
    futures = [ex.submit(_fit_task, reader_f, work_f, s, min(V, s + chunk_voxels), session.cache_bytes,
                         near=home_worker(addresses, c, len(starts))) for c, s in enumerate(starts)]
    try:
        for done, fut in enumerate(ex.completed(futures), start=1):
            s, e, res = fut.result()
            if progress is not None:
                progress(done, len(futures))
            yield slice(s, e), res
    finally:
        ex.cancel(futures)
