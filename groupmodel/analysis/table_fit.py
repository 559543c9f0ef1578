"""Fit every hypothesis to one numeric column of the participants table (an ROI value, a score)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..engine.effect_sizes import DEFAULT_CI_LEVEL
from ..engine.ols import ChunkResult, fit_chunk, prepare
from ..errors import ModelError
from ..model.assembly import Model, build
from ..model.checks import Finding
from ..model.options import check_ci_level
from ..model.spec import ModelSpec, load_spec
from ..outputs.provenance import RunClock
from ..text import DISCLAIMER
from .cell_means import cell_means
from .effect_maps import EFFECT_SIZE_STATS, effect_sizes
from .strata_fit import StrataTableFit, fit_strata_table
from .unequal_variances import UnequalVarianceTally
from .welch_fit import table_welch, welch_setup

#: Columns of results.tsv, in order (the effect sizes and intervals last; n/a where not defined).
RESULT_COLUMNS = ["hypothesis", "test", "tail", "estimate", "se", "statistic", "df1", "df2", "p", "z",
                  *EFFECT_SIZE_STATS]


@dataclass
class TableFit:
    """The table-level fit of every hypothesis to one outcome column."""

    model: Model
    outcome: str
    result: ChunkResult
    table: pd.DataFrame
    clock: RunClock = field(default_factory=RunClock.start)  # when the fit started (recorded with the results)
    cell_means: pd.DataFrame | None = None
    ci_level: float = DEFAULT_CI_LEVEL
    #: With ``variance_groups``: the groups, their residual variances and the statistics used (v, G).
    variance_groups: dict[str, Any] | None = None

    def format(self) -> str:
        """The results table for a terminal."""
        lines = [
            f"outcome {self.outcome}: {self.model.design.n_observations} observations, "
            f"{self.result.df_resid} residual df, residual SD {float(np.sqrt(self.result.residual_variance[0])):.6g}",
        ]
        if self.variance_groups is not None:
            sds = ", ".join(f"{g} {np.sqrt(v):.6g}" for g, v in self.variance_groups["group_residual_variance"].items())
            lines.append(f"variance groups {self.variance_groups['factor']} (residual SD {sds}): "
                         "t tests use Welch's v, F tests Welch's G, with approximate df2")
        frame = self.table.copy()
        for col in ("estimate", "se", "statistic", "z", *EFFECT_SIZE_STATS):
            frame[col] = frame[col].map(lambda v: "n/a" if pd.isna(v) else f"{v:.6g}")
        frame["p"] = frame["p"].map(lambda v: f"{v:.4g}")
        lines.append(frame.to_string(index=False))
        lines.append(DISCLAIMER)
        return "\n".join(lines)


def results_table(model: Model, result: ChunkResult, voxel: int = 0,
                  ci_level: float = DEFAULT_CI_LEVEL) -> pd.DataFrame:
    """One row per hypothesis: test, estimate, se, statistic, df1, df2, p (for its tail), z of equal p, then the
    effect sizes and ``ci_level`` intervals (:mod:`groupmodel.analysis.effect_maps`; NaN where not defined)."""
    records = []
    for h in model.hypotheses.values():
        r = result[h.name]
        t = h.test == "t"
        sizes = effect_sizes(h, r, result.residual_variance, ci_level, grid=False)
        records.append({
            "hypothesis": h.name,
            "test": h.test,
            "tail": h.tail,
            "estimate": float(r.effect[voxel]) if t else np.nan,
            "se": float(r.se[voxel]) if t and r.se is not None else np.nan,
            "statistic": float(r.statistic[voxel]),
            "df1": r.df1,
            "df2": r.df2,
            "p": float(r.p[voxel]),
            "z": float(r.z[voxel]),
            **{k: float(sizes[k][voxel]) if k in sizes else np.nan for k in EFFECT_SIZE_STATS},
        })
    return pd.DataFrame.from_records(records, columns=RESULT_COLUMNS)


def require_fittable(model: Model) -> None:
    """Raise a ModelError for a model with errors or without hypotheses (exit code 1)."""
    model.raise_for_errors()
    if not model.hypotheses:
        raise ModelError(f"{model.spec.name}: the spec has no hypotheses to test; add a 'hypotheses' object")


def fit_table(spec: ModelSpec | Path | str, outcome: str,
              ci_level: float | None = None) -> TableFit | StrataTableFit:
    """Fit every hypothesis of ``spec`` to the numeric table column ``outcome``.

    Rows with ``n/a`` in the outcome are left out and listed with the other exclusions.  Intervals are at
    ``ci_level`` (default: the spec's ``inference.ci_level``, else 0.95).
    """
    clock = RunClock.start()
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    level = check_ci_level(spec.inference_options.ci_level if ci_level is None else ci_level)
    model = build(spec, numeric_columns=[outcome])
    require_fittable(model)
    if model.strata is not None:  # within-participant factors: each hypothesis in its error stratum
        return fit_strata_table(model, outcome, level, clock)
    y = model.sample.data[outcome].to_numpy(dtype=float)[:, None]
    prepared = prepare(model.design.matrix, model.tests())
    result = fit_chunk(prepared, y)
    table, record = results_table(model, result, ci_level=level), None
    setup = welch_setup(model, prepared)
    if setup is not None:  # Welch's v and G with their approximate df (intervals; the effect sizes n/a)
        table, record = table_welch(model, setup, y, RESULT_COLUMNS, ci_level=level)
    tally = UnequalVarianceTally(model, prepared.u, prepared.centred)
    tally.add(y)
    model.findings += [Finding("warning", "unequal_variances", m) for m in tally.table_findings()]
    return TableFit(model, outcome, result, table, clock, cell_means=cell_means(model.design, y), ci_level=level,
                    variance_groups=record)
