"""A voxelwise fit on a Dask cluster: the workers read their chunks of the images and run the same pure tasks.

:func:`groupmodel.analysis.voxel_fit.fit_images` with ``client=`` comes here for the work: the parametric
fit chunk by chunk (:class:`~groupmodel.analysis.chunk_fit.ChunkFit`) and the permutation tasks
(:func:`groupmodel.inference.distributed.run_on_cluster`, and with variance groups
:func:`groupmodel.inference.welch_distributed.welch_on_cluster`).  The client sends each task the chunk's fit
(the prepared design), the paths of the images (once per worker) and the columns of its chunk; the workers
read the images from the shared file system themselves.  The client still reads every image once, to find
the analysis mask (as a local run does).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ImageError, InputError
from ..images.columns import ColumnReader, first_unreadable
from ..inference.distributed import cached_columns, home_worker
from ..runtime.cluster import CONNECT_TIMEOUT, DaskExecutor, dask_executor
from .chunk_fit import ChunkFit, ChunkParts

__all__ = ["ClusterSession", "cluster_session", "fitted_chunks"]


@dataclass(frozen=True, eq=False)
class ClusterSession:
    """Where a fit's tasks run (a :class:`DaskExecutor`) and how its workers read the data."""

    executor: DaskExecutor
    reader: ColumnReader
    cache_bytes: int

    def record(self) -> dict[str, Any]:
        """What the run record says of the cluster (it does not change the results)."""
        return {"scheduler": self.executor.record()}


def cluster_session(client: Any, source: Any, data: Any, cache_bytes: int) -> ClusterSession:
    """The session of one fit: waits for a worker, checks that every worker can read every image.
    ``cache_bytes``: what each worker may keep of the data it read, for later tasks.

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
    reader = ColumnReader.of(source, data)
    missing = executor.on_every_worker(first_unreadable, reader.paths)
    for worker, path in sorted(missing.items()):
        if path is not None:
            raise ImageError(f"Dask worker {worker}: cannot read image {path} (from {source.origin}); the workers "
                             "must see the images at the same paths as this machine: put them on a file system "
                             "shared with the workers")
    return ClusterSession(executor, reader, int(cache_bytes))


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
