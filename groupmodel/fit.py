"""Run the OLS engine over a table column (ROI analysis) or over all chunks of the images.

The engine (:mod:`groupmodel.ols`) is a pure function of (design, tests, chunk of data); this module only
feeds it and collects what it returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import __version__
from .errors import InputError, ModelError
from .model import DISCLAIMER, Model, build
from .ols import ChunkResult, fit_chunk, prepare
from .outputs import OutputFolder
from .spec import ModelSpec, load_spec


@dataclass
class TableFit:
    """The table-level fit of every hypothesis to one outcome column."""

    model: Model
    outcome: str
    result: ChunkResult
    table: pd.DataFrame

    def format(self) -> str:
        """The results table for a terminal."""
        lines = [
            f"outcome {self.outcome}: {self.model.design.n_observations} observations, "
            f"{self.result.df_resid} residual df, residual SD {float(np.sqrt(self.result.residual_variance[0])):.6g}",
        ]
        frame = self.table.copy()
        for col in ("estimate", "se", "statistic", "z"):
            frame[col] = frame[col].map(lambda v: "n/a" if pd.isna(v) else f"{v:.6g}")
        frame["p"] = frame["p"].map(lambda v: f"{v:.4g}")
        lines.append(frame.to_string(index=False))
        lines.append(DISCLAIMER)
        return "\n".join(lines)


def results_table(model: Model, result: ChunkResult, voxel: int = 0) -> pd.DataFrame:
    """One row per hypothesis: test, estimate, se, statistic, df1, df2, p (for its tail), z of equal p."""
    records = []
    for h in model.hypotheses.values():
        r = result[h.name]
        t = h.test == "t"
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
        })
    return pd.DataFrame.from_records(
        records, columns=["hypothesis", "test", "tail", "estimate", "se", "statistic", "df1", "df2", "p", "z"]
    )


def _require_fittable(model: Model) -> None:
    model.raise_for_errors()
    if not model.hypotheses:
        raise ModelError(f"{model.spec.name}: the spec has no hypotheses to test; add a 'hypotheses' object")


def fit_table(spec: ModelSpec | Path | str, outcome: str) -> TableFit:
    """Fit every hypothesis of ``spec`` to the numeric table column ``outcome``.

    Rows with ``n/a`` in the outcome are left out and listed with the other exclusions.
    """
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    model = build(spec, numeric_columns=[outcome])
    _require_fittable(model)
    y = model.sample.data[outcome].to_numpy(dtype=float)[:, None]
    prepared = prepare(model.design.matrix, model.tests())
    result = fit_chunk(prepared, y)
    return TableFit(model, outcome, result, results_table(model, result))


def write_table_fit(fit: TableFit, out: Path | str, force: bool = False) -> Path:
    """Write results.tsv, results.json and the design files atomically."""
    folder = OutputFolder(out, force=force)
    with folder as o:
        fit.model.write_into(o)
        o.write_tsv("results.tsv", fit.table)
        o.write_json("results.json", _results_sidecar(fit))
    return Path(out)


def _results_sidecar(fit: TableFit) -> dict[str, Any]:
    return {
        "software": "groupmodel",
        "software_version": __version__,
        "note": DISCLAIMER,
        "outcome": fit.outcome,
        "n_observations": fit.model.design.n_observations,
        "df_resid": fit.result.df_resid,
        "residual_variance": float(fit.result.residual_variance[0]),
        "columns": {
            "estimate": "contrast estimate L b (t tests; n/a for F)",
            "se": "standard error of the estimate (t tests)",
            "statistic": "t or F",
            "df1": "numerator degrees of freedom (1 for t: t squared is F(1, df2))",
            "df2": "residual degrees of freedom",
            "p": "p value for the hypothesis's tail",
            "z": "z of equal p (signed like t; upper tail for F)",
        },
        "hypotheses": {n: {"statement": h.statement, "test": h.test, "tail": h.tail}
                       for n, h in fit.model.hypotheses.items()},
        "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
    }


__all__ = ["TableFit", "fit_table", "write_table_fit", "results_table", "InputError"]
