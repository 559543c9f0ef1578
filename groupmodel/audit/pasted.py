"""A covariate column holding another table column than its header, ``--covariates`` or the spec names.

Two ways it shows:

* the design has a header, and a column headed with the name of one table column holds the values of another
  (found when the covariates are read from the table);
* the covariates were named (``--covariates`` or the spec) and a column no named covariate explains equals
  another numeric column of the table.

Either way the design adjusts for another variable than its author meant: a warning naming both.
"""

from __future__ import annotations

import numpy as np

from ..model.table import MISSING
from .columns import ColumnRole, _covariate_fit
from .context import AuditContext, Files, Request
from .read import AuditFinding
from .table_view import TableView, _is_float

__all__ = ["mismatch_candidates", "pasted_covariate_findings", "table_column_of"]


def _warn(message: str) -> AuditFinding:
    return AuditFinding("warning", "covariate_mismatch", message, "columns")  # type: ignore[arg-type]


def pasted_covariate_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Warnings for covariate columns that hold another table column than the one they are named as."""
    if ctx.columns is None:
        return []
    return _header_mismatch(ctx) + _named_mismatch(ctx)


def _header_mismatch(ctx: AuditContext) -> list[AuditFinding]:
    """A column headed with one table column's name whose values are another table column's."""
    names = ctx.files.x.names
    ident = ctx.columns
    assert ident is not None
    if not names:
        return []
    table_columns = {str(c).lower(): str(c) for c in ctx.files.frame.columns if c != "participant_id"}
    tname = ctx.request.participants.name
    out = []
    for r in ident.roles:
        if not r.covariate or r.index >= len(names):
            continue
        header = names[r.index].strip()
        said = table_columns.get(header.lower())
        if said is None or said == r.covariate:
            continue
        out.append(_warn(
            f"{r.label}: headed {header}, but its values are {r.covariate} of {tname}, not {said} (the column "
            f"is {r.description}): the design adjusts for {r.covariate}; put the {said} values in the column, "
            "or correct the header if the design means it"))
    return out


def _named_mismatch(ctx: AuditContext) -> list[AuditFinding]:
    """With covariates named (--covariates or the spec): an unexplained column that is another table column."""
    req, ident = ctx.request, ctx.columns
    assert ident is not None
    named = list(req.covariates or (req.spec.model_covariates() if req.spec else []))
    if not named:
        return []
    where = "--covariates" if req.covariates else (req.spec_path.name if req.spec_path else "the spec")
    unused = [c for c in named if c not in ident.covariates]
    out = []
    for r in ident.roles:
        found = ident.held.get(r.index)
        if found is None:
            continue
        meant = " or ".join(unused) if unused else ", ".join(named)
        out.append(_warn(
            f"{r.label}: not a covariate named by {where} ({', '.join(named)}), but {found} of "
            f"{req.participants.name}: the design adjusts for {found}, not {meant}; put the {meant} values in "
            f"the column, or name {found} if the design means it"))
    return out


def mismatch_candidates(req: Request, files: Files, view: TableView) -> list[str]:
    """The table columns an unexplained column may hold instead of a named covariate (none when none named): not
    a named covariate, not a factor of the table as the design reads it (``view``)."""
    named = list(req.covariates or (req.spec.model_covariates() if req.spec else []))
    if not named:
        return []
    return [str(c) for c in files.frame.columns if c != "participant_id" and c not in named and c not in view.factors]


def table_column_of(files: Files, view: TableView, align: np.ndarray, role: ColumnRole,
                    candidates: list[str]) -> str | None:
    """The first numeric table column among ``candidates`` that the column of ``role`` is an exact covariate
    function of, with the table's rows as the design reads them (``align``); None if none."""
    frame = files.frame
    known = align >= 0
    safe = np.where(known, align, 0)
    x = files.x.values[:, role.index]
    tol = files.x.tolerance(role.index)
    for c in candidates:
        texts = frame[c].tolist()
        if not all(v in MISSING or _is_float(v) for v in texts):
            continue
        raw = np.array([float(v) if v not in MISSING else np.nan for v in texts])
        vals = np.where(known, raw[safe], np.nan)
        trial = TableView(view.factors, view.scores, view.codes, {c: vals}, view.valid & np.isfinite(vals),
                          view.known)
        if _covariate_fit(x, tol, trial, list(view.factors), c) is not None:
            return c
    return None
