"""Fit every hypothesis at every voxel (or vertex) of the images, with corrected inference.

The engine (:func:`groupmodel.engine.ols.fit_chunk`) is a pure function of (prepared design, chunk of data);
this module feeds it the chunks of the loaded images and collects the maps, then runs the corrections.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from contextlib import nullcontext
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..engine.ols import Prepared
from ..engine.peaks import peak_element, statistic_map
from ..model.assembly import Model
from ..model.spec import ModelSpec, load_spec
from ..outputs.provenance import RunClock, RunInputs
from ..runtime.log import StageLog
from ..runtime.memory import DATA_SHARE, MemoryBudget
from ..runtime.progress import progress_bar
from .chunk_fit import ChunkFit, fitted_parts
from .corrections import (
    HypothesisInference,
    InferenceOptions,
    inference_notes,
    parametric_corrections,
    permutation_inference,
)
from .effect_maps import effect_size_names, effect_sizes
from .fit_setup import Opened, open_images, opened_model
from .parallel import parallel_plan, spill_warning
from .participant_check import ParticipantCheck, residual_table
from .strata_inference import strata_permutation_inference
from .strata_voxels import STRATA_EXTRA_MAPS, average_df, strata_degrees, strata_pass
from .unequal_variances import UnequalVarianceTally
from .welch_fit import WelchSetup, welch_maps, welch_record
from .welch_inference import welch_permutation_inference

#: Maps written for each kind of test (statistic names as in the sidecars).
T_MAPS = ("effect", "se", "t", "z", "p", "mlog10p", "p_fdr", "p_bonferroni")
F_MAPS = ("F", "z", "p", "mlog10p", "p_fdr", "p_bonferroni")


@dataclass
class VoxelFit:
    """Maps of a voxelwise fit, in mask order, plus what is needed to write them.

    Attributes
    ----------
    model : Model
    grid : groupmodel.images.Grid
    mask : ndarray of bool, shape grid.shape
    maps : dict
        Hypothesis name -> statistic name (``effect``, ``se``, ``t``/``F``, ``z``, ``p``, ``mlog10p``, the
        corrected p, and the effect sizes and intervals of :mod:`groupmodel.analysis.effect_maps`) ->
        float64 array of shape (n_in_mask,).
    residual_variance : ndarray, shape (n_in_mask,)
    df_resid : int
    mask_report : dict
        Voxel counts of the mask (in mask, left out for NaN/inf, left out for zero everywhere).
    dropped : list of (participant_id, reason)
        Participants left out for missing images (with --drop-missing-images).
    inference : dict or None
        The corrected-inference settings used.
    records : dict
        Hypothesis -> what its permutation maps were made with (method, J, exhaustive, seed, TFCE, ...).
    tables : dict
        Hypothesis -> kind (``voxel_fwe``, ``tfce_fwe``, ``cluster_extent_fwe``) -> cluster table.
    inputs : RunInputs or None
        The files the fit read (spec, participants table and JSON, mask, images), for the provenance record.
    clock : RunClock
        When the fit started (recorded with its wall time).
    mean_input : ndarray, shape (n_in_mask,), or None
        The mean of the input images (the background of the report's slices).
    participant_residuals : DataFrame or None
        Each observation's mean absolute residual across the mask (:mod:`.participant_check`).
    runtime : dict
        Cores available (and what limited them), threads and worker processes the permutations used.
    """

    model: Model
    grid: Any
    mask: np.ndarray
    maps: dict[str, dict[str, np.ndarray]]
    residual_variance: np.ndarray
    df_resid: int
    mask_report: dict[str, int]
    dropped: list[tuple[str, str]]
    warnings: list[str]
    inference: dict[str, Any] | None = None
    records: dict[str, dict[str, Any]] = field(default_factory=dict)
    tables: dict[str, dict[str, pd.DataFrame]] = field(default_factory=dict)
    inputs: RunInputs | None = None  # the files read (for the provenance of every sidecar)
    clock: RunClock = field(default_factory=RunClock.start)  # when the fit started
    mean_input: np.ndarray | None = None
    participant_residuals: pd.DataFrame | None = None
    runtime: dict[str, Any] = field(default_factory=dict)
    #: With ``variance_groups``: the groups and the statistics used (v and G, df2 per voxel); else None.
    variance_groups: dict[str, Any] | None = None
    #: Hypothesis -> (df1, df2) where they differ by hypothesis (within-participant factors: its stratum).
    degrees: dict[str, tuple[int, int]] = field(default_factory=dict)

    def df_of(self, name: str) -> tuple[int, int]:
        """A hypothesis's numerator and denominator degrees of freedom."""
        return self.degrees.get(name, (self.model.hypotheses[name].n_rows, self.df_resid))

    @property
    def elements(self) -> str:
        """What the maps are made of, in words: ``vertices`` for surface data, else ``voxels``."""
        return elements_of(self.grid)

    def summary(self) -> pd.DataFrame:
        """Per hypothesis: test, df, the peak statistic in the test's direction and its z
        (:func:`groupmodel.engine.peaks.peak_element`), voxels (vertices for surface data) with
        p < 0.001 and p < 0.05 (uncorrected) and with corrected p < 0.05."""
        rows = []
        for h in self.model.hypotheses.values():
            m = self.maps[h.name]
            stat = statistic_map(m)
            # NaN statistics (zero-variance voxels) are not tested; no tested voxel at all gives NaN peaks
            tested = ~np.isnan(stat)
            peak = peak_element(stat, h.tail)
            rows.append({
                "hypothesis": h.name,
                "test": h.test,
                "tail": h.tail,
                "df1": self.df_of(h.name)[0],
                # with variance groups df2 is approximate and per voxel: its median over the tested voxels
                "df2": float(np.nanmedian(m["df2"])) if "df2" in m and tested.any() else self.df_of(h.name)[1],
                "peak_statistic": float(stat[peak]) if peak is not None else np.nan,
                "peak_z": float(m["z"][peak]) if peak is not None else np.nan,
                f"{self.elements}_p_lt_0.001": int(np.count_nonzero(m["p"] < 1e-3)),
                f"{self.elements}_p_lt_0.05": int(np.count_nonzero(m["p"] < 0.05)),
                **{f"{self.elements}_{k}_lt_0.05": int(np.count_nonzero(m[k] < 0.05))
                   for k in ("p_fdr", "p_fwe", "p_tfce_fwe", "p_cluster_fwe") if k in m},
            })
        return pd.DataFrame(rows)


def fit_images(
    spec: ModelSpec | Path | str,
    mask: Path | str | None = None,
    memory_bytes: int = 2 * 1024**3,
    drop_missing: bool = False,
    chunk_voxels: int | None = None,
    progress: bool = True,
    inference: InferenceOptions | None = None,
    log: StageLog | None = None,
    checkpoint: Any = None,
    client: Any = None,
) -> VoxelFit:
    """Fit every hypothesis of ``spec`` at every voxel of its images.

    Every hypothesis also gets Benjamini-Hochberg and Bonferroni adjusted p maps over the mask; with
    ``inference`` (``permutations > 0``) permutation inference runs on the same data while they are loaded.

    TFCE and cluster nulls may run in worker processes (``inference.jobs``, within the cores and the memory
    budget).  They are started without the caller's main module, so a script calling this needs no
    ``if __name__ == "__main__":`` guard and may be read from standard input.

    Parameters
    ----------
    spec : ModelSpec or path
    mask : path, optional
        Mask image on the grid of the images (default: the spec's ``mask``, else every voxel finite in all
        images and nonzero in some).
    memory_bytes : int
        Budget for image data and working arrays (bytes).
    drop_missing : bool
        Leave out participants whose image is missing (listed) instead of stopping.
    chunk_voxels : int, optional
        Voxels per chunk (default: from the budget).  Results do not depend on it.
    progress : bool
        Show a progress bar when stderr is a terminal.
    inference : InferenceOptions, optional
        Permutation inference settings (default: the spec's ``inference`` object).
    log : StageLog, optional
        Where to write a line per stage and progress lines for logs (default: nothing).
    checkpoint : groupmodel.inference.checkpoint.CheckpointFolder, optional
        Keep the counts and maxima of finished permutation batches there, and resume from them.
    client : dask.distributed.Client, optional
        Run the fit and the permutations on this Dask cluster (:mod:`groupmodel.analysis.cluster_fit`):
        its workers read the images themselves; ``memory_bytes`` is then also each worker's budget.  The
        results are those of the local run.
    """
    clock = RunClock.start()
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    if inference is None:
        inference = InferenceOptions.from_spec(spec)
    budget = MemoryBudget(memory_bytes)
    opened = opened_model(spec, inference, drop_missing, client)
    model, source, dropped, prepared, welch = (opened.model, opened.source, opened.dropped, opened.prepared,
                                               opened.welch)
    log = log if log is not None else StageLog(quiet=True)
    plan = parallel_plan(inference, budget)
    log.info(plan.cores.describe())
    executor = None
    if client is not None:  # a worker has joined and every worker can read every image, before any reading
        from .cluster_fit import cluster_ready

        executor = cluster_ready(client, source)
    with log.stage("reading images" if executor is None else "finding the mask on the cluster"):
        data = _load(source, mask if mask is not None else spec.mask, budget, progress, log, executor)
    try:
        n_vox = data.n_in_mask
        chunk_voxels = chunk_voxels if chunk_voxels is not None else _default_chunk(model, budget, n_vox)
        session = None
        if executor is not None:
            from .cluster_fit import cluster_session

            session = cluster_session(executor, source, data, budget.permutation_bytes)
        tally = UnequalVarianceTally(model, prepared.u, prepared.centred) if prepared is not None else None
        with log.stage("fitting"):
            fitted = _fitted(opened, data, chunk_voxels, progress, inference.ci_level,
                             _Where(tally, session, plan.threads))
        maps, resid_var, extras = fitted.maps, fitted.resid_var, fitted.extras
        mean_input, df_resid, degrees = fitted.mean_input, fitted.df_resid, fitted.degrees
        # A rank-deficient design is fitted (with a generalised inverse); say so where the fit is reported.
        warnings = ([f.message for f in model.findings if f.code == "rank_deficient"] + list(data.warnings)
                    + _flat_warnings(maps, n_vox, elements_of(data.grid))
                    + (tally.voxel_findings(elements_of(data.grid)) if tally is not None else []))
        for name, extra in parametric_corrections({n: m["p"] for n, m in maps.items()}).items():
            maps[name].update(extra)
        with log.stage("permutations") if inference.active else nullcontext():
            permuted = _permutation_pass(model, data, replace(inference, threads=plan.threads, jobs=plan.jobs),
                                         budget, chunk_voxels, progress, log, checkpoint,
                                         welch, session)
        warnings += inference_notes(data.grid, inference) + ([plan.warning] if plan.warning else [])
        if data.spilled:
            warnings.append(spill_warning(model.design.n_observations * n_vox * 4, budget, -(-n_vox // chunk_voxels),
                                          inference, len(model.hypotheses)))
        for name, res in permuted.items():
            maps[name].update(res.maps)
        return VoxelFit(model, data.grid, data.mask, maps, resid_var, df_resid, _mask_report(data), dropped,
                        warnings, inference=inference.as_dict(),
                        records={n: r.record for n, r in permuted.items()},
                        tables={n: r.tables for n, r in permuted.items()},
                        inputs=RunInputs.of_spec(spec, mask if mask is not None else spec.mask,
                                                 [(r.path, r.volume) for r in source.refs], model.sample),
                        clock=clock, mean_input=mean_input,
                        participant_residuals=None if extras is None else residual_table(
                            model.design.participant_ids, extras[1], None if welch is None else welch.groups.labels),
                        runtime={**plan.as_dict(), **({} if session is None else session.record())},
                        variance_groups=welch_record(welch) if welch is not None else None, degrees=degrees)
    finally:
        data.close()


def _default_chunk(model: Model, budget: MemoryBudget, n_vox: int) -> int:
    """Voxels per chunk from the memory budget and the maps every hypothesis keeps."""
    from ..images import chunk_size_for

    extra = STRATA_EXTRA_MAPS if model.strata is not None else 0  # the epsilon and corrected p maps
    n_maps = sum(len(_map_names(h)) + extra for h in model.hypotheses.values()) + 1
    return chunk_size_for(model.design.n_observations, len(model.hypotheses), budget.chunk_work_bytes(n_maps, n_vox))


def _mask_report(data: Any) -> dict[str, int]:
    """The voxels in the mask and those left out, by reason."""
    return {
        "voxels_in_mask": int(data.n_in_mask),
        "voxels_left_out_nonfinite_in_some_images": int(data.n_nonfinite_excluded),
        "voxels_left_out_nonfinite_in_all_images": int(data.n_nonfinite_everywhere),
        "voxels_left_out_zero_in_all_images": int(data.n_zero_excluded),
    }


@dataclass(frozen=True)
class _Where:
    """Where the parametric pass runs and what it also counts: the unequal-variance tally, a Dask session, threads."""

    tally: UnequalVarianceTally | None
    session: Any
    threads: int


@dataclass(frozen=True)
class _Fitted:
    """The parametric pass: maps per hypothesis, residual variance, mean input image, residual df, each
    hypothesis's (df1, df2) in its stratum (within-participant factors only), the per-participant sums."""

    maps: dict[str, dict[str, np.ndarray]]
    resid_var: np.ndarray
    mean_input: np.ndarray
    df_resid: int
    degrees: dict[str, tuple[int, int]]
    extras: Any


def _fitted(opened: Opened, data: Any, chunk_voxels: int, progress: bool, ci_level: float,
            where: _Where) -> _Fitted:
    """Every hypothesis's parametric maps: in its error stratum (within-participant factors), by OLS, or with
    Welch's v and G (intervals only, no effect sizes)."""
    model, prepared, welch = opened.model, opened.prepared, opened.welch
    if prepared is None:
        maps, resid_var, mean_input = strata_pass(model, data, chunk_voxels, progress, ci_level)
        # the residual variance is the participant averages'
        return _Fitted(maps, resid_var, mean_input, average_df(model), strata_degrees(model), None)
    if welch is None:
        maps, resid_var, extras = _parametric_pass(model, prepared, data, chunk_voxels, progress, ci_level=ci_level,
                                                   tally=where.tally, session=where.session, threads=where.threads)
    else:
        maps, resid_var, extras = welch_maps(model, welch, data, chunk_voxels, progress, where.tally, where.session,
                                             ci_level=ci_level, threads=where.threads)
    return _Fitted(maps, resid_var, extras[0], prepared.df_resid, {}, extras)


def _load(source: Any, mask: Path | str | None, budget: MemoryBudget, progress: bool,
          log: StageLog | None = None, executor: Any = None) -> Any:
    """The masked image data; reading (decompressing) is usually the longest step: it gets its own bar (and
    progress lines for logs).  With the ``executor`` of a Dask cluster the workers find the mask and the columns
    stay in the files (:func:`~.cluster_fit.cluster_mask`)."""
    from ..images import load_masked

    what = "reading images" if executor is None else "scanning images on the cluster"
    bar = progress_bar(len(source), what, unit="image", enabled=progress)

    def report(done: int, total: int) -> None:
        bar.update_to(done)
        if log is not None:
            log.progress(what, done, total, "images")

    try:
        if executor is not None:
            from .cluster_fit import cluster_mask

            return cluster_mask(executor, source, mask, progress=report if bar.shown or log else None)
        return load_masked(source, mask, budget.data_bytes, progress=report if bar.shown or log else None)
    finally:
        bar.close()


def _map_names(h: Any) -> tuple[str, ...]:
    """The parametric maps of one hypothesis: T_MAPS or F_MAPS, then its effect sizes and intervals."""
    return (T_MAPS if h.test == "t" else F_MAPS) + effect_size_names(h)


def _parametric_pass(model: Model, prepared: Prepared, data: Any, chunk_voxels: int, progress: bool, *,
                     ci_level: float, tally: UnequalVarianceTally, session: Any = None, threads: int = 1
                     ) -> tuple[dict[str, dict[str, np.ndarray]], np.ndarray, tuple[np.ndarray, ParticipantCheck]]:
    """Effect, SE, t or F, z, p, -log10 p, effect-size and interval maps of every hypothesis, and the residual
    variance, chunk by chunk, here or on the cluster of ``session`` (intervals at ``ci_level``; the corrected
    p maps are allocated here and filled by the corrections); also the mean input image and the
    per-participant residual sums (added in chunk order), and the chunks counted by ``tally``; each chunk in
    ``threads`` threads here (:class:`~.chunk_fit.ChunkFit`), on one per task on a cluster."""
    n_vox = data.n_in_mask
    maps = {h.name: {k: np.empty(n_vox) for k in _map_names(h)} for h in model.hypotheses.values()}
    resid_var = np.empty(n_vox)
    mean_input = np.empty(n_vox)
    check = ParticipantCheck.empty(model.design.n_observations)
    sums: dict[int, tuple[np.ndarray, int]] = {}
    bar = progress_bar(n_vox, "fitting", enabled=progress)
    hyps = list(model.hypotheses.values())
    try:
        work = ChunkFit(prepared, model.design.matrix, tally.counter(), threads=threads if session is None else 1)
        with ThreadPoolExecutor(max(1, threads), thread_name_prefix="groupmodel-effects") as pool:
            for cols, part in fitted_parts(work, data, chunk_voxels, session):
                res = part.fit
                resid_var[cols] = res.residual_variance
                mean_input[cols] = part.mean
                sums[cols.start] = (part.sums, cols.stop - cols.start)
                tally.add_counts(part.counts)
                # effect sizes and intervals, hypotheses in threads (numpy and scipy release the GIL)
                sizes = pool.map(lambda h, res=res: effect_sizes(h, res[h.name], res.residual_variance, ci_level),
                                 hyps)
                for h, h_sizes in zip(hyps, sizes, strict=True):
                    _store(maps[h.name], cols, h, res[h.name], h_sizes)
                bar.update(cols.stop - cols.start)
    finally:
        bar.close()
    for s in sorted(sums):  # in chunk order: the same sums, bit for bit, in whatever order the chunks came
        check.add_sums(*sums[s])
    return maps, resid_var, (mean_input, check)


def _store(m: dict[str, np.ndarray], cols: slice, h: Any, r: Any, sizes: dict[str, np.ndarray]) -> None:
    """One chunk's results of hypothesis ``h`` (``r``, a TestResult) and its effect sizes into its maps."""
    if h.test == "t":
        m["effect"][cols] = r.effect
        m["se"][cols] = r.se
        m["t"][cols] = r.statistic
    else:
        m["F"][cols] = r.statistic
    m["z"][cols] = r.z
    m["p"][cols] = r.p
    m["mlog10p"][cols] = r.mlog10p
    for k, values in sizes.items():
        m[k][cols] = values


def elements_of(grid: Any) -> str:
    """``vertices`` for surface data, else ``voxels``."""
    return "vertices" if grid.kind == "gifti" else "voxels"


def _flat_warnings(maps: dict[str, dict[str, np.ndarray]], n_vox: int, elements: str = "voxels") -> list[str]:
    """A warning for voxels (vertices) with (numerically) zero residual variance: their statistics are NaN."""
    if not maps:
        return []
    first = next(iter(maps.values()))
    n_flat = int(np.count_nonzero(np.isnan(statistic_map(first))))
    if not n_flat:
        return []
    return [f"{n_flat} of {n_vox} {elements} have (numerically) zero residual variance, e.g. the same "
            "value in every image: their t, F, z and p are NaN (not tested)"]


def _permutation_pass(model: Model, data: Any, options: InferenceOptions, budget: MemoryBudget,
                      chunk_voxels: int, progress: bool, log: StageLog, checkpoint: Any = None,
                      welch: WelchSetup | None = None, session: Any = None) -> dict[str, HypothesisInference]:
    """Permutation inference of every hypothesis (nothing when no permutations are asked for), here or on
    the cluster of ``session`` (progress in rearrangements here, in tasks there)."""
    if not options.active:
        return {}
    if session is None:
        bar = progress_bar(options.permutations * len(model.hypotheses), "permutations", unit="perm",
                           enabled=progress)
    else:
        bar = progress_bar(0, "permutation tasks", unit="task", enabled=progress)
    done_before: dict[str, int] = {}
    totals = {h: options.permutations for h in model.hypotheses}

    def report(name: str, done: int, total: int) -> None:
        if session is not None and name not in done_before:
            bar.grow(total)  # a contrast's task count is known when it starts
            totals[name] = total
        bar.update(done - done_before.get(name, 0))
        done_before[name] = done
        log.progress("permutations" if session is None else "permutation tasks", sum(done_before.values()),
                     sum(totals.values()), "rearrangements" if session is None else "tasks")

    try:
        if model.strata is not None:  # within-participant factors: rearranged in each hypothesis's stratum
            return strata_permutation_inference(model, data, options, budget.permutation_bytes, chunk_voxels,
                                                progress=report, checkpoint=checkpoint)
        if welch is not None:
            return welch_permutation_inference(model, welch, data, options, chunk_voxels, report, cluster=session,
                                               checkpoint=checkpoint)
        return permutation_inference(model, data, options, cache_bytes=budget.permutation_bytes,
                                     maps_bytes=budget.permutation_bytes, chunk_voxels=chunk_voxels,
                                     progress=report, checkpoint=checkpoint, cluster=session)
    finally:
        bar.close()


__all__ = ["DATA_SHARE", "F_MAPS", "T_MAPS", "VoxelFit", "elements_of", "fit_images", "open_images"]
