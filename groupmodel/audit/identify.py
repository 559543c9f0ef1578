"""The identification stage of ``groupmodel check``: what every column encodes, with the rows read in the right
order, and the :class:`~groupmodel.audit.cells.HandDesign` over the cells it finds.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..model.coding import make_coding
from ..model.design import Column, CovariateCoding
from .align import Alignment
from .cells import HandDesign, fill_cells
from .columns import ColumnRole, identify_column
from .context import Files, Request
from .order import row_order
from .read import AuditFinding
from .reorder import reorder_rows
from .table_view import PreparedTable, TableView
from .words import describe_roles, summarise_factors


@dataclass(frozen=True)
class Identification:
    """What every design column encodes, and the design row of every cell.

    Attributes
    ----------
    table : PreparedTable
        The table with only the factor and covariate columns the design uses.
    align : ndarray
        The table row of every design row, after any reordering the row check found (-1: none).
    view : TableView
        The table at the design rows (rows with doubtful coding marked not valid).
    roles : tuple of ColumnRole
    factors, covariates : tuple of str
        The table columns the design uses.
    means, sds : dict
        Covariate -> mean and SD over the design rows whose covariates are known.
    coding_texts : tuple of str
        The coding scheme of every factor with main-effect columns, in words.
    order_findings : tuple of AuditFinding
        Rows out of place or miscoded.
    hd : HandDesign
        The hand matrix over the valid rows, with the cell rows and slopes of the identification.
    cells : tuple of tuple of str
        The cells of ``factors`` (first slowest).
    follows_images : bool
        The rows are read in the order of the image list (design and images agree, the table differs).
    held : dict
        Unexplained column index -> the other numeric table column it holds, when covariates were named and
        it holds none of them (the covariate_mismatch warning and the contrast statements name it).
    """

    table: PreparedTable
    align: np.ndarray
    view: TableView
    roles: tuple[ColumnRole, ...]
    factors: tuple[str, ...]
    covariates: tuple[str, ...]
    means: dict[str, float]
    sds: dict[str, float]
    has_intercept: bool
    coding_texts: tuple[str, ...]
    order_findings: tuple[AuditFinding, ...]
    hd: HandDesign
    cells: tuple[tuple[str, ...], ...]
    follows_images: bool = False
    held: dict[int, str] = field(default_factory=dict)


def _roles(files: Files, view: TableView) -> list[ColumnRole]:
    x = files.x
    return [identify_column(j, files.labels[j], x.values[:, j], x.tolerance(j), view) for j in range(x.n_columns)]


def identify_columns(req: Request, files: Files, alignment: Alignment) -> Identification:
    """What each column encodes; the rows' order is checked on the way (it decides how to read them)."""
    assert alignment.claimed is not None
    table, align = alignment.table, alignment.claimed
    view = table.view(align, restrict_levels=True)
    roles = _roles(files, view)
    invalid = np.zeros(files.x.n_rows, dtype=bool)
    fixed = reorder_rows(req, files, table, align)
    if fixed is None:
        fixed = row_order(req, files, table, align, (view, roles))
    if fixed is not None:
        align, invalid = fixed.align, fixed.invalid
        view = table.view(align, invalid, restrict_levels=True)
        roles = _roles(files, view)
    used_f = [f for f in view.factors if any(f in r.factors or r.within == f for r in roles)]
    used_c = [c for c in view.covariates if any(r.covariate == c for r in roles)]
    if len(used_f) < len(view.factors) or len(used_c) < len(view.covariates):
        # Read again with only the columns the design uses, so an n/a in another column loses no row.
        table = table.restrict(used_f, used_c)
        view = table.view(align, invalid, restrict_levels=True)
        roles = _roles(files, view)
    has_intercept = has_intercept_of(roles)
    summary = summarise_factors(roles, view, has_intercept)
    means = {c: float(view.covariates[c][view.known].mean()) for c in used_c}
    sds = {c: float(view.covariates[c][view.known].std(ddof=1)) for c in used_c}
    describe_roles(roles, view, means, sds)
    held = _held_columns(req, files, view, align, roles)
    names = {r.index: f"{held[r.index]} ({r.label})" for r in roles if r.index in held}
    hd, cells = _hand_design(files, table, align, (view, roles, names), (used_f, used_c, means, sds))
    return Identification(table, align, view, tuple(roles), tuple(used_f), tuple(used_c), means, sds,
                          has_intercept, tuple(summary.values()),
                          fixed.findings if fixed is not None else (), hd, tuple(cells),
                          fixed is not None and fixed.follows_images, held)


def _held_columns(req: Request, files: Files, view: TableView, align: np.ndarray,
                  roles: list[ColumnRole]) -> dict[int, str]:
    """:attr:`Identification.held`: unexplained columns that hold another table column than the covariates
    named (:func:`~.pasted.table_column_of`), column index -> that table column."""
    from .pasted import mismatch_candidates, table_column_of

    candidates = mismatch_candidates(req, files, view)
    out = {}
    for r in roles:
        if r.kind == "unexplained" and candidates:
            other = table_column_of(files, view, align, r, candidates)
            if other is not None:
                out[r.index] = other
    return out


def _hand_design(files: Files, table: PreparedTable, align: np.ndarray,
                 found: tuple[TableView, list[ColumnRole], dict[int, str]],
                 used: tuple[list[str], list[str], dict[str, float], dict[str, float]]
                 ) -> tuple[HandDesign, list[tuple[str, ...]]]:
    """Cell rows and slopes -> a HandDesign over the valid rows.

    ``found`` is the view, the roles and the names of unexplained columns that hold another table column;
    ``used`` the factors and covariates the design uses, with the covariates' means and SDs.
    """
    view, roles, names = found
    factors, covariates, means, sds = used
    x = files.x
    pseudo = {r.index: names.get(r.index, r.label) for r in roles if r.kind == "unexplained"}
    cells, rows, slopes = fill_cells(roles, x.values, view, factors, covariates, pseudo)
    v = view.valid
    ids = table.ids
    obs = pd.DataFrame({"participant_id": [ids[t] for t in align[v]], "row": (align[v] + 1).tolist()})
    for f in factors:
        obs[f] = pd.Series([view.factors[f][c] for c in view.codes[f][v]], dtype=object)
    for c in covariates:
        obs[c] = view.covariates[c][v]
    codings = {f: make_coding(f, view.factors[f], "effect", None, view.scores[f]) for f in factors}
    covcodes: dict[str, CovariateCoding] = {}
    within = {r.covariate: r.within for r in roles if r.centre_kind == "within" and r.within in factors}
    for c in covariates:
        w = within.get(c)
        if w is not None:  # held at each level's own mean (see fill_cells)
            own = {lv: float(obs[c][obs[w] == lv].mean()) for lv in view.factors[w] if (obs[w] == lv).any()}
            covcodes[c] = CovariateCoding(c, "within", own, w, 1.0, means[c], sds[c])
        else:
            covcodes[c] = CovariateCoding(c, "mean", means[c], None, 1.0, means[c], sds[c])
    for j, name in pseudo.items():
        col = x.values[v, j]
        m = float(col.mean())
        covcodes[name] = CovariateCoding(name, "mean", m, None, 1.0, m, float(col.std(ddof=1)) if v.sum() > 1
                                         else 0.0)
    terms = tuple(sorted({r.factors for r in roles if r.factors}, key=len))
    hd = HandDesign(
        matrix=x.values[v],
        columns=tuple(Column(lab, (), ()) for lab in files.labels),
        terms=terms,
        term_columns={},
        factors=codings,
        covariates=covcodes,
        observations=obs,
        intercept=has_intercept_of(roles),
        audit_rows=rows,
        audit_slopes=slopes,
    )
    return hd, cells


def has_intercept_of(roles: list[ColumnRole]) -> bool:
    return any(r.kind in ("intercept", "constant") for r in roles)
