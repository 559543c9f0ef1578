"""``groupmodel fit --dry-run``: every check of a fit and what the run would do, without writing anything.

Checks the spec and the table (the model is built), the images (existence, headers, grids, then every image's
values read once, so an unreadable file is found now rather than hours later) and the mask; every image
problem is reported at once.  Then it states the run: observations, voxels, hypotheses, permutations, the
memory plan, threads and worker processes, and the time the permutations would take, estimated from a short
calibration (rearrangements of the first hypothesis on random data of the real size, in this process, after a first
short run that pays for one-off work such as compiling; 10, 40, 160, ... until a run takes a second).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..model.assembly import Model
from ..model.spec import ModelSpec, load_spec
from ..runtime.log import duration_text
from ..runtime.memory import MemoryBudget
from .corrections import InferenceOptions, adjacency_for, hypothesis_method
from .fit_setup import opened_model
from .parallel import ParallelPlan, parallel_plan
from .strata_inference import stratum_method
from .voxel_fit import elements_of

#: Rearrangements timed first by the calibration (four times more until it takes CALIBRATION_SECONDS).
CALIBRATION_REARRANGEMENTS = 10
#: Seconds a calibration run should last for a stable estimate.
CALIBRATION_SECONDS = 1.0


@dataclass(frozen=True)
class DryRun:
    """What a fit would do."""

    model: Model
    n_observations: int
    n_elements: int
    elements: str
    n_hypotheses: int
    permutations: int
    data_bytes: int
    budget: MemoryBudget
    plan: ParallelPlan
    reading_seconds: float
    estimated_seconds: float | None
    dropped: list[tuple[str, str]]

    def _strata_words(self) -> str:
        strata = self.model.strata
        if strata is None:
            return ""
        return (f", images of {len(strata.participant_ids)} participants; each hypothesis in its error stratum ("
                + ", ".join(f"{n}: {t.stratum}" for n, t in strata.tests.items()) + ")")

    def lines(self) -> list[str]:
        spilled = self.data_bytes > self.budget.data_bytes
        memory = (f"memory: image data {self.data_bytes / 2**20:.1f} MB "
                  f"{'spilled to disk in the temporary folder (more than' if spilled else '(within'} the "
                  f"{self.budget.data_bytes / 2**20:.1f} MB data share of --memory "
                  f"{self.budget.total / 2**20:.0f} MB)")
        workers = f", {self.plan.workers} worker processes" if self.plan.workers else ""
        out = [
            f"dry run of {self.model.spec.name}: nothing is written",
            f"observations: {self.n_observations}" + (f" ({len(self.dropped)} left out for missing images)"
                                                     if self.dropped else "") + self._strata_words(),
            f"{self.elements}: {self.n_elements} in the mask",
            f"hypotheses: {self.n_hypotheses} ({', '.join(self.model.hypotheses)})",
            f"permutations: {self.permutations if self.permutations else 'none (parametric corrections only)'}",
            memory,
            f"{self.plan.cores.describe()}: {self.plan.threads} threads{workers}",
            f"reading the images took {duration_text(self.reading_seconds)}",
        ]
        if self.estimated_seconds is not None:
            out.append(f"estimated time of the permutations: about {duration_text(self.estimated_seconds)} "
                       "(from rearrangements timed now, in this process)")
        return out


def dry_run(spec: ModelSpec | Path | str, mask: Path | str | None = None, memory_bytes: int = 2 * 1024**3,
            drop_missing: bool = False, inference: InferenceOptions | None = None) -> DryRun:
    """Run every check of :func:`~groupmodel.analysis.voxel_fit.fit_images` and describe the run; raises the
    errors a fit would raise (every image problem at once)."""
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    inference = inference if inference is not None else InferenceOptions.from_spec(spec)
    budget = MemoryBudget(memory_bytes)
    opened = opened_model(spec, inference, drop_missing, None)  # the fit's own checks, Welch's included
    model, source, dropped = opened.model, opened.source, opened.dropped
    start = time.perf_counter()
    in_mask = _read_all(source, mask if mask is not None else spec.mask)
    reading = time.perf_counter() - start
    n, V = model.design.n_observations, int(in_mask.sum())
    plan = parallel_plan(inference, budget)
    seconds = _calibrate(model, source.grid, in_mask, inference, plan) if inference.active else None
    return DryRun(model, n, V, elements_of(source.grid), len(model.hypotheses), inference.permutations, n * V * 4,
                  budget, plan, reading, seconds, dropped)


def _read_all(source: Any, mask: Path | str | None) -> np.ndarray:
    """Every image read once (problems collected and raised together); the mask the fit would use: the user
    mask's voxels that are finite in every image and not zero in all."""
    from ..errors import ImageError
    from ..images.headers import ImageProblem, raise_problems
    from ..images.mask import load_mask
    from ..images.reading import _read_array

    grid = source.grid
    inside = load_mask(mask, grid) if mask is not None else np.ones(grid.shape, dtype=bool)
    finite = np.ones(grid.shape, dtype=bool)
    nonzero = np.zeros(grid.shape, dtype=bool)
    problems = []
    if source.mode == "4d":
        from ..images.reading import _iter_arrays

        for _, arr in _iter_arrays(source):
            finite &= np.isfinite(arr)
            nonzero |= arr != 0
    else:
        for ref in source.refs:
            try:
                arr = _read_array(ref, grid, source.origin)
            except ImageError as exc:
                problems.append(ImageProblem("unreadable", str(exc)))
                continue
            finite &= np.isfinite(arr)
            nonzero |= np.isfinite(arr) & (arr != 0)
    if problems:
        raise_problems(problems, len(source), source.origin)
    return inside & finite & nonzero


def _calibrate(model: Model, grid: Any, in_mask: np.ndarray, options: InferenceOptions,
               plan: ParallelPlan) -> float:
    """Seconds the permutations would take: a few rearrangements of the first hypothesis on random data of the
    real size (statistics and TFCE/cluster work do not depend on the values much), scaled to every hypothesis
    and the number of rearrangements asked for."""
    from ..inference.driver import run_permutations
    from ..inference.settings import Execution, MapSettings, Rearrangements
    from ..inference.tfce import TfceParams

    V = int(in_mask.sum())
    h = next(iter(model.hypotheses.values()))
    test, method = _first_test(model, h, options)
    data = np.random.default_rng(0).standard_normal((test.design.shape[0], V)).astype(np.float32)
    mask = in_mask if grid.kind == "nifti" else in_mask.reshape(-1)
    adjacency = adjacency_for(grid, mask, options)
    maps = MapSettings(adjacency, TfceParams(dh=options.tfce_step) if options.tfce else None,
                       options.cluster_threshold)
    def timed(n_perm: int) -> float:
        start = time.perf_counter()
        run_permutations(test, data, Rearrangements(n_perm=n_perm, method=method, seed=options.seed), maps,
                         replace(Execution(), threads=plan.threads, n_jobs=1))
        return time.perf_counter() - start

    timed(2)  # one-off work (compiling the TFCE kernels, first touches) not counted
    J = CALIBRATION_REARRANGEMENTS
    while True:
        seconds = timed(J)
        if seconds >= CALIBRATION_SECONDS or J >= max(options.permutations, CALIBRATION_REARRANGEMENTS):
            break
        J *= 4
    per = seconds / J
    # with within-participant factors each hypothesis has its own stacked model: the first one stands for all
    return per * options.permutations * len(model.hypotheses) / max(1, plan.jobs if adjacency is not None else 1)


def _first_test(model: Model, h: Any, options: InferenceOptions) -> tuple[Any, str]:
    """The model the calibration times and its method: the hypothesis as fitted (in its error stratum, as the
    participants' stacked transformed values, when there are within-participant factors)."""
    from ..inference.settings import ContrastTest

    if model.strata is None:
        return (ContrastTest(model.design.matrix, h.weights, kind=h.test, tail=h.test_tail, name=h.name),
                hypothesis_method(h, options.method))
    t = model.strata.tests[h.name]
    eye = np.eye(t.within_df)
    kind = "t" if t.is_t else "F"
    test = ContrastTest(np.kron(model.strata.design_of(h.name), eye), np.kron(t.between_weights, eye), kind=kind,
                        tail=t.tail if kind == "t" else "two-sided", name=h.name)
    return test, stratum_method(model, h.name, options.method)
