"""Corrected inference for a voxelwise fit: FDR and Bonferroni, and permutation inference.

This module connects the array-level methods (:mod:`groupmodel.multiple`, :mod:`groupmodel.inference`,
:mod:`groupmodel.tfce`, :mod:`groupmodel.clusters`) to a model and its images: which settings apply, which
maps come out, what their sidecars record, and the cluster tables.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError
from ..inference.multiple import bonferroni, fdr_bh
from ..model.options import InferenceOptions

#: Method names as users write them -> the inference engine's names.
METHODS = {"auto": "auto", "permutation": "permute", "sign_flip": "flip", "both": "both"}
_METHOD_NAMES = {"permute": "permutation", "flip": "sign_flip", "both": "both"}
#: Level at which corrected maps are summarised in cluster tables.
TABLE_ALPHA = 0.05


def parametric_corrections(p_maps: dict[str, np.ndarray]) -> dict[str, dict[str, np.ndarray]]:
    """Benjamini-Hochberg (1995) adjusted p and Bonferroni p over the mask, per hypothesis.

    Parameters
    ----------
    p_maps : dict
        Hypothesis -> p values (n_in_mask,) for its tail.
    """
    return {name: {"p_fdr": fdr_bh(p), "p_bonferroni": bonferroni(p)} for name, p in p_maps.items()}


def block_labels(model: Any, column: str) -> np.ndarray:
    """Integer exchangeability-block label of every design row, from a table column."""
    from ..model.table import MISSING

    table = model.sample.table  # read once, by build
    if column not in table.columns:
        raise InputError(
            f"{model.spec.participants.name}: blocks column {column!r} is not in the table "
            f"(columns {list(table.columns)}); fix --blocks / inference.blocks"
        )
    rows = model.sample.data["row"].tolist()
    values = table[column].iloc[[r - 1 for r in rows]].tolist()
    for r, v in zip(rows, values, strict=True):
        if v in MISSING:
            raise InputError(
                f"{model.spec.participants.name} row {r}, column {column!r}: expected a block label, found n/a; "
                "fill it in or exclude the participant"
            )
    _, labels = np.unique(np.asarray(values, dtype=object).astype(str), return_inverse=True)
    return labels.astype(int)


def adjacency_for(grid: Any, mask: np.ndarray, options: InferenceOptions) -> Any:
    """The neighbourhood graph over in-mask elements, for TFCE and clusters (None when not needed)."""
    from ..inference.graph import grid_adjacency, mesh_adjacency

    if not (options.tfce or options.cluster_threshold is not None):
        return None
    if grid.kind == "gifti":
        if options.mesh is None:
            raise InputError(
                "TFCE and clusters on surface data need the mesh; found no inference.mesh in the spec; "
                'add "inference": {"mesh": "path/to/surface.gii"} with the triangles of the surface'
            )
        import nibabel as nib

        img = nib.load(str(options.mesh))
        faces = [d.data for d in img.darrays if d.intent == nib.nifti1.intent_codes["NIFTI_INTENT_TRIANGLE"]]
        if not faces:
            raise InputError(f"mesh {options.mesh}: expected a GIFTI triangle array; found none; give a surface file")
        return mesh_adjacency(np.asarray(faces[0]), n_vertices=grid.shape[0], mask=mask)
    return grid_adjacency(mask, connectivity=options.connectivity)


@dataclass
class HypothesisInference:
    """Corrected maps, their records and cluster tables for one hypothesis."""

    maps: dict[str, np.ndarray]
    record: dict[str, Any]
    tables: dict[str, pd.DataFrame]


def permutation_inference(
    model: Any,
    data: Any,
    options: InferenceOptions,
    cache_bytes: int,
    chunk_voxels: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    maps_bytes: int | None = None,
) -> dict[str, HypothesisInference]:
    """Run Freedman-Lane permutation inference for every hypothesis.

    Parameters
    ----------
    model : Model
    data : groupmodel.images.MaskedData
        Open, with ``data.data`` of shape (n_obs, n_in_mask).
    options : InferenceOptions
    cache_bytes : int
        Memory the engine may keep residualised data in.
    chunk_voxels : int, optional
        Voxels per chunk; results do not depend on it.
    progress : callable(name, done, total), optional
    maps_bytes : int, optional
        Memory for the whole statistic maps that TFCE and cluster inference hold per batch of
        rearrangements (default: ``cache_bytes``); sets the batch size.  Results do not depend on it.
    """
    from ..inference.driver import run_permutations
    from ..inference.settings import BATCH_SIZE, ContrastTest, Execution, MapSettings, Rearrangements, whole_map_batch
    from ..inference.tfce import TfceParams
    from ..inference.whole_maps import shared_workers
    from ..runtime.cores import available_cores

    adjacency = adjacency_for(data.grid, data.mask, options)
    blocks = block_labels(model, options.blocks) if options.blocks else None
    ijk = data.voxel_coords() if data.grid.kind == "nifti" else None
    out: dict[str, HypothesisInference] = {}
    # One set of worker processes for every hypothesis: each costs about a second to start.
    whole_maps = options.tfce or options.cluster_threshold is not None
    jobs = options.jobs if options.jobs is not None else available_cores()
    n_elements = int(data.data.shape[1])
    batch = whole_map_batch(n_elements, maps_bytes or cache_bytes, jobs) if whole_maps else BATCH_SIZE
    rearrangements = Rearrangements(
        n_perm=options.permutations, method=METHODS[options.method], blocks=blocks,
        whole_blocks=options.whole_blocks, seed=options.seed,
    )
    map_settings = MapSettings(
        adjacency, TfceParams(dh=options.tfce_step) if options.tfce else None, options.cluster_threshold
    )
    with shared_workers(jobs, adjacency, whole_maps) as workers:
        execution = Execution(
            threads=options.threads, n_jobs=jobs, workers=workers, batch_size=batch, cache_bytes=cache_bytes,
            chunk_size=chunk_voxels,
        )
        for h in model.hypotheses.values():
            def report(done: int, total: int, _name: str = h.name) -> None:
                if progress is not None:
                    progress(_name, done, total)

            test = ContrastTest(model.design.matrix, h.weights, kind=h.test, tail=h.test_tail, name=h.name)
            res = run_permutations(test, data.columns(), rearrangements, map_settings, execution, progress=report)
            out[h.name] = _hypothesis_inference(res, h, options, adjacency, ijk, data.grid)
    return out


def _hypothesis_inference(res: Any, h: Any, options: InferenceOptions, adjacency: Any, ijk: np.ndarray | None,
                          grid: Any) -> HypothesisInference:
    """The maps, record and tables of one hypothesis's permutation result (TFCE, then clusters)."""
    from ..inference.results import TfceResult

    record = {
        "method": _METHOD_NAMES.get(res.method, res.method),
        "permutations": int(res.n_perm),
        "possible_rearrangements": int(res.n_possible) if res.n_possible < 2**62 else float(res.n_possible),
        "exhaustive": bool(res.exhaustive),
        "seed": options.seed,
        "blocks": options.blocks,
        "whole_blocks": options.whole_blocks,
        "nuisance_method": "Freedman-Lane",
    }
    maps = {"p_perm": res.p_perm, "p_fwe": res.p_fwe}
    tables = {"voxel_fwe": _significant_table(res.stat, res.p_fwe, h, adjacency, ijk, grid)}
    for part in res.whole_maps:
        if isinstance(part, TfceResult):
            maps["tfce"] = part.map
            maps["p_tfce_fwe"] = part.p_fwe
            record["tfce"] = {"E": part.params.E, "H": part.params.H, "dh": part.params.dh,
                              "rule": part.params.rule, "connectivity": options.connectivity}
            tables["tfce_fwe"] = _significant_table(res.stat, part.p_fwe, h, adjacency, ijk, grid)
        else:
            maps["p_cluster_fwe"] = part.p_fwe
            record["cluster"] = {"z_threshold": part.z, "statistic_threshold": part.threshold,
                                 "connectivity": options.connectivity}
            tables["cluster_extent_fwe"] = _table(res.stat, part.clusters, part.cluster_p_fwe, ijk, grid)
    return HypothesisInference(maps, record, tables)


def _table(stat: np.ndarray, clusters: Any, p: Any, ijk: np.ndarray | None, grid: Any) -> pd.DataFrame:
    from ..inference.clusters import cluster_table

    if ijk is not None:
        return cluster_table(stat, clusters, p, ijk=ijk, affine=grid.affine)
    return cluster_table(stat, clusters, p)


def _significant_table(stat: np.ndarray, p: np.ndarray, h: Any, adjacency: Any, ijk: np.ndarray | None,
                       grid: Any) -> pd.DataFrame:
    """Clusters of elements with corrected p < TABLE_ALPHA; each cluster's p is its smallest p."""
    from ..inference.clusters import label_clusters
    from ..inference.graph import grid_adjacency

    if adjacency is None:
        if grid.kind != "nifti":
            return pd.DataFrame()
        # Clusters of significant voxels need neighbours even without TFCE or cluster-extent inference.
        mask = np.zeros(grid.shape, dtype=bool)
        mask[tuple(ijk.T)] = True
        adjacency = grid_adjacency(mask, 26)
    signed = np.where(p < TABLE_ALPHA, np.sign(stat) if h.test == "t" else 1.0, 0.0)
    clusters = label_clusters(signed, 0.5, adjacency, two_sided=(h.test == "t"))
    p_cluster = np.array([p[clusters.labels == c].min() for c in range(1, clusters.count + 1)])
    return _table(stat, clusters, p_cluster, ijk, grid)
