"""The parametric fit of one chunk of data, as one pure task: here, or on a Dask worker.

:class:`ChunkFit` turns a chunk ``y`` (n, v) into everything the fit keeps of it (:class:`ChunkParts`): the OLS
(or, with variance groups, Welch) fit, the mean input image, each observation's sum of |residual| and the counts
of the unequal-variance check.  :func:`fitted_parts` runs it over the chunks of the loaded data, or, given a
cluster session, on the workers (:func:`groupmodel.analysis.cluster_fit.fitted_chunks`), which read their own
chunks.  The same function on the same chunks gives the same bits wherever it runs; the caller adds the
per-chunk sums in chunk order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..engine.ols import ChunkResult, Prepared, fit_chunk
from ..engine.participant_check import chunk_sums
from ..engine.welch import WelchChunk, WelchPrepared, fit_chunk_welch

__all__ = ["ChunkFit", "ChunkParts", "fitted_parts"]


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
    residual sums are those of the OLS estimates ``solve @ y`` (``solve`` the design's pseudo-inverse)."""

    prepared: Prepared | None
    design: np.ndarray
    counter: Callable[[np.ndarray], dict[str, tuple[int, int]]]
    welch: WelchPrepared | None = None
    solve: np.ndarray | None = None

    def __call__(self, y: np.ndarray) -> ChunkParts:
        mean = np.mean(y, axis=0, dtype=np.float64)
        if self.welch is not None:
            assert self.solve is not None
            beta = self.solve @ np.asarray(y, dtype=np.float64)
            return ChunkParts(fit_chunk_welch(self.welch, y), mean, chunk_sums(self.design, y, beta), self.counter(y))
        assert self.prepared is not None
        res = fit_chunk(self.prepared, y, beta=True)
        return ChunkParts(res, mean, chunk_sums(self.design, y, res.beta), self.counter(y))


def fitted_parts(work: ChunkFit, data: Any, chunk_voxels: int,
                 session: Any = None) -> Iterator[tuple[slice, ChunkParts]]:
    """``(columns, parts)`` of every chunk: in order here, or as the workers of ``session`` finish them."""
    if session is None:
        return ((cols, work(y)) for cols, y in data.chunks(chunk_voxels))
    from .cluster_fit import fitted_chunks

    return fitted_chunks(session, work, chunk_voxels)
