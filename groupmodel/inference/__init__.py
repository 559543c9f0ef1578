"""Corrected inference on arrays: neighbourhood graphs, TFCE, clusters, FDR and Bonferroni, rearrangements,
Freedman-Lane permutation tests.

Submodules are imported on first use (the names below are looked up lazily), so that a worker process
that only enhances maps does not import the whole package.
"""

from __future__ import annotations

import importlib
from typing import Any

#: Public name -> submodule that defines it.
_EXPORTS = {
    "Adjacency": "graph",
    "grid_adjacency": "graph",
    "mesh_adjacency": "graph",
    "TfceParams": "tfce",
    "tfce": "tfce",
    "Clusters": "clusters",
    "cluster_table": "clusters",
    "label_clusters": "clusters",
    "stat_threshold": "clusters",
    "bonferroni": "multiple",
    "fdr_bh": "multiple",
    "PermutationSet": "rearrangements",
    "count_rearrangements": "rearrangements",
    "permutation_set": "rearrangements",
    "ContrastPlan": "freedman_lane",
    "Partition": "freedman_lane",
    "partition": "freedman_lane",
    "plan_contrast": "freedman_lane",
    "chunk_statistics": "kernel",
    "BATCH_SIZE": "settings",
    "ContrastTest": "settings",
    "Execution": "settings",
    "MapSettings": "settings",
    "Rearrangements": "settings",
    "whole_map_batch": "settings",
    "ClusterResult": "results",
    "PermutationResult": "results",
    "TfceResult": "results",
    "MapWorkers": "whole_maps",
    "shared_workers": "whole_maps",
    "run_permutations": "driver",
    "run_tests": "driver",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'groupmodel.inference' has no attribute {name!r}")
    return getattr(importlib.import_module(f".{module}", __name__), name)
