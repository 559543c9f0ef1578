"""The design row of every cell of a hand-written design, and the :class:`HandDesign` that states contrasts.

From the column identification (:mod:`groupmodel.audit.columns`) every cell gets its design row (covariates
held at their mean over the design rows) and every covariate its slope row, which is what
:mod:`groupmodel.model.hypotheses` needs to state contrasts over cell means.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from itertools import product

import numpy as np

from ..model.design import Design
from .columns import ColumnRole
from .table_view import TableView


@dataclass(frozen=True)
class HandDesign(Design):
    """A :class:`~groupmodel.design.Design` over a hand-written matrix.

    The cells are those of the factors the identification found; each cell's design row (covariates at their
    mean) and each covariate's slope rows come from :func:`fill_cells` instead of from codings, so
    :mod:`groupmodel.hypotheses` can state hand contrasts over cell means.
    """

    audit_rows: np.ndarray | None = field(default=None, repr=False, compare=False)
    audit_slopes: dict[str, np.ndarray] = field(default_factory=dict, repr=False, compare=False)

    def cell_rows(self, at: Mapping[str, float] | None = None) -> np.ndarray:
        if at:
            raise ValueError("a hand design holds covariates at their mean only")
        assert self.audit_rows is not None
        return self.audit_rows

    def cell_row(self, cell: tuple[str, ...], at: Mapping[str, float] | None = None) -> np.ndarray:
        return self.cell_rows(at)[self.cells.index(cell)]

    def cell_slope_row(self, cell: tuple[str, ...], covariate: str, at: Mapping[str, float] | None = None
                       ) -> np.ndarray:
        return self.audit_slopes[covariate][self.cells.index(cell)]


@dataclass(frozen=True)
class _Grid:
    """The cells of some factors (first slowest): level indices of every cell, and the view's levels."""

    factors: list[str]
    cell_index: list[tuple[int, ...]]
    view: TableView

    def sub_index(self, subset: tuple[str, ...], idx: tuple[int, ...]) -> tuple[int, ...]:
        return tuple(idx[self.factors.index(f)] for f in subset)


def fill_cells(roles: list[ColumnRole], x: np.ndarray, view: TableView, factors: list[str],
               covariates: list[str], pseudo: dict[int, str]) -> tuple[list[tuple[str, ...]], np.ndarray,
                                                                     dict[str, np.ndarray]]:
    """Every cell's design row (covariates at their mean) and every covariate's slope rows.

    Parameters
    ----------
    roles : list of ColumnRole
    x : ndarray, shape (n, p)
        The hand design.
    view : TableView
    factors : list of str
        The factors that span the cells (first slowest).
    covariates : list of str
        The table covariates the design uses.
    pseudo : dict
        Column index -> name, for unexplained columns treated as covariates of their own (held at their mean).

    Returns
    -------
    cells : list of tuple of str
    rows : ndarray, shape (n_cells, p)
        NaN where the identification does not give the value (a cell no row has, of a non-separable column).
    slopes : dict
        Covariate (or pseudo name) -> (n_cells, p).
    """
    levels = [view.factors[f] for f in factors]
    grid = _Grid(factors, list(product(*[range(len(lv)) for lv in levels])), view)
    cells = [tuple(lv[i] for lv, i in zip(levels, idx, strict=True)) for idx in grid.cell_index]
    k, p = len(cells), x.shape[1]
    rows = np.full((k, p), np.nan)
    slopes = {c: np.zeros((k, p)) for c in list(covariates) + list(pseudo.values())}
    means = {c: float(np.nanmean(view.covariates[c][view.known])) for c in covariates}
    for role in roles:
        j = role.index
        if role.kind in ("zero",):
            rows[:, j] = 0.0
        elif role.kind in ("intercept", "constant"):
            rows[:, j] = role.constant if role.constant is not None else 1.0
        elif role.kind in ("factor", "interaction", "cell_function"):
            for ci, idx in enumerate(grid.cell_index):
                rows[ci, j] = _factor_value(role, grid.sub_index(role.factors, idx), view)
        elif role.covariate is not None:
            _covariate_cells(role, grid, means[role.covariate], rows[:, j], slopes[role.covariate][:, j])
        else:  # unexplained: a covariate of its own, held at its mean
            rows[:, j] = float(np.mean(x[view.valid, j])) if view.valid.any() else np.nan
            slopes[pseudo[j]][:, j] = 1.0
    return cells, rows, slopes


def _covariate_cells(role: ColumnRole, grid: _Grid, mean: float, rows: np.ndarray, slopes: np.ndarray) -> None:
    """A covariate column's value in every cell (``rows``, covariate at ``mean``) and its slope (``slopes``)."""
    assert role.fit is not None
    s, a, alpha, beta = role.fit
    view = grid.view
    for ci, idx in enumerate(grid.cell_index):
        b = _factor_value(role, grid.sub_index(s, idx), view) if s else role.cov_scale
        sa = grid.sub_index(a, idx)
        ga = int(np.ravel_multi_index(sa, view.dims(a))) if a else 0
        if role.centre_kind == "mean" or (role.centre_kind == "within" and role.within in grid.factors):
            # Centred at its mean up to the rounding of the typed centre (or at each level's own mean when
            # centred within levels): hold the covariate at that centre, so the column is exactly 0 in every
            # cell as its author meant.
            rows[ci] = 0.0
            slopes[ci] = b
            continue
        if role.centre_kind in ("none", "value") and role.centre is not None:
            al = -b * role.centre
        elif ga in alpha:
            al = alpha[ga]
        else:
            al = np.nan
        rows[ci] = al + b * mean
        slopes[ci] = b


def _factor_value(role: ColumnRole, sub: tuple[int, ...], view: TableView) -> float:
    """The factor part of a column at one combination of its factors' levels (NaN if unknown)."""
    if role.separable and role.members:
        val = role.scale
        for f, i in zip(role.factors, sub, strict=True):
            val *= role.members[f].raw[i]
        return float(val)
    if role.table is None:
        return np.nan
    return float(role.table[sub])
