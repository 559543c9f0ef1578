"""What one permutation test is asked to do, as four small frozen groups of settings.

* :class:`ContrastTest`: the design, the contrast and its statistic (what is tested);
* :class:`Rearrangements`: how many rearrangements, of which kind, in which blocks, from which seed
  (the rearrangements, and so the results, depend only on these and on the test);
* :class:`MapSettings`: the neighbourhood graph and the whole-map inferences asked for (TFCE, clusters);
* :class:`Execution`: threads, worker processes, batch and chunk sizes, memory (results do not depend
  on them).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import numpy as np

from .freedman_lane import Kind, Tail
from .graph import Adjacency
from .tfce import TfceParams

if TYPE_CHECKING:
    from .whole_maps import MapWorkers

__all__ = [
    "BATCH_SIZE",
    "ContrastTest",
    "Execution",
    "MapSettings",
    "Rearrangements",
    "whole_map_batch",
]

#: Rearrangements stacked into one matrix product by default; larger batches gain nothing measurable.
BATCH_SIZE = 100
#: Copies of a batch of whole statistic maps alive at once with worker processes: the batch being
#: filled, two batches submitted and waiting, and about one more in pickled transit and in the workers.
_MAP_COPIES_WITH_WORKERS = 5


@dataclass(frozen=True, eq=False)
class ContrastTest:
    """One contrast of one design.

    Attributes
    ----------
    design : ndarray, shape (n, p)
    weights : ndarray, shape (q, p) or (p,)
        Estimable contrast rows.
    kind : {"t", "F"}
    tail : {"two-sided", "greater", "less"}
        For t; the oriented statistic is |t|, t or -t.
    name : str
    """

    design: np.ndarray
    weights: np.ndarray
    kind: Kind = "t"
    tail: Tail = "two-sided"
    name: str = ""


@dataclass(frozen=True, eq=False)
class Rearrangements:
    """Which rearrangements are drawn.

    Attributes
    ----------
    n_perm : int
        J, rearrangements including the identity (all distinct ones if fewer exist).
    method : {"auto", "permute", "flip", "both"}
        "auto": sign flips if the contrast moves with the mean of the data (a mean or a combination of
        means), else permutation (:func:`groupmodel.inference.freedman_lane.moves_with_mean`).
    blocks : ndarray of int, shape (n,), optional
        Exchangeability blocks; rows are permuted within blocks, or whole blocks are permuted
        with ``whole_blocks=True``.
    whole_blocks : bool
    seed : int
        Seed of ``numpy.random.default_rng`` for the random rearrangements.
    """

    n_perm: int = 5000
    method: Literal["auto", "permute", "flip", "both"] = "auto"
    blocks: np.ndarray | None = None
    whole_blocks: bool = False
    seed: int = 0


@dataclass(frozen=True, eq=False)
class MapSettings:
    """Whole-map inferences (both need the neighbourhood of the elements).

    Attributes
    ----------
    adjacency : Adjacency, optional
        Neighbourhood graph over the V elements; needed for TFCE and clusters.
    tfce : TfceParams, optional
        Compute TFCE and its FWE p with these settings (dh None: max oriented observed / 100).
    cluster_z : float, optional
        Compute cluster-extent FWE p at this cluster-forming z.
    """

    adjacency: Adjacency | None = None
    tfce: TfceParams | None = None
    cluster_z: float | None = None

    @property
    def wanted(self) -> bool:
        """Whether TFCE or clusters are asked for (then every batch needs its whole maps)."""
        return self.tfce is not None or self.cluster_z is not None


@dataclass(frozen=True, eq=False)
class Execution:
    """Where and in what pieces the work runs; results do not depend on any of it.

    Attributes
    ----------
    threads : int, optional
        Threads for the stacked products and the element-wise work after them (default: the cores
        this process may use).  Each thread takes its own contiguous part of every chunk and BLAS is
        limited to one thread meanwhile (:func:`groupmodel.runtime.single_threaded_blas`).
    n_jobs : int
        Worker processes for the TFCE / cluster nulls.
    workers : MapWorkers, optional
        Worker processes to use for the TFCE / cluster nulls instead of starting ``n_jobs`` new
        ones (share one set between contrasts); they must have been started on the adjacency.
    batch_size : int
        Rearrangements stacked into one matrix product (about 100 is efficient).
    cache_bytes : int
        Keep the residualised data in memory between batches when it fits in this many bytes.
    chunk_size : int, optional
        Voxels read and processed at a time (default: all).
    """

    threads: int | None = None
    n_jobs: int = 1
    workers: MapWorkers | None = None
    batch_size: int = BATCH_SIZE
    cache_bytes: int = 1 << 30
    chunk_size: int | None = None


def whole_map_batch(n_elements: int, budget_bytes: int, n_jobs: int, largest: int = BATCH_SIZE) -> int:
    """Rearrangements per batch so that the whole maps TFCE and clusters need fit in a memory budget.

    Parameters
    ----------
    n_elements : int
        Voxels or vertices per map (V).
    budget_bytes : int
        Memory for the float64 maps of the batches alive at once (one copy inline, about five with
        worker processes: :data:`_MAP_COPIES_WITH_WORKERS`).
    n_jobs : int
        Worker processes (1: inline).
    largest : int
        Upper limit (default :data:`BATCH_SIZE`).

    Returns
    -------
    int
        Between 8 and ``largest``; at 8 the budget may be exceeded for very large maps.
    """
    copies = 1 if n_jobs <= 1 else _MAP_COPIES_WITH_WORKERS
    return int(max(8, min(largest, budget_bytes // max(copies * n_elements * 8, 1))))
