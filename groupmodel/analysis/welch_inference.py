"""Permutation inference with variance groups: Freedman-Lane with Welch's v or G, max-statistic FWE.

Which rearrangements are valid (Winkler et al. 2014, NeuroImage 92:381-397, "exchangeability blocks and variance
groups"): rows may be permuted only among rows of the same variance group (and of the same exchangeability block,
when ``inference.blocks`` is given), since exchangeable errors must share a variance; sign flips assume only
symmetric errors and need no equal variances.  So:

* ``method: auto``: sign flips for a mean or a combination of means (as without variance groups), and for a
  hypothesis that permutation within the variance groups cannot move in full (one whose interest space has a
  direction within :data:`BLOCK_COSINE_MAX` of the group indicators: a difference between variance groups, as
  patients against controls grouped by diagnosis, or an F test that includes one); otherwise permutation within
  the variance groups;
* ``method: permutation``: permutation within the variance groups (refused for a hypothesis it cannot move);
* ``method: sign_flip`` / ``both``: as asked, permutations (for ``both``) within the variance groups.

The statistic is v or G at every rearrangement (each group's variance re-estimated); p values are the share of
rearrangements (identity included) at least as large, FWE p from the maximum over the mask.  TFCE, cluster
inference and whole-block permutation are not offered with variance groups (refused before any work).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import InputError
from ..inference.checkpoint import BatchState
from ..inference.freedman_lane import moves_with_mean, partition
from ..inference.rearrangements import permutation_set
from ..inference.results import PermutationResult, fwe_p
from ..inference.settings import BATCH_SIZE
from ..inference.welch_distributed import WelchTotals
from ..inference.welch_nulls import WelchNullPlan, oriented_welch, welch_batch
from ..model.options import InferenceOptions
from .corrections import HypothesisInference, _hypothesis_inference, block_labels, hypothesis_method
from .welch_fit import WelchSetup

__all__ = ["check_welch_inference", "welch_method", "welch_permutation_inference"]

#: Sign flips instead of permutation within the blocks when the interest space has a direction whose cosine with
#: the block-constant vectors exceeds this (within-block permutations would leave over 1% of its variance unmoved).
BLOCK_COSINE_MAX = 0.1


def check_welch_inference(options: InferenceOptions) -> None:
    """Refuse, before any work, the permutation settings not offered with variance groups."""
    if not options.active:
        return
    asked = [name for name, on in (("tfce", options.tfce), ("cluster_threshold", options.cluster_threshold is not None),
                                   ("whole_blocks", options.whole_blocks)) if on]
    if asked:
        raise InputError(
            f"inference {', '.join(asked)}: not available with variance_groups (Welch's v and G are tested by "
            "max-statistic permutation within the variance groups); drop these settings or remove variance_groups")


def _combined_blocks(groups: np.ndarray, blocks: np.ndarray | None) -> np.ndarray:
    """One label per row for (variance group, exchangeability block)."""
    if blocks is None:
        return groups.astype(np.int64)
    _, labels = np.unique(np.column_stack([groups, blocks]), axis=0, return_inverse=True)
    return labels.reshape(-1).astype(np.int64)


def _moves_within(interest: np.ndarray, blocks: np.ndarray) -> bool:
    """Whether permuting rows within the blocks moves the whole interest space: no direction of it lies (to
    :data:`BLOCK_COSINE_MAX`) in the span of the block indicators, which such permutations leave unchanged."""
    labels = np.unique(blocks)
    indicators = (blocks[:, None] == labels[None, :]).astype(float)
    indicators /= np.sqrt(indicators.sum(axis=0))  # orthonormal: the blocks do not overlap
    cosines = np.linalg.svd(indicators.T @ interest, compute_uv=False)
    return bool(cosines.max(initial=0.0) <= BLOCK_COSINE_MAX)


def welch_method(h: Any, setting: str, interest_moves: bool, mean_moves: bool) -> str:
    """The rearrangements for one hypothesis with variance groups (see the module notes)."""
    method = hypothesis_method(h, setting)
    if method == "auto":
        method = "flip" if mean_moves else "permute"
    if method == "permute" and not interest_moves:
        if setting == "permutation":
            raise InputError(
                f"hypothesis {h.name}: permutation within the variance groups cannot test it (it compares the "
                "variance groups, at least in part); use inference.method sign_flip or auto")
        return "flip"
    return method


def welch_permutation_inference(model: Any, setup: WelchSetup, data: Any, options: InferenceOptions,
                                chunk_voxels: int,
                                progress: Callable[[str, int, int], None] | None = None, cluster: Any = None,
                                checkpoint: Any = None) -> dict[str, HypothesisInference]:
    """Max-statistic permutation inference with v / G for every hypothesis (see the module notes); on the
    Dask cluster of ``cluster`` (:class:`~.cluster_fit.ClusterSession`) when given, with the same results.
    ``checkpoint`` (:class:`~groupmodel.inference.checkpoint.CheckpointFolder`): here, each hypothesis's
    state is saved after chunks of elements and a run resumes after the last chunk saved."""
    x = model.design.matrix
    user_blocks = block_labels(model, options.blocks) if options.blocks else None
    blocks = _combined_blocks(setup.groups.labels, user_blocks)
    _, classes = np.unique(np.round(x, 10), axis=0, return_inverse=True)
    ijk = data.voxel_coords() if data.grid.kind == "nifti" else None
    base = setup.prepared.base
    out = {}
    for pt in base._prepared_tests:
        h = model.hypotheses[pt.test.name]
        part = partition(x, h.weights, h.test)
        method = welch_method(h, options.method, _moves_within(part.interest, blocks), moves_with_mean(part))
        plan = WelchNullPlan(setup.prepared, pt.a, np.ascontiguousarray(part.nuisance), h.test, h.test_tail)
        pset = permutation_set(x.shape[0], options.permutations, method, blocks=blocks, seed=options.seed,
                               classes=classes.reshape(-1))
        def report(done: int, total: int, _name: str = h.name) -> None:
            if progress is not None:
                progress(_name, done, total)

        if cluster is None:
            saved = None if checkpoint is None else checkpoint.contrast(h.name, {
                "permutations": options.permutations, "seed": options.seed, "method": method,
                "statistic": "v" if h.test == "t" else "G"})
            totals = _run(plan, pset, data, chunk_voxels, report, saved)
        else:
            totals = _on_cluster(cluster, plan, pset, chunk_voxels, report)
        res = _result(plan, pset, h, totals)
        inference = _hypothesis_inference(res, h, options, None, ijk, data.grid)
        inference.record.update({
            "permutation_statistic": "v" if h.test == "t" else "G",
            "permuted_within_variance_groups": setup.groups.factor,
            "rearrangements": "rows permuted only within variance groups"
                              + (" and exchangeability blocks" if options.blocks else "")
                              + "; sign flips need no equal variances",
        })
        out[h.name] = inference
    return out


def _run(plan: WelchNullPlan, pset: Any, data: Any, chunk_voxels: int,
         progress: Callable[[int, int], None], saved: Any = None) -> WelchTotals:
    """Counts and maxima over chunks (outer) and batches (inner); combined by sum and max.  With ``saved`` (a
    :class:`~groupmodel.inference.checkpoint.ContrastCheckpoint`), the elements it holds are not run again and
    the state is saved after chunks; every element's values depend on that element only and maxima combine
    exactly, so a resumed run gives the same bits whatever the chunks."""
    n_vox = data.n_in_mask
    J = pset.size
    totals = WelchTotals(np.full(n_vox, np.nan), np.zeros(n_vox, dtype=np.int64), np.full(J, -np.inf))
    stat, counts, maxima = totals.stat, totals.counts, totals.maxima
    start = _restore(totals, saved.load() if saved is not None else None, J)
    chunks = list(range(0, n_vox, chunk_voxels)) or [0]
    for i, (cols, y) in enumerate(data.chunks(chunk_voxels)):
        if cols.stop <= start:
            continue
        if cols.start < start:  # saved with other chunks: go on from the first element not done
            y, cols = y[:, start - cols.start:], slice(start, cols.stop)
        observed = None
        for first in range(0, J, BATCH_SIZE):
            stop = min(J, first + BATCH_SIZE)
            perm, flips = pset.batch(first, stop)
            got = welch_batch(plan, perm, flips, y, observed)
            if got.stat is not None:
                stat[cols] = got.stat
                observed = oriented_welch(plan, got.stat)
            counts[cols] += got.counts
            np.maximum(maxima[first:stop], got.maxima, out=maxima[first:stop])
            progress(min(J, (i * J + stop) // len(chunks)), J)
        if saved is not None and saved.due(final=cols.stop >= n_vox):
            saved.save(BatchState(J if cols.stop >= n_vox else 0, counts, maxima, None, None, stat=stat,
                                  elements_done=cols.stop))
    return totals


def _restore(totals: WelchTotals, state: BatchState | None, J: int) -> int:
    """Put back a saved state (elements done in order, with their statistics); returns where to go on from."""
    if state is None:
        return 0
    n_vox = totals.stat.size
    if state.stat is None or state.elements_done is None or state.count.size != n_vox or state.max_null.size != J:
        raise InputError(
            f"the checkpoint holds {state.count.size} elements and {state.max_null.size} rearrangements of another "
            f"kind of run, this run {n_vox} and {J} with variance groups; resume with the same command, or remove "
            "the checkpoint")
    totals.stat[:] = state.stat
    totals.counts[:] = state.count
    totals.maxima[:] = state.max_null
    return int(state.elements_done)


def _on_cluster(cluster: Any, plan: WelchNullPlan, pset: Any, chunk_voxels: int,
                progress: Callable[[int, int], None]) -> WelchTotals:
    """:func:`_run`'s work as tasks on the cluster (:mod:`groupmodel.inference.welch_distributed`)."""
    from ..inference.distributed import ClusterWork
    from ..inference.welch_distributed import welch_on_cluster

    return welch_on_cluster(cluster.executor, cluster.reader, plan, pset, chunk_voxels,
                            ClusterWork(cache_bytes=cluster.cache_bytes), progress)


def _result(plan: WelchNullPlan, pset: Any, h: Any, totals: WelchTotals) -> PermutationResult:
    """The permutation result of one hypothesis from its totals (wherever they were added up)."""
    J = pset.size
    stat, counts, maxima = totals.stat, totals.counts, totals.maxima.copy()
    oriented = oriented_welch(plan, stat)
    p_perm = np.where(np.isnan(oriented), np.nan, counts / J)
    maxima[np.isneginf(maxima)] = np.nan
    return PermutationResult(
        name=h.name, kind=h.test, tail=h.test_tail, df=plan.wp.base.df_resid, q=int(plan.a.shape[0]), stat=stat,
        p_perm=p_perm, p_fwe=fwe_p(oriented, maxima), max_null=maxima, n_perm=J, exhaustive=pset.exhaustive,
        method=pset.method, seed=pset.seed, n_possible=pset.n_possible, whole_maps=(),
    )
