"""The files of the error strata of a model with within-participant factors (see :mod:`groupmodel.model.strata`).

Per stratum ``s`` that some hypothesis is tested in:

* ``stratum-<s>_design.tsv``: the between-participant design applied there, one row per participant who enters
  at least one of its hypotheses;
* ``stratum-<s>_transforms.tsv``: per hypothesis and transformed column, the weights over the within-participant
  cells that turn each participant's observations into the data fitted there;
* ``stratum-<s>_contrasts.tsv``: per hypothesis row, the weights over the between-design columns.

``design.json`` holds the same under ``strata``: which hypothesis is tested in which stratum, on what data.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .folder import OutputFolder
from .numbers import tidy

if TYPE_CHECKING:
    from ..model.assembly import Model
    from ..model.strata import Strata, StratumTest


#: Why partial eta squared has no interval for an F test with more than one within df.
NO_SPHERICITY_INTERVAL = ("n/a: with more than one within-participant df the F follows the noncentral F on "
                          "(df1, df2) only under sphericity (see epsilon_gg), so its interval is not given")
#: What the residual SD of cohens_d is, by stratum.
COHENS_D_SD = {
    "within": "the SD of the participants' differences (pooled within the between cells): d_z",
    "between": "the residual SD of the participants' averages over the within cells",
    "mixed": "the residual SD of the participants' values in the within cell(s) it weighs",
}


def effect_size_notes(test: StratumTest) -> dict[str, str]:
    """What the sidecars and results.json say of a stratum's effect sizes: the SD of Cohen's d (t tests) and,
    for an F test with more than one within df, why partial eta squared has no interval."""
    out = {"cohens_d_sd": COHENS_D_SD[test.stratum]} if test.is_t else {}
    if test.within_df > 1:
        out["partial_eta_squared_interval"] = NO_SPHERICITY_INTERVAL
    return out


def strata_sidecar(strata: Strata) -> dict[str, Any]:
    """What design.json says about the strata."""
    return {
        "within_factors": list(strata.within_factors),
        "within_cells": [strata.cell_label(c) for c in strata.within_cells],
        "participants": len(strata.participant_ids),
        "model": "each participant's transformed observations are fitted with the between-participant design; "
                 "with several within contrasts they are stacked (the classical split-plot F, sphericity assumed)",
        "hypotheses": {n: t.as_dict(strata) for n, t in strata.tests.items() if not t.problems},
        "files": {s: [f"stratum-{s}_{kind}.tsv" for kind in ("design", "transforms", "contrasts")]
                  for s in _used(strata)},
    }


def _used(strata: Strata) -> list[str]:
    return [s for s in ("between", "within", "mixed")
            if any(t.stratum == s and not t.problems for t in strata.tests.values())]


def write_strata(model: Model, out: OutputFolder) -> list[str]:
    """The per-stratum design, transform and contrast files; returns their names."""
    strata = model.strata
    if strata is None:
        return []
    names = []
    b = strata.between
    for s in _used(strata):
        tests = [t for t in strata.tests.values() if t.stratum == s and not t.problems]
        rows = sorted(set(np.concatenate([t.entered for t in tests]).tolist()))
        design = pd.DataFrame(tidy(b.matrix[rows], axis=0), columns=b.column_names)
        design.insert(0, "participant_id", [strata.participant_ids[i] for i in rows])
        cells = [strata.cell_label(c) for c in strata.within_cells]
        transforms = pd.DataFrame.from_records(
            [{"hypothesis": t.name, "column": j + 1, **dict(zip(cells, tidy(t.within_weights.T, axis=1)[j],
                                                                 strict=True))}
             for t in tests for j in range(t.within_df)], columns=["hypothesis", "column", *cells])
        contrasts = pd.DataFrame.from_records(
            [{"hypothesis": t.name, "row": i + 1, **dict(zip(b.column_names, r, strict=True))}
             for t in tests for i, r in enumerate(tidy(t.between_weights, axis=1))],
            columns=["hypothesis", "row", *b.column_names])
        for kind, frame in (("design", design), ("transforms", transforms), ("contrasts", contrasts)):
            out.write_tsv(f"stratum-{s}_{kind}.tsv", frame)
            names.append(f"stratum-{s}_{kind}.tsv")
    return names
