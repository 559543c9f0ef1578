"""The voxelwise fit of a model with within-participant factors: every hypothesis in its error stratum.

Chunk by chunk of the images as loaded, each hypothesis's transformed data (participant averages, within
contrasts or weighted sums) are formed by :meth:`groupmodel.model.strata.Strata.transformed` (the observations
gathered by within cell, the within weights applied in one small product) and are fitted by
:func:`groupmodel.analysis.strata_fit.fit_stratum`, the same function as the table-level fit;
nothing transformed is kept beyond the chunk, and nothing is written to disk.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..engine.linalg import matrix_rank
from ..engine.tails import mlog10p
from ..model.assembly import Model
from ..model.hypotheses import Hypothesis
from ..model.strata import StratumTest
from ..runtime.progress import progress_bar
from .strata_effects import is_stratum_t, strata_effect_names, strata_effect_sizes
from .strata_fit import fit_stratum

#: Maps of a t test and of an F test in a stratum; F tests with more than one within df add SPHERICITY_MAPS.
STRATUM_T_MAPS = ("effect", "se", "t", "z", "p", "mlog10p")
STRATUM_F_MAPS = ("F", "z", "p", "mlog10p")
SPHERICITY_MAPS = ("epsilon_gg", "epsilon_hf", "p_gg", "p_hf")
#: Maps a hypothesis in a stratum may have beyond those of a hypothesis of the same test without strata
#: (for the memory plan).
STRATA_EXTRA_MAPS = len(SPHERICITY_MAPS)


def stratum_map_names(test: StratumTest, h: Hypothesis | None = None) -> tuple[str, ...]:
    """The maps of one hypothesis (before the corrected p maps are added); with ``h``, then its effect sizes
    and intervals in the stratum (:mod:`.strata_effects`)."""
    sizes = strata_effect_names(h, test) if h is not None else ()
    if is_stratum_t(test):
        return STRATUM_T_MAPS + sizes
    return STRATUM_F_MAPS + (SPHERICITY_MAPS if test.within_df > 1 else ()) + sizes


def strata_degrees(model: Model) -> dict[str, tuple[int, int]]:
    """Each hypothesis's (df1, df2) in its stratum."""
    strata = model.strata
    assert strata is not None
    out = {}
    for name, t in strata.tests.items():
        n, rank = len(t.entered), matrix_rank(strata.design_of(name))
        c, a = t.within_df, t.between_weights.shape[0]
        out[name] = (1, n - rank) if is_stratum_t(t) else (a * c, (n - rank) * c)
    return out


def _complete_cells(model: Model) -> tuple[np.ndarray, np.ndarray]:
    """The observations of each complete participant by within cell, (n_complete, k), and their between design
    (each participant's average over the within cells is the mean of its row's observations)."""
    strata = model.strata
    assert strata is not None
    complete = np.flatnonzero((strata.observation_index >= 0).all(axis=1))
    return strata.observation_index[complete], strata.between.matrix[complete]


def average_df(model: Model) -> int:
    """Residual df of the participant averages (the residual variance map of a model with strata)."""
    _, x = _complete_cells(model)
    return int(x.shape[0] - matrix_rank(x))


def strata_pass(model: Model, data: Any, chunk_voxels: int, progress: bool, ci_level: float,
                ) -> tuple[dict[str, dict[str, np.ndarray]], np.ndarray, np.ndarray]:
    """Every hypothesis's maps in its stratum (effect sizes and intervals at ``ci_level``), the residual
    variance of the participant averages (the between stratum) and the mean input image, chunk by chunk."""
    strata = model.strata
    assert strata is not None
    n_vox = data.n_in_mask
    tests = strata.tests
    hyps = model.hypotheses
    maps = {n: {k: np.empty(n_vox) for k in stratum_map_names(t, hyps[n])} for n, t in tests.items()}
    mean_input = np.empty(n_vox)
    designs = {n: strata.design_of(n) for n in tests}
    complete_cells, x_avg = _complete_cells(model)
    resid_var = np.empty(n_vox)
    df_avg = x_avg.shape[0] - matrix_rank(x_avg)
    bar = progress_bar(n_vox, "fitting", enabled=progress)
    try:
        for cols, y in data.chunks(chunk_voxels):
            scale = np.abs(y).max(axis=0)
            for name, t in tests.items():
                r = fit_stratum(designs[name], t, strata.transformed(name, y), scale)
                _fill(maps[name], cols, r)
                for k, values in strata_effect_sizes(hyps[name], t, r, ci_level).items():
                    maps[name][k][cols] = values
            mean_input[cols] = np.mean(y, axis=0, dtype=np.float64)
            avg = y[complete_cells].mean(axis=1)  # each complete participant's average over the within cells
            fitted = x_avg @ np.linalg.lstsq(x_avg, avg, rcond=None)[0]
            resid_var[cols] = ((avg - fitted) ** 2).sum(axis=0) / max(df_avg, 1)
            bar.update(cols.stop - cols.start)
    finally:
        bar.close()
    return maps, resid_var, mean_input


def _fill(m: dict[str, np.ndarray], cols: slice, r: Any) -> None:
    values = {"effect": r.estimate, "se": r.se, "t": r.statistic, "F": r.statistic, "z": r.z, "p": r.p,
              "mlog10p": mlog10p(r.log_p), "epsilon_gg": r.epsilon_gg, "epsilon_hf": r.epsilon_hf,
              "p_gg": r.p_gg, "p_hf": r.p_hf}
    for key, arr in m.items():
        if key in values:
            arr[cols] = values[key]
