"""Corrected inference for a voxelwise fit: FDR and Bonferroni, and permutation inference.

This module connects the array-level methods (:mod:`groupmodel.multiple`, :mod:`groupmodel.inference`,
:mod:`groupmodel.tfce`, :mod:`groupmodel.clusters`) to a model and its images: which settings apply, which
maps come out, what their sidecars record, and the cluster tables.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
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
#: Relative size (of the largest weight) under which a row of cell weights counts as summing to zero.
WEIGHT_SUM_TOL = 1e-8
#: The rule of ``method: auto``, as recorded in summary.json.
AUTO_RULE = ("auto: sign_flip for a hypothesis whose weights over cell means do not sum to zero (a mean or a "
             "combination of means), permutation when they sum to zero (differences, interactions, slopes)")


def hypothesis_method(h: Any, method: str) -> str:
    """The inference engine's method for one hypothesis under the user's ``method`` setting.

    ``auto``: sign flips (``flip``) when some row of the hypothesis's weights over cell means does not sum
    to zero, since row permutation leaves the mean of the data, and so a mean or a combination of means,
    unchanged; permutation (``permute``) when every row sums to zero (differences, interactions, trends)
    and for slopes (weights over cell slopes).  Raw weights that no combination of cell means reproduces
    are left to the engine's rule (``auto``: the same question asked of the design, whether the contrast
    moves when a constant is added to every observation).  Any other setting is used as given.
    """
    if method != "auto":
        return METHODS[method]
    if h.on_slopes:
        return "permute"
    if h.cell_weights is None:
        return "auto"
    w = np.asarray(h.cell_weights, dtype=float)
    sums = np.abs(w.sum(axis=1))
    return "flip" if bool(np.any(sums > WEIGHT_SUM_TOL * np.abs(w).max(axis=1))) else "permute"


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
        return mesh_adjacency(read_mesh_faces(options.mesh, grid.shape[0]), n_vertices=grid.shape[0], mask=mask)
    return grid_adjacency(mask, connectivity=options.connectivity)


def read_mesh_faces(path: Path, n_vertices: int) -> np.ndarray:
    """The triangles of a GIFTI surface, checked against the number of vertices of the data.

    Raises
    ------
    InputError
        The file is missing or not a GIFTI surface, has no triangle array, or its triangles (or its
        vertex coordinates) do not match the vertices of the data.
    """
    import nibabel as nib

    path = Path(path)
    where = f"inference.mesh {path}"
    if not path.is_file():
        raise InputError(f"{where}: expected a GIFTI surface file; found no file there; fix the path "
                         "(relative to the spec)")
    try:
        img = nib.load(str(path))
    except Exception as exc:  # nibabel raises many kinds for a file it cannot read
        raise InputError(f"{where}: expected a GIFTI surface; could not read it ({type(exc).__name__}); "
                         "give a .surf.gii file with a triangle array") from exc
    darrays = getattr(img, "darrays", None)
    if darrays is None:
        raise InputError(f"{where}: expected a GIFTI surface; found a {type(img).__name__}; "
                         "give a .surf.gii file with a triangle array")
    codes = nib.nifti1.intent_codes
    faces = [np.asarray(d.data) for d in darrays if d.intent == codes["NIFTI_INTENT_TRIANGLE"]]
    points = [np.asarray(d.data) for d in darrays if d.intent == codes["NIFTI_INTENT_POINTSET"]]
    if not faces or faces[0].ndim != 2 or faces[0].shape[1] != 3 or faces[0].size == 0:
        raise InputError(f"{where}: expected a GIFTI triangle array (n x 3 vertex indices); found none; "
                         "give a surface file")
    tri = faces[0].astype(np.int64)
    n_mesh = points[0].shape[0] if points else int(tri.max()) + 1
    if n_mesh != n_vertices or tri.min() < 0 or tri.max() >= n_vertices:
        raise InputError(f"{where}: expected a surface of the {n_vertices} vertices of the data; found one of "
                         f"{n_mesh} vertices (triangle indices {int(tri.min())} to {int(tri.max())}); "
                         "give the surface the data were sampled on")
    return tri


def inference_notes(grid: Any, options: InferenceOptions) -> list[str]:
    """What the corrected inference leaves out, and why (one sentence each): cluster tables of surface data
    without a mesh, whose vertices have no known neighbours."""
    if options.active and grid.kind == "gifti" and options.mesh is None:
        return ["no cluster tables: the vertices of surface data have no known neighbours without inference.mesh; "
                'the p_fwe maps hold the results; add "inference": {"mesh": "surface.surf.gii"} for cluster tables']
    return []


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
    checkpoint: Any = None,
    cluster: Any = None,
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
    checkpoint : groupmodel.inference.checkpoint.CheckpointFolder, optional
        Save (and resume from) the counts and maxima of each hypothesis's finished batches.
    cluster : groupmodel.analysis.cluster_fit.ClusterSession, optional
        Run the permutations on this Dask cluster; the same results.
    """
    from ..inference.driver import run_permutations
    from ..inference.settings import BATCH_SIZE, ContrastTest, Execution, MapSettings, Rearrangements, whole_map_batch
    from ..inference.tfce import TfceParams
    from ..inference.whole_maps import shared_workers
    from ..runtime.cores import available_cores

    adjacency = adjacency_for(data.grid, data.mask, options)
    tables_adjacency = adjacency if adjacency is not None else _surface_tables_adjacency(data.grid, data.mask, options)
    blocks = block_labels(model, options.blocks) if options.blocks else None
    ijk = data.voxel_coords() if data.grid.kind == "nifti" else None
    out: dict[str, HypothesisInference] = {}
    # One set of worker processes for every hypothesis: each costs about a second to start.
    whole_maps = options.tfce or options.cluster_threshold is not None
    jobs = options.jobs if options.jobs is not None else available_cores()
    if cluster is not None:
        jobs = 1  # the whole-map tasks run on the cluster, each in one worker
    n_elements = int(data.data.shape[1])
    batch = whole_map_batch(n_elements, maps_bytes or cache_bytes, jobs) if whole_maps else BATCH_SIZE
    rearrangements = Rearrangements(
        n_perm=options.permutations, method="auto", blocks=blocks,
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
            chosen = replace(rearrangements, method=hypothesis_method(h, options.method))
            saved = None if checkpoint is None else checkpoint.contrast(
                h.name, {"permutations": options.permutations, "seed": options.seed, "method": chosen.method})
            if cluster is not None:
                res = _on_cluster(cluster, test, chosen, map_settings, execution, report, saved)
            else:
                res = run_permutations(test, data.columns(), chosen, map_settings, execution, progress=report,
                                       checkpoint=saved)
            out[h.name] = _hypothesis_inference(res, h, options, tables_adjacency, ijk, data.grid)
    return out


def _on_cluster(cluster: Any, test: Any, chosen: Any, map_settings: Any, execution: Any,
                report: Callable[[int, int], None], checkpoint: Any = None) -> Any:
    """One contrast's permutations on the cluster (:func:`groupmodel.inference.distributed.run_on_cluster`)."""
    from ..inference.distributed import ClusterWork, run_on_cluster

    work = ClusterWork(cache_bytes=cluster.cache_bytes)
    return run_on_cluster(cluster.executor, cluster.reader, test, chosen, map_settings, execution, work, report,
                          checkpoint)


def _surface_tables_adjacency(grid: Any, mask: np.ndarray, options: InferenceOptions) -> Any:
    """The mesh's neighbours for the cluster tables of surface data when no whole-map inference needs them."""
    from ..inference.graph import mesh_adjacency

    if grid.kind != "gifti" or options.mesh is None:
        return None
    return mesh_adjacency(read_mesh_faces(options.mesh, grid.shape[0]), n_vertices=grid.shape[0], mask=mask)


def _hypothesis_inference(res: Any, h: Any, options: InferenceOptions, adjacency: Any, ijk: np.ndarray | None,
                          grid: Any) -> HypothesisInference:
    """The maps, record and tables of one hypothesis's permutation result (TFCE, then clusters)."""
    from ..inference.results import TfceResult
    from ..inference.tfce import DH_RULE

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
    # vertices of a surface are neighbours along the edges of the mesh's triangles
    neighbours = options.connectivity if grid.kind == "nifti" else "mesh edges"
    maps = {"p_perm": res.p_perm, "p_fwe": res.p_fwe}
    tables = {}
    if adjacency is not None or grid.kind == "nifti":  # surface data without a mesh: no tables (inference_notes)
        tables["voxel_fwe"] = _significant_table(res.stat, res.p_fwe, h, adjacency, ijk, grid)
    for part in res.whole_maps:
        if isinstance(part, TfceResult):
            maps["tfce"] = part.map
            maps["p_tfce_fwe"] = part.p_fwe
            record["tfce"] = {"E": part.params.E, "H": part.params.H, "dh": part.params.dh,
                              "dh_from": "tfce_step (given)" if options.tfce_step is not None else DH_RULE,
                              "rule": part.params.rule, "connectivity": neighbours}
            tables["tfce_fwe"] = _significant_table(res.stat, part.p_fwe, h, adjacency, ijk, grid)
        else:
            maps["p_cluster_fwe"] = part.p_fwe
            record["cluster"] = {"z_threshold": part.z, "statistic_threshold": part.threshold,
                                 "connectivity": neighbours}
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
        # Clusters of significant voxels need neighbours even without TFCE or cluster-extent inference.
        mask = np.zeros(grid.shape, dtype=bool)
        mask[tuple(ijk.T)] = True
        adjacency = grid_adjacency(mask, 26)
    signed = np.where(p < TABLE_ALPHA, np.sign(stat) if h.test == "t" else 1.0, 0.0)
    clusters = label_clusters(signed, 0.5, adjacency, two_sided=(h.test == "t"))
    p_cluster = np.array([p[clusters.labels == c].min() for c in range(1, clusters.count + 1)])
    return _table(stat, clusters, p_cluster, ijk, grid)
