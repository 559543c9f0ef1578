"""Rows of a hand-written design out of place or miscoded, against the participants' factor levels.

The factor columns of a correct design take one pattern per cell.  The pattern most rows of a cell share is
that cell's coding; a row with another cell's pattern is out of place, a row with no cell's pattern is
miscoded.  Part of ``groupmodel check`` (see :mod:`groupmodel.audit`).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from .columns import ColumnRole
from .context import Files, Request
from .read import AuditFinding, listing, num_text
from .table_view import PreparedTable, TableView


@dataclass(frozen=True)
class RowOrder:
    """A corrected alignment, the rows to leave out of the identification, and what was found."""

    align: np.ndarray
    invalid: np.ndarray
    findings: tuple[AuditFinding, ...]
    follows_images: bool = False


@dataclass(frozen=True)
class _Patterns:
    """The discrete (coding) columns, every row's pattern over them, and each cell's majority pattern."""

    discrete: list[int]
    tol: np.ndarray
    patterns: list[tuple[int, ...]]
    majority: dict[int, tuple[int, ...]]
    cell_key: np.ndarray
    names: list[str]
    view: TableView

    def cell_text(self, k: int) -> str:
        idx = np.unravel_index(k, self.view.dims(tuple(self.names)))
        return ", ".join(f"{f}={self.view.factors[f][i]}" for f, i in zip(self.names, idx, strict=True))


def row_order(req: Request, files: Files, table: PreparedTable, align: np.ndarray,
              found: tuple[TableView, list[ColumnRole]]) -> RowOrder | None:
    """Rows whose factor columns disagree with their participant's levels (out of place, or miscoded).

    ``found`` is the view of the table at ``align`` and the columns identified with it.  Returns a corrected
    alignment and the rows to leave out of the identification, or None when every row agrees.
    """
    view, roles = found
    if not (table.explicit_factors or req.spec is not None) or not view.factors:
        return None  # the factors are not known before the columns are read: no order to check against
    pat = _patterns(files, view, roles)
    if pat is None:
        return None
    valid, cell_key, patterns, majority = view.valid, pat.cell_key, pat.patterns, pat.majority
    misfit = [i for i in np.flatnonzero(valid) if int(cell_key[i]) in majority
              and patterns[i] != majority[int(cell_key[i])]]
    if not misfit:
        return None
    by_pattern: dict[tuple[int, ...], list[int]] = {}
    for k, p in majority.items():
        by_pattern.setdefault(p, []).append(k)
    decoded = {i: by_pattern.get(patterns[i]) for i in misfit}
    reorder = all(decoded[i] for i in misfit) and Counter(patterns[i] for i in misfit) == Counter(
        majority[int(cell_key[i])] for i in misfit)
    if reorder:
        return _reordered(req, files, table, align, (pat, misfit, decoded))
    return _miscoded(files, table, align, (pat, misfit, decoded))


def _patterns(files: Files, view: TableView, roles: list[ColumnRole]) -> _Patterns | None:
    x = files.x
    valid = view.valid
    names = list(view.factors)
    cell_key = view.key(tuple(names))
    # A coding takes at most one value per cell; columns with more values are covariates, left out here.
    n_cells = max(2, len(np.unique(cell_key[valid])))
    discrete = [r.index for r in roles if r.kind in ("unexplained", "factor", "interaction", "cell_function")
                and len(np.unique(np.round(x.values[valid, r.index], 9))) <= n_cells]
    # An unexplained column that agrees with the cells no better than its values shuffled over the rows is
    # not a coding with typos (a column of +/-0.5 unrelated to the factors): read as an unknown column.
    discrete = [j for j in discrete if roles[j].kind != "unexplained"
                or _follows_cells(np.round(x.values[valid, j] / (2 * x.tolerance(j))), cell_key[valid])]
    if not any(roles[j].kind == "unexplained" for j in discrete):
        return None
    tol = np.array([2 * x.tolerance(j) for j in discrete])
    patterns = [tuple(np.round(x.values[i, discrete] / tol).astype(int).tolist()) for i in range(x.n_rows)]
    majority: dict[int, tuple[int, ...]] = {}
    for k in np.unique(cell_key[valid]):
        rows = np.flatnonzero(valid & (cell_key == k))
        pat, count = Counter(patterns[i] for i in rows).most_common(1)[0]
        if count * 2 > len(rows):
            majority[int(k)] = pat
    return _Patterns(discrete, tol, patterns, majority, cell_key, names, view)


#: Shuffles of a column's values over the rows against which its agreement with the cells is judged, and the
#: fraction of shuffles allowed to agree as well (a seeded, deterministic permutation test at the 1% level).
SHUFFLES = 400
SHUFFLE_LEVEL = 0.01


def _misfits(values: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """Rows off their cell's most common value, for every row of ``values`` (shape (m, n)): shape (m,)."""
    _, vcode = np.unique(values, return_inverse=True)
    vcode = vcode.reshape(values.shape)
    _, ccode = np.unique(cells, return_inverse=True)
    n_v, n_c = int(vcode.max()) + 1, int(ccode.max()) + 1
    key = ccode[None, :] * n_v + vcode
    counts = np.zeros((values.shape[0], n_c * n_v), dtype=int)
    np.add.at(counts, (np.arange(values.shape[0])[:, None], key), 1)
    counts = counts.reshape(values.shape[0], n_c, n_v)
    return values.shape[1] - counts.max(axis=2).sum(axis=1)


def _follows_cells(values: np.ndarray, cells: np.ndarray) -> bool:
    """Does a column agree with the cells (each cell one value, but for a few rows) better than chance?"""
    observed = int(_misfits(values[None, :], cells)[0])
    if observed == 0:
        return True
    rng = np.random.default_rng(20261202)
    shuffled = np.array([rng.permutation(values) for _ in range(SHUFFLES)])
    return bool((_misfits(shuffled, cells) <= observed).mean() <= SHUFFLE_LEVEL)


def _reordered(req: Request, files: Files, table: PreparedTable, claimed: np.ndarray,
               misfits: tuple[_Patterns, list[int], dict[int, list[int] | None]]) -> RowOrder:
    """Every misfit row carries another misfit's coding: read the rows reordered, and say so."""
    pat, misfit, decoded = misfits
    ids = table.ids
    align = claimed.copy()
    assign = _reassign(files, table, claimed, pat, misfit)
    texts = []
    for i in misfit:
        texts.append(f"row {i + 1} ({ids[claimed[i]]}, {pat.cell_text(int(pat.cell_key[i]))}) is coded as "
                     f"{' or '.join(pat.cell_text(k) for k in decoded[i] or [])}")
    for i, t in assign.items():
        align[i] = t
    swaps = [(i, j) for i, j in combinations(misfit, 2) if assign.get(i) == claimed[j]
             and assign.get(j) == claimed[i]]
    swap_text = ""
    if swaps and len(swaps) * 2 == len(misfit):
        swap_text = " (" + "; ".join(f"rows {i + 1} and {j + 1} look swapped" for i, j in swaps) + ")"
    finding = AuditFinding(
        "error", "rows_out_of_place",
        f"{req.design.name}: the rows match the participants' factor levels only after "
        f"reordering{swap_text}: {listing(texts, '; ')}; put the rows in {req.participants.name} order "
        "or add a participant_id column (the rest of this report reads them reordered)", "rows")
    return RowOrder(align, np.zeros(files.x.n_rows, dtype=bool), (finding,))


def _miscoded(files: Files, table: PreparedTable, claimed: np.ndarray,
              misfits: tuple[_Patterns, list[int], dict[int, list[int] | None]]) -> RowOrder:
    """Rows whose coding is another cell's (but not in a reordering) or no cell's: each an error, left out."""
    pat, misfit, decoded = misfits
    x, ids = files.x, table.ids
    invalid = np.zeros(x.n_rows, dtype=bool)
    found = []
    for i in misfit:
        t = claimed[i]
        expect = pat.majority[int(pat.cell_key[i])]
        if decoded[i]:
            what = f"is coded as {' or '.join(pat.cell_text(k) for k in decoded[i] or [])}"
        else:
            diffs = [f"{files.labels[j]} is {num_text(x.values[i, j])} where the other rows of that cell have "
                     f"{num_text(expect[d] * pat.tol[d])}"
                     for d, j in enumerate(pat.discrete) if pat.patterns[i][d] != expect[d]]
            what = "matches no cell's coding: " + "; ".join(diffs)
        found.append(AuditFinding(
            "error", "row_coding",
            f"{x.where(i)} is {ids[t]} ({pat.cell_text(int(pat.cell_key[i]))}) but {what}; fix the row "
            "(the rest of this report leaves it out when reading the columns)", "rows"))
        invalid[i] = True
    return RowOrder(claimed.copy(), invalid, tuple(found))


def _reassign(files: Files, table: PreparedTable, claimed: np.ndarray, pat: _Patterns, misfit: list[int]
              ) -> dict[int, int]:
    """Match out-of-place rows to the participants of those places: same coding, nearest covariate columns."""
    from scipy.optimize import linear_sum_assignment

    x, view = files.x, pat.view
    slots = [claimed[i] for i in misfit]
    expected = [pat.majority[int(pat.cell_key[i])] for i in misfit]
    cost = np.array([[0.0 if pat.patterns[i] == expected[b] else 1e6 for b in range(len(misfit))]
                     for i in misfit])
    others = [j for j in range(x.n_columns) if j not in pat.discrete]
    covs = list(view.covariates)
    if others and covs:
        fit_rows = np.array([i for i in np.flatnonzero(view.valid) if i not in set(misfit)])
        basis_full = np.column_stack([np.ones(len(table.frame))] + [table.covariates[c] for c in covs])
        basis = basis_full[claimed[fit_rows]]
        ok = np.isfinite(basis).all(axis=1)
        if ok.sum() > basis.shape[1]:
            coef, *_ = np.linalg.lstsq(basis[ok], x.values[fit_rows[ok]][:, others], rcond=None)
            pred = np.nan_to_num(basis_full[slots] @ coef)
            sd = x.values[:, others].std(axis=0) + 1e-12
            for a, i in enumerate(misfit):
                cost[a] += (((x.values[i, others] - pred) / sd) ** 2).sum(axis=1)
    r, c = linear_sum_assignment(cost)
    return {misfit[a]: int(slots[b]) for a, b in zip(r, c, strict=True)}
