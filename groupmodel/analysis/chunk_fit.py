"""The parametric fit of one chunk of data, as one pure task: here, or on a Dask worker.

:class:`ChunkFit` turns a chunk ``y`` (n, v) into everything the fit keeps of it (:class:`ChunkParts`): the OLS
(or, with variance groups, Welch) fit, the mean input image, each observation's sum of |residual| and the counts
of the unequal-variance check.  :func:`fitted_parts` runs it over the chunks of the loaded data, or, given a
cluster session, on the workers (:func:`groupmodel.analysis.cluster_fit.fitted_chunks`), which read their own
chunks.  The same function on the same chunks gives the same bits wherever it runs; the caller adds the
per-chunk sums in chunk order.

With ``threads`` > 1 a chunk is cut into that many sub-chunks fitted at once in threads (numpy and scipy
release the GIL in their loops; BLAS is held to one thread meanwhile) and put back together.  Every voxel's
values are computed column by column, so they do not depend on the cut; the cut falls on the blocks of the
participant sums (:func:`groupmodel.engine.participant_check.sums_step`), whose block sums are added in the
same order, so the parts are the same bits with any number of threads.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..engine.ols import ChunkResult, Prepared, fit_chunk
from ..engine.participant_check import add_blocks, block_sums, sums_step
from ..engine.welch import WelchChunk, WelchPrepared, fit_chunk_welch
from ..runtime.cores import single_threaded_blas

__all__ = ["ChunkFit", "ChunkParts", "fitted_parts"]

#: A chunk is cut for threads only when each sub-chunk gets at least this many voxels.
MIN_THREADED_VOXELS = 4096


@dataclass(frozen=True, eq=False)
class ChunkParts:
    """What the fit keeps of one chunk.

    Attributes
    ----------
    fit : ChunkResult or WelchChunk
    mean : ndarray (v,)
        The mean input image over the observations.
    sums : ndarray (n,)
        Each observation's sum of |residual| (of the OLS fit) over the chunk.
    counts : dict
        Factor -> (voxels flagged, voxels tested) of the unequal-variance check.
    """

    fit: ChunkResult | WelchChunk
    mean: np.ndarray
    sums: np.ndarray
    counts: dict[str, tuple[int, int]]


@dataclass(frozen=True, eq=False)
class ChunkFit:
    """The fit of one chunk (pickles; holds no data): OLS with ``prepared``, or Welch with ``welch``, whose
    residual sums are those of the OLS estimates ``solve @ y`` (``solve`` the design's pseudo-inverse);
    ``threads`` sub-chunks at once (1 on a cluster worker, whose cores its own threads share)."""

    prepared: Prepared | None
    design: np.ndarray
    counter: Callable[[np.ndarray], dict[str, tuple[int, int]]]  # counts of a block of OLS residuals
    welch: WelchPrepared | None = None
    solve: np.ndarray | None = None
    threads: int = 1

    def __call__(self, y: np.ndarray) -> ChunkParts:
        cuts = sub_chunks(y.shape[1], self.threads, sums_step(y.shape[0]))
        if len(cuts) == 1:
            fit, mean, blocks, counts = self._part(y)
            return ChunkParts(fit, mean, add_blocks(blocks), counts)
        with single_threaded_blas(), ThreadPoolExecutor(len(cuts), thread_name_prefix="groupmodel-fit") as pool:
            parts = list(pool.map(lambda c: self._part(y[:, c]), cuts))
        total = np.zeros(y.shape[0])
        counts: dict[str, tuple[int, int]] = {}
        for _, _, blocks, part_counts in parts:
            add_blocks(blocks, total)
            _add_counts(counts, part_counts)
        return ChunkParts(_joined([p[0] for p in parts]), np.concatenate([p[1] for p in parts]), total, counts)

    def _part(self, y: np.ndarray) -> tuple[Any, np.ndarray, np.ndarray, dict[str, tuple[int, int]]]:
        """The fit, mean, block sums (:func:`block_sums`) and counts of (a sub-chunk of) a chunk."""
        mean = np.mean(y, axis=0, dtype=np.float64)
        fit: ChunkResult | WelchChunk
        if self.welch is not None:
            assert self.solve is not None
            fit, beta = fit_chunk_welch(self.welch, y), self.solve @ np.asarray(y, dtype=np.float64)
        else:
            assert self.prepared is not None
            fit = fit_chunk(self.prepared, y, beta=True)
            beta = fit.beta
        # One pass over the OLS residuals, block by block: the counts of the unequal-variance check, then
        # the participant sums.
        counts: dict[str, tuple[int, int]] = {}
        blocks = block_sums(self.design, y, beta, each=lambda resid: _add_counts(counts, self.counter(resid)))
        return fit, mean, blocks, counts


def _add_counts(total: dict[str, tuple[int, int]], more: dict[str, tuple[int, int]]) -> None:
    """Add counts (flagged, tested) factor by factor (integers: in any order)."""
    for name, (hit, tested) in more.items():
        old = total.get(name, (0, 0))
        total[name] = (old[0] + hit, old[1] + tested)


def sub_chunks(v: int, threads: int, step: int) -> list[slice]:
    """``threads`` slices of about equal width covering ``range(v)``, cut at multiples of ``step`` (one slice
    when the chunk is too narrow for each to get :data:`MIN_THREADED_VOXELS`)."""
    if threads <= 1 or v < threads * MIN_THREADED_VOXELS:
        return [slice(0, v)]
    per_thread = -(-v // threads)
    width = -(-per_thread // step) * step
    return [slice(s, min(v, s + width)) for s in range(0, v, width)]


def _joined(parts: Sequence[Any]) -> Any:
    """Results of consecutive sub-chunks as one: arrays joined along their last (voxel) axis, the results of
    the tests test by test, everything else (names, degrees of freedom, None) from the first."""
    first = parts[0]
    if isinstance(first, np.ndarray):
        return np.concatenate(parts, axis=-1)
    if isinstance(first, dict):
        return {k: _joined([p[k] for p in parts]) for k in first}
    if dataclasses.is_dataclass(first):
        return dataclasses.replace(first, **{  # type: ignore[type-var]
            f.name: _joined([getattr(p, f.name) for p in parts]) for f in dataclasses.fields(first)
            if isinstance(getattr(first, f.name), np.ndarray | dict)})
    return first


def fitted_parts(work: ChunkFit, data: Any, chunk_voxels: int,
                 session: Any = None) -> Iterator[tuple[slice, ChunkParts]]:
    """``(columns, parts)`` of every chunk: in order here, or as the workers of ``session`` finish them."""
    if session is None:
        return ((cols, work(y)) for cols, y in data.chunks(chunk_voxels))
    from .cluster_fit import fitted_chunks

    return fitted_chunks(session, work, chunk_voxels)
