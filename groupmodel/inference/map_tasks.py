"""The whole-map task of TFCE and cluster-extent nulls: a batch of statistic maps in, the largest |TFCE| and the
largest cluster of each map out (a pure function of picklable inputs, run inline or in worker processes).

Worker processes get the adjacency once (:func:`worker_init`), not with every batch, and load the compiled
kernels (extra ``fast``) before their first batch (:func:`warm_kernels`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .clusters import max_cluster_size
from .graph import Adjacency
from .tfce import TfceParams, tfce_max

__all__ = ["MapSpec", "enhance_input", "map_nulls", "warm_kernels", "worker_init", "worker_nulls"]

@dataclass(frozen=True)
class MapSpec:
    """How to turn one statistic map into its TFCE and cluster null statistics (None: not asked)."""

    kind: str
    tail: str
    tfce: TfceParams | None  # with dh fixed
    cluster_threshold: float | None


def enhance_input(stat: np.ndarray, spec: MapSpec) -> tuple[np.ndarray, bool]:
    """The map TFCE and clusters work on, and whether it is two-sided."""
    if spec.kind == "t" and spec.tail == "less":
        return -stat, False
    return stat, spec.kind == "t" and spec.tail == "two-sided"


def map_nulls(maps: np.ndarray, spec: MapSpec, adjacency: Adjacency) -> tuple[np.ndarray, np.ndarray]:
    """Max |TFCE| and largest cluster size of each map (NaN where not requested)."""
    B = maps.shape[0]
    tmax = np.full(B, np.nan)
    cmax = np.full(B, np.nan)
    for b in range(B):
        x, two = enhance_input(maps[b], spec)
        if spec.tfce is not None:
            p = spec.tfce
            tmax[b] = tfce_max(x, adjacency, p.dh, p.E, p.H, p.rule, two_sided=two)
        if spec.cluster_threshold is not None:
            cmax[b] = max_cluster_size(x, spec.cluster_threshold, adjacency, two_sided=two)
    return tmax, cmax


_WORKER: dict[str, Any] = {}


def worker_init(adjacency: Adjacency) -> None:
    """Install the adjacency in a worker process (shipped once, not with every batch), and load the compiled
    kernels (if any) before the first batch arrives."""
    _WORKER["adjacency"] = adjacency
    warm_kernels()


def warm_kernels() -> None:
    """Load (or, the first time on a machine, compile and cache) the compiled TFCE and cluster kernels by
    enhancing a tiny map, so that no batch pays for it; nothing without the extra ``fast``.  The caller of
    the worker processes runs it first, so the workers load the cached code and none compiles."""
    from .graph import grid_adjacency

    adjacency = grid_adjacency(np.ones((3, 3, 3), dtype=bool))
    x = np.linspace(-3.0, 3.0, adjacency.n)
    tfce_max(x, adjacency, 0.5, two_sided=True)
    max_cluster_size(x, 1.0, adjacency, two_sided=True)


def worker_nulls(maps: np.ndarray, spec: MapSpec) -> tuple[np.ndarray, np.ndarray]:
    """:func:`map_nulls` on the worker's adjacency."""
    return map_nulls(maps, spec, _WORKER["adjacency"])
