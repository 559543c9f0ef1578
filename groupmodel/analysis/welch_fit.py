"""Fits with variance groups (spec key ``variance_groups``): Welch's v and G in place of t and F.

The statistics are :mod:`groupmodel.engine.welch`'s (pure functions over chunks); this module builds them from a
model, lays out the table rows and maps, and says in the sidecars which statistic was used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..engine.effect_sizes import DEFAULT_CI_LEVEL, t_interval
from ..engine.ols import Prepared
from ..engine.participant_check import ParticipantCheck
from ..engine.welch import WelchChunk, WelchPrepared, fit_chunk_welch, prepare_welch
from ..model.assembly import Model
from ..model.variance_groups import VarianceGroups, variance_groups_of
from ..runtime.progress import progress_bar
from .chunk_fit import ChunkFit, fitted_parts

__all__ = ["STATISTICS", "WELCH_F_MAPS", "WELCH_T_MAPS", "WelchSetup", "welch_maps", "welch_record",
           "welch_results_table", "welch_setup"]

#: Maps of each kind of test with variance groups: ``v`` and ``G`` replace ``t`` and ``F``; ``df2`` is per voxel.
#: A t hypothesis keeps the interval of its effect (with the Welch se and df); the standardized effects (Cohen's d
#: over one residual SD, partial eta squared from a pooled F) are not defined with several variances.
WELCH_T_MAPS = ("effect", "se", "v", "df2", "z", "p", "mlog10p", "p_fdr", "p_bonferroni", "ci_lower", "ci_upper")
WELCH_F_MAPS = ("G", "df2", "z", "p", "mlog10p", "p_fdr", "p_bonferroni")
#: What the sidecars and results.json say of the statistics.
STATISTICS = {
    "v": "Aspin-Welch v: the effect over its standard error with a residual variance per variance group; "
         "referred to t with the Welch-Satterthwaite approximate df2",
    "G": "Welch's (1951) G, generalised to any contrast by Winkler et al. (2014, NeuroImage 92:381-397); "
         "referred to F(df1, df2) with Welch's approximate df2",
}


@dataclass(frozen=True, eq=False)
class WelchSetup:
    """A model's variance groups and the prepared design with them."""

    groups: VarianceGroups
    prepared: WelchPrepared


def welch_setup(model: Model, prepared: Prepared) -> WelchSetup | None:
    """The variance groups of a model prepared for the engine; None without ``variance_groups``."""
    groups = variance_groups_of(model.spec, model.design)
    if groups is None:
        return None
    return WelchSetup(groups, prepare_welch(prepared, groups.labels, groups.names))


def welch_record(setup: WelchSetup, group_variance: np.ndarray | None = None) -> dict[str, Any]:
    """What results.json and the map sidecars record of the variance groups and the statistics."""
    out: dict[str, Any] = {
        **setup.groups.as_dict(),
        "group_residual_df": {n: float(d) for n, d in zip(setup.groups.names, setup.prepared.resid_df, strict=True)},
        "statistic": {"t tests": "v", "F tests": "G"},
        "statistics": STATISTICS,
        "df2": "approximate (not an integer); per voxel in a voxelwise fit (the df2 map)",
    }
    if group_variance is not None:
        out["group_residual_variance"] = {n: float(v) for n, v in zip(setup.groups.names, group_variance, strict=True)}
    return out


def welch_results_table(model: Model, chunk: WelchChunk, columns: list[str], voxel: int = 0,
                        ci_level: float = DEFAULT_CI_LEVEL) -> pd.DataFrame:
    """The rows of results.tsv with v / G, their approximate df2 and p, and the ``ci_level`` interval of a t
    hypothesis's effect (the effect sizes stay n/a)."""
    records = []
    for h in model.hypotheses.values():
        r = chunk[h.name]
        t = h.test == "t"
        ci = t_interval(r.effect, r.se, r.df2, ci_level) if t else None
        records.append({
            "hypothesis": h.name,
            "test": h.test,
            "tail": h.tail,
            "estimate": float(r.effect[voxel]) if t else np.nan,
            "se": float(r.se[voxel]) if t and r.se is not None else np.nan,
            "statistic": float(r.statistic[voxel]),
            "df1": r.df1,
            "df2": float(r.df2[voxel]),
            "p": float(r.p[voxel]),
            "z": float(r.z[voxel]),
            "ci_lower": float(ci.lower[voxel]) if ci is not None else np.nan,
            "ci_upper": float(ci.upper[voxel]) if ci is not None else np.nan,
        })
    return pd.DataFrame.from_records(records, columns=columns)


def welch_maps(model: Model, setup: WelchSetup, data: Any, chunk_voxels: int, progress: bool,
               tally: Any, session: Any = None, ci_level: float = DEFAULT_CI_LEVEL, threads: int = 1
               ) -> tuple[dict[str, dict[str, np.ndarray]], np.ndarray, tuple[np.ndarray, ParticipantCheck]]:
    """The maps of every hypothesis (:data:`WELCH_T_MAPS`, :data:`WELCH_F_MAPS`; the corrected p maps allocated;
    intervals at ``ci_level``) and the pooled residual variance, chunk by chunk, here or on the cluster of
    ``session``; ``tally`` (:class:`~.unequal_variances.UnequalVarianceTally`) counts every chunk too.  Also the
    mean input image and the per-participant residual sums (of the OLS fit, whose estimates v and G share; added
    in chunk order), as a pooled fit gives them."""
    n_vox = data.n_in_mask
    maps = {h.name: {k: np.empty(n_vox) for k in (WELCH_T_MAPS if h.test == "t" else WELCH_F_MAPS)}
            for h in model.hypotheses.values()}
    resid_var = np.empty(n_vox)
    mean_input = np.empty(n_vox)
    design = model.design.matrix
    check = ParticipantCheck.empty(model.design.n_observations)
    sums: dict[int, tuple[np.ndarray, int]] = {}
    solve = np.linalg.pinv(design)  # the OLS (minimum-norm) estimates: the same fitted values for any solution
    bar = progress_bar(n_vox, "fitting", enabled=progress)
    work = ChunkFit(None, design, tally.counter(), welch=setup.prepared, solve=solve,
                    threads=threads if session is None else 1)
    try:
        for cols, part in fitted_parts(work, data, chunk_voxels, session):
            res = part.fit
            resid_var[cols] = res.residual_variance
            mean_input[cols] = part.mean
            sums[cols.start] = (part.sums, cols.stop - cols.start)
            for h in model.hypotheses.values():
                r, m = res[h.name], maps[h.name]
                if h.test == "t":
                    m["effect"][cols] = r.effect
                    m["se"][cols] = r.se
                    ci = t_interval(r.effect, r.se, r.df2, ci_level)
                    m["ci_lower"][cols], m["ci_upper"][cols] = ci.lower, ci.upper
                m[r.statistic_name][cols] = r.statistic
                for key in ("df2", "z", "p", "mlog10p"):
                    m[key][cols] = getattr(r, key)
            tally.add_counts(part.counts)
            bar.update(cols.stop - cols.start)
    finally:
        bar.close()
    for s in sorted(sums):  # in chunk order: the same sums, bit for bit, in whatever order the chunks came
        check.add_sums(*sums[s])
    return maps, resid_var, (mean_input, check)


def table_welch(model: Model, setup: WelchSetup, y: np.ndarray, columns: list[str],
                ci_level: float = DEFAULT_CI_LEVEL) -> tuple[pd.DataFrame, dict[str, Any]]:
    """results.tsv rows and the results.json record of a one-column fit with variance groups."""
    chunk = fit_chunk_welch(setup.prepared, y)
    return (welch_results_table(model, chunk, columns, ci_level=ci_level),
            welch_record(setup, chunk.group_variance[:, 0]))
