"""Permutation inference of hypotheses in error strata (within-participant factors).

A hypothesis's transformed data (c values per participant) stacked participant by participant are an OLS model
with design ``X (x) I_c`` and contrast ``L (x) I_c``: its F is the split-plot F of
:mod:`groupmodel.analysis.strata_fit`.  Rearranged whole participants at a time (blocks of c rows):

* sign flips of each participant's transformed values when the between part is a mean (e.g. a within main
  effect: each participant's contrasts are symmetric about 0 under the null);
* permutations of participants (Freedman-Lane) when the between part compares between cells (a between effect
  on the averages, a between-by-within interaction on the contrasts).

The transformed data of one hypothesis are formed chunk by chunk from the images as loaded and held in memory
(never written to disk) while its rearrangements run.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..errors import ModelError
from ..model.assembly import Model
from ..model.options import InferenceOptions
from .corrections import METHODS, WEIGHT_SUM_TOL, HypothesisInference, _hypothesis_inference, adjacency_for

#: What each method rearranges, in words (recorded in the sidecars).
REARRANGED = {"flip": "sign flips of each participant's transformed values (all c together)",
              "permute": "permutations of whole participants (Freedman-Lane)"}


@dataclass(frozen=True)
class _Shim:
    """The fields of a hypothesis the table writer of the permutation results reads."""

    name: str
    test: str
    tail: str


def check_strata_inference(model: Model, options: InferenceOptions) -> None:
    """Refuse settings the strata fix themselves: exchangeability blocks (whole participants are the units)."""
    if options.active and options.blocks:
        raise ModelError(f"{model.spec.name}: exchangeability blocks are set by the strata for within-participant "
                         "factors (whole participants); remove the blocks setting")


def stratum_method(model: Model, name: str, method: str) -> str:
    """``flip`` when the between part of the hypothesis is a mean (some row's between-cell weights do not sum
    to 0), ``permute`` when it compares between cells (and for slopes); other settings as given."""
    if method != "auto":
        return METHODS[method]
    assert model.strata is not None
    w = model.strata.tests[name].between_cells
    if w is None:
        return "permute"
    sums = np.abs(w.sum(axis=1))
    return "flip" if bool(np.any(sums > WEIGHT_SUM_TOL * np.abs(w).max(axis=1))) else "permute"


def _stacked(model: Model, name: str, data: Any, chunk_voxels: int) -> np.ndarray:
    """The transformed data of one hypothesis, (n_entered * c, n_vox), participant-major, chunk by chunk."""
    strata = model.strata
    assert strata is not None
    t = strata.tests[name]
    out = np.empty((len(t.entered) * t.within_df, data.n_in_mask))
    for cols, y in data.chunks(chunk_voxels):
        out[:, cols] = strata.transformed(name, y).reshape(out.shape[0], -1)
    return out


def strata_permutation_inference(model: Model, data: Any, options: InferenceOptions, cache_bytes: int,
                                 chunk_voxels: int,
                                 progress: Callable[[str, int, int], None] | None = None,
                                 checkpoint: Any = None) -> dict[str, HypothesisInference]:
    """Permutation inference of every hypothesis in its stratum (see the module text); with ``checkpoint``
    (:class:`groupmodel.inference.checkpoint.CheckpointFolder`) each hypothesis's finished batches are kept
    and a resumed run continues from them."""
    from ..inference.settings import BATCH_SIZE, Execution, MapSettings, whole_map_batch
    from ..inference.tfce import TfceParams
    from ..inference.whole_maps import shared_workers
    from ..runtime.cores import available_cores

    strata = model.strata
    assert strata is not None
    adjacency = adjacency_for(data.grid, data.mask, options)
    ijk = data.voxel_coords() if data.grid.kind == "nifti" else None
    maps = MapSettings(adjacency, TfceParams(dh=options.tfce_step) if options.tfce else None,
                       options.cluster_threshold)
    whole_maps = options.tfce or options.cluster_threshold is not None
    jobs = options.jobs if options.jobs is not None else available_cores()
    batch = whole_map_batch(data.n_in_mask, cache_bytes, jobs) if whole_maps else BATCH_SIZE
    with shared_workers(jobs, adjacency, whole_maps) as workers:
        execution = Execution(threads=options.threads, n_jobs=jobs, workers=workers, batch_size=batch,
                              cache_bytes=cache_bytes, chunk_size=chunk_voxels)
        return {name: _one(model, name, data, options, execution, maps, ijk, progress, chunk_voxels, checkpoint)
                for name in strata.tests}


def _one(model: Model, name: str, data: Any, options: InferenceOptions, execution: Any, maps: Any,
         ijk: np.ndarray | None, progress: Callable[[str, int, int], None] | None,
         chunk_voxels: int, checkpoint: Any = None) -> HypothesisInference:
    """One hypothesis: its stacked model, the method of its stratum, the rearrangements and the record."""
    from ..inference.driver import run_permutations
    from ..inference.settings import ContrastTest, Rearrangements

    strata = model.strata
    assert strata is not None
    t = strata.tests[name]
    c = t.within_df
    x = np.kron(strata.design_of(name), np.eye(c))
    weights = np.kron(t.between_weights, np.eye(c))
    kind = "t" if t.test == "t" and weights.shape[0] == 1 else "F"
    tail = t.tail if kind == "t" else "two-sided"
    method = stratum_method(model, name, options.method)
    blocks = np.repeat(np.arange(len(t.entered)), c)
    chosen = Rearrangements(n_perm=options.permutations, method=method, blocks=blocks if c > 1 else None,
                            whole_blocks=c > 1, seed=options.seed)

    def report(done: int, total: int, _name: str = name) -> None:
        if progress is not None:
            progress(_name, done, total)

    saved = None if checkpoint is None else checkpoint.contrast(
        name, {"permutations": options.permutations, "seed": options.seed, "method": method,
               "stratum": t.stratum})
    res = run_permutations(ContrastTest(x, weights, kind=kind, tail=tail, name=name),
                           _stacked(model, name, data, chunk_voxels), chosen, maps, execution, progress=report,
                           checkpoint=saved)
    inf = _hypothesis_inference(res, _Shim(name, kind, t.tail), replace(options, blocks=None), maps.adjacency, ijk,
                                data.grid)
    inf.record.update({"stratum": t.stratum, "transformed_data": t.transformed,
                       "rearranged": REARRANGED.get(res.method, res.method),
                       "exchangeable_units": f"{len(t.entered)} participants"})
    return inf
