"""Fitting hypotheses in their error strata (within-participant factors; see :mod:`groupmodel.model.strata`).

Each hypothesis's transformed data ``Z`` (participants x c x voxels: participant averages, within contrasts or
weighted sums) are fitted with the between-participant design ``X``; with ``B = X^+ Z`` and ``L`` the between
rows, ``D = L B`` (a x c per voxel):

* ``SSH = trace(D' [L X^+ X^+' L']^-1 D)``, ``df1 = a c``; ``SSE`` the residual sum of squares over all c
  columns, ``df2 = (n - rank X) c``; ``F = (SSH / df1) / (SSE / df2)``: the classical split-plot F with
  sphericity assumed (for c = 1 the ordinary OLS F or t on the transformed values);
* with c > 1, from ``S`` the c x c residual cross-products of the orthonormal contrasts: the Greenhouse-Geisser
  epsilon ``tr(S)^2 / (c tr(S^2))`` (Greenhouse and Geisser 1959), the Huynh-Feldt epsilon
  ``min(1, ((d + 1) c e - 2) / (c (d - c e)))`` with ``d = n - rank X`` (Huynh and Feldt 1976, with the
  Lecoutre 1991 correction of N to d + 1) and the GG-corrected p of F on ``(df1 e, df2 e)`` df.

Everything is per voxel and pure: the same function serves the table-level fit (one "voxel") and chunks of
images.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..engine.effect_sizes import DEFAULT_CI_LEVEL
from ..engine.linalg import matrix_rank
from ..engine.ols import ZERO_VARIANCE_FACTOR
from ..engine.tails import f_tests, t_tests
from ..model.assembly import Model
from ..model.strata import StratumTest
from ..outputs.provenance import RunClock
from ..outputs.strata_files import effect_size_notes
from ..text import DISCLAIMER
from .effect_maps import EFFECT_SIZE_STATS
from .strata_effects import strata_effect_sizes

#: Columns of results.tsv for a model with within-participant factors, in order (effect sizes last).
STRATA_RESULT_COLUMNS = ["hypothesis", "stratum", "test", "tail", "estimate", "se", "statistic", "df1", "df2",
                         "p", "z", "epsilon_gg", "epsilon_hf", "p_gg", "p_hf", "participants",
                         *EFFECT_SIZE_STATS]


@dataclass(frozen=True)
class StratumResult:
    """One hypothesis fitted in its stratum; arrays of shape (v,), NaN where not applicable."""

    estimate: np.ndarray
    se: np.ndarray
    statistic: np.ndarray
    p: np.ndarray
    z: np.ndarray
    df1: float
    df2: float
    epsilon_gg: np.ndarray
    epsilon_hf: np.ndarray
    p_gg: np.ndarray
    p_hf: np.ndarray
    participants: int
    log_p: np.ndarray
    residual_variance: np.ndarray


def fit_stratum(x: np.ndarray, test: StratumTest, z: np.ndarray,
                data_scale: np.ndarray | None = None) -> StratumResult:
    """Fit transformed data ``z`` (n, c, v) with the between design ``x`` (n, p) and test ``test``.

    A voxel whose residual variance is at or below ``(ZERO_VARIANCE_FACTOR n eps data_scale)^2`` is not tested
    (NaN statistic, as in :mod:`groupmodel.engine.ols`); ``data_scale`` is the largest |value| of the
    observations the transformed data were made from (default: of ``z``): a difference of two equal images
    is zero only up to their rounding."""
    n, c, v = z.shape
    pinv = np.linalg.pinv(x)
    df_e = n - matrix_rank(x)
    flat = z.reshape(n, c * v)
    coef = pinv @ flat
    resid = (flat - x @ coef).reshape(n, c, v)
    sse = np.einsum("ncv,ncv->v", resid, resid)
    # (numerically) zero residual variance: not tested (NaN statistic), by the rule of engine.ols
    scale = (np.abs(z).max(axis=(0, 1)) if n else np.zeros(v)) if data_scale is None else data_scale
    flat_var = sse / max(df_e * c, 1) <= (ZERO_VARIANCE_FACTOR * n * np.finfo(np.float64).eps * scale) ** 2
    lw = test.between_weights
    a = lw.shape[0]
    d = (lw @ coef).reshape(a, c, v)
    m = lw @ pinv @ pinv.T @ lw.T
    nan = np.full(v, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        if test.test == "t" and a * c == 1:
            sigma2 = sse / df_e
            est = d[0, 0]
            se = np.where(flat_var, 0.0, np.sqrt(m[0, 0] * sigma2))
            stat = np.where(flat_var, np.nan, est / se)
            p, log_p, zz = t_tests(stat, df_e, test.tail)  # type: ignore[arg-type]
            return StratumResult(est, se, stat, p, zz, 1.0, float(df_e), nan, nan, nan, nan, n, log_p, sigma2)
        ssh = np.einsum("acv,ab,bcv->v", d, np.linalg.inv(m), d)
        df1, df2 = float(a * c), float(df_e * c)
        stat = np.where(flat_var, np.nan, (ssh / df1) / (sse / df2))
        p, log_p, zz = f_tests(stat, df1, df2)
        if c == 1:
            return StratumResult(nan, nan, stat, p, zz, df1, df2, nan, nan, nan, nan, n, log_p, sse / df2)
        gg, hf = sphericity_epsilons(resid, df_e)
        p_gg, _, _ = f_tests(stat, df1 * gg, df2 * gg)
        p_hf, _, _ = f_tests(stat, df1 * hf, df2 * hf)
    return StratumResult(nan, nan, stat, p, zz, df1, df2, gg, hf, p_gg, p_hf, n, log_p, sse / df2)


def sphericity_epsilons(resid: np.ndarray, df_e: int) -> tuple[np.ndarray, np.ndarray]:
    """Greenhouse-Geisser and Huynh-Feldt epsilons from residuals of orthonormal contrasts (n, c, v)."""
    c = resid.shape[1]
    s = np.einsum("ncv,ndv->cdv", resid, resid)
    trace = np.einsum("ccv->v", s)
    with np.errstate(divide="ignore", invalid="ignore"):
        gg = trace**2 / (c * np.einsum("cdv,cdv->v", s, s))
        hf = np.minimum(1.0, ((df_e + 1) * c * gg - 2) / (c * (df_e - c * gg)))
    return gg, hf


def fit_strata_values(model: Model, values: np.ndarray) -> dict[str, StratumResult]:
    """Every hypothesis fitted in its stratum to values over the observations (n_obs, v)."""
    strata = model.strata
    assert strata is not None
    scale = np.abs(values).max(axis=0)
    return {name: fit_stratum(strata.design_of(name), t, strata.transformed(name, values), scale)
            for name, t in strata.tests.items()}


@dataclass
class StrataTableFit:
    """The table-level fit of a model with within-participant factors to one outcome column."""

    model: Model
    outcome: str
    results: dict[str, StratumResult]
    table: pd.DataFrame
    clock: RunClock = field(default_factory=RunClock.start)  # when the fit started (recorded with the results)
    cell_means: pd.DataFrame | None = None
    ci_level: float = DEFAULT_CI_LEVEL
    #: Unequal variances by group are not offered with within-participant factors (refused by the spec).
    variance_groups: dict[str, Any] | None = None

    def format(self) -> str:
        strata = self.model.strata
        assert strata is not None
        lines = [f"outcome {self.outcome}: {strata.n_observations} observations of "
                 f"{len(strata.participant_ids)} participants; each hypothesis in its error stratum"]
        frame = self.table.copy()
        for col in ("estimate", "se", "statistic", "z", "epsilon_gg", "epsilon_hf", "p_gg", "p_hf", "p",
                    *EFFECT_SIZE_STATS):
            frame[col] = frame[col].map(lambda v: "n/a" if pd.isna(v) else f"{v:.6g}")
        lines.append(frame.to_string(index=False))
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def strata_sidecar(self) -> dict[str, object]:
        """What results.json adds for the strata: each hypothesis's stratum and transformed data."""
        strata = self.model.strata
        assert strata is not None
        return {n: {**t.as_dict(strata), **effect_size_notes(t)} for n, t in strata.tests.items()}


def strata_table(model: Model, results: dict[str, StratumResult],
                 ci_level: float = DEFAULT_CI_LEVEL) -> pd.DataFrame:
    """One row per hypothesis in its stratum, with its effect sizes (n/a where not defined)."""
    strata = model.strata
    assert strata is not None
    records = []
    for name, r in results.items():
        t = strata.tests[name]
        sizes = strata_effect_sizes(model.hypotheses[name], t, r, ci_level, grid=False)
        records.append({
            "hypothesis": name, "stratum": t.stratum, "test": t.test, "tail": t.tail,
            "estimate": float(r.estimate[0]), "se": float(r.se[0]), "statistic": float(r.statistic[0]),
            "df1": r.df1, "df2": r.df2, "p": float(r.p[0]), "z": float(r.z[0]),
            "epsilon_gg": float(r.epsilon_gg[0]), "epsilon_hf": float(r.epsilon_hf[0]), "p_gg": float(r.p_gg[0]),
            "p_hf": float(r.p_hf[0]),
            "participants": r.participants,
            **{k: float(sizes[k][0]) if k in sizes else np.nan for k in EFFECT_SIZE_STATS},
        })
    return pd.DataFrame.from_records(records, columns=STRATA_RESULT_COLUMNS)


def fit_strata_table(model: Model, outcome: str, ci_level: float = DEFAULT_CI_LEVEL,
                     clock: RunClock | None = None) -> StrataTableFit:
    """Table-level fit of a built model with strata (``model`` built with ``numeric_columns=[outcome]``)."""
    from .strata_cells import strata_cell_means

    y = model.sample.data[outcome].to_numpy(dtype=float)[:, None]
    results = fit_strata_values(model, y)
    return StrataTableFit(model, outcome, results, strata_table(model, results, ci_level),
                          clock if clock is not None else RunClock.start(),
                          cell_means=strata_cell_means(model, y[:, 0]), ci_level=ci_level)

