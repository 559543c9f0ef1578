"""Contrasts of a hand-written design: estimability, what they test over cell means, and the classic mistakes.

Part of ``groupmodel check`` (see :mod:`groupmodel.audit`).  Statements reuse :mod:`groupmodel.model.hypotheses`
through :class:`~groupmodel.audit.cells.HandDesign`, a :class:`~groupmodel.model.design.Design` whose cell rows
come from the column identification of :mod:`groupmodel.audit.columns`.  The mistakes themselves are in
:mod:`groupmodel.audit.mistakes`.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import combinations
from typing import Any

import numpy as np

from ..engine.linalg import ESTIMABILITY_TOL, RowSpace, dependent_columns, independent_rows
from ..errors import GroupModelError
from ..model.coding import degree_name
from ..model.design import CovariateCoding
from ..model.hypotheses import build_hypothesis
from ..model.statements import describe_cell_weights
from .cells import HandDesign
from .context import AuditContext
from .read import AuditFinding, num_text, row_text

#: An uncentred covariate only matters (a warning; contrasts held at 0) when its mean is this many SDs from 0.
UNCENTRED_MEAN_SD = 0.1


@dataclass(frozen=True)
class ContrastReport:
    """One hand contrast: the rows of the contrast file that share a name (an F test when more than one)."""

    name: str
    file_rows: list[int]
    weights: np.ndarray
    estimable: bool | None = None
    statement: str | None = None
    cell_weights: np.ndarray | None = None
    slope_of: str | None = None
    spec_matches: list[str] = field(default_factory=list)
    tol: float = 1e-12  # rounding of the typed weights (see MatrixFile.entry_tolerance)
    findings: tuple[AuditFinding, ...] = field(default=(), repr=False, compare=False)

    @property
    def test(self) -> str:
        return "t" if self.weights.shape[0] == 1 else "F"

    @property
    def title(self) -> str:
        q = self.weights.shape[0]
        return f"contrast {self.name} [{self.test}{f', {q} rows' if q > 1 else ''}]"

    def as_dict(self, cells: Sequence[Mapping[str, str]] | None) -> dict[str, Any]:
        out: dict[str, Any] = {
            "name": self.name,
            "test": self.test,
            "file_rows": [r + 1 for r in self.file_rows],
            "weights": self.weights.tolist(),
            "estimable": self.estimable,
            "statement": self.statement,
        }
        if self.cell_weights is not None and cells is not None:
            # The same layout as contrasts.json of groupmodel build: weights over cell means, or over cell slopes.
            key = "slope_weights_over_cells" if self.slope_of else "weights_over_cells"
            out[key] = [{"cell": dict(c), "weight": self.cell_weights[:, i].tolist()}
                        for i, c in enumerate(cells) if np.any(np.abs(self.cell_weights[:, i]) > 1e-12)]
            if self.slope_of:
                out["slope_of"] = self.slope_of
        out["spec_matches"] = self.spec_matches
        return out


@dataclass(frozen=True)
class ContrastSet:
    """The hand contrasts, and the findings on the contrast file as a whole (before any single contrast)."""

    findings: tuple[AuditFinding, ...]
    reports: tuple[ContrastReport, ...]


@dataclass(frozen=True)
class Interpretation:
    """A contrast over cells: weights W (q, n_cells) with W @ basis = L, the slope covariate (None: means),
    how the other covariates are held, and the basis (cell rows or slope rows)."""

    w: np.ndarray
    slope_of: str | None
    hold: dict[str, str]
    basis: np.ndarray


def _finding(severity: str, code: str, message: str) -> AuditFinding:
    return AuditFinding(severity, code, message, "contrasts")  # type: ignore[arg-type]


def _hand(ctx: AuditContext) -> HandDesign | None:
    return ctx.columns.hd if ctx.columns is not None else None


def assess_contrasts(ctx: AuditContext) -> ContrastSet:
    """Every hand contrast: estimable or not, its F rows independent or not, and what it tests."""
    c = ctx.files.c
    if c is None:
        return ContrastSet((), ())
    values, found = _contrast_matrix(ctx)
    if values is None:
        return ContrastSet(found, ())
    groups: dict[str, list[int]] = {}
    for i in range(c.n_rows):
        name = c.labels[i] if c.labels and c.labels[i] else f"row {i + 1}"
        groups.setdefault(name, []).append(i)
    space = RowSpace.of(ctx.files.x.values)
    canonical = _canonical(ctx)
    reports = tuple(_one_contrast(ctx, ContrastReport(name, rows, values[rows], tol=c.entry_tolerance(rows)),
                                  space, canonical) for name, rows in groups.items())
    return ContrastSet(found, reports)


def _contrast_matrix(ctx: AuditContext) -> tuple[np.ndarray | None, tuple[AuditFinding, ...]]:
    """Contrast rows over the design columns (reordered by header names when both files have them)."""
    c, x = ctx.files.c, ctx.files.x
    assert c is not None
    p = x.n_columns
    if c.ragged:
        return None, (_finding("note", "stopped", "contrasts not checked until their rows have equal length"),)
    values = c.values
    if c.names and x.names:
        unknown = [nm for nm in c.names if nm not in x.names]
        absent = [nm for nm in x.names if nm not in c.names]
        if unknown or absent:
            parts = []
            if unknown:
                parts.append(f"columns {unknown} are not design columns")
            if absent:
                parts.append(f"design columns {absent} have no weights")
            return None, (_finding("error", "contrast_columns",
                                   f"{c.path.name} header: {'; '.join(parts)}; name one column per design column "
                                   f"({x.names})"),)
        values = values[:, [c.names.index(nm) for nm in x.names]]
    elif c.n_columns != p:
        return None, (_finding("error", "contrast_columns",
                               f"{c.path.name}: expected {p} weights per row (one per design column), found "
                               f"{c.n_columns} in every row (line {c.lines[0]} onward); give one weight per design "
                               "column"),)
    if not np.isfinite(values).all():
        return None, (_finding("note", "stopped", "contrasts not checked until every weight is a finite number"),)
    return values, ()


def where_rows(ctx: AuditContext, con: ContrastReport) -> str:
    assert ctx.files.c is not None
    lines = [str(ctx.files.c.lines[i]) for i in con.file_rows]
    return f"{ctx.files.c.path.name} line{'s' * (len(lines) > 1)} {', '.join(lines)}"


def _one_contrast(ctx: AuditContext, con: ContrastReport, space: RowSpace, canonical: dict[str, Any]
                  ) -> ContrastReport:
    L = con.weights
    title = con.title
    zero = [k for k in range(L.shape[0]) if np.abs(L[k]).max() <= con.tol]
    if zero:
        return dataclasses.replace(con, estimable=False, findings=(_finding(
            "error", "zero_contrast",
            f"{title} ({where_rows(ctx, con)}): row {', '.join(str(k + 1) for k in zero)} is all zero; "
            "give the weights or remove the row"),))
    found: list[AuditFinding] = []
    norms = np.linalg.norm(L, axis=1)
    slack = np.maximum(ESTIMABILITY_TOL, 2 * con.tol * math.sqrt(L.shape[1]) / norms)
    ok = space.residual(L) <= slack
    con = dataclasses.replace(con, estimable=bool(ok.all()))
    if not ok.all():
        bad = ", ".join(str(k + 1) for k in np.flatnonzero(~ok))
        deps = dependents_in_words(ctx.files.x.values, [ctx.brief(j) for j in range(L.shape[1])],
                                   ctx.files.x.tolerances())
        found.append(_finding(
            "error", "not_estimable",
            f"{title} ({where_rows(ctx, con)}) is not estimable: row {bad} is not in the row space of "
            f"the design, so its value depends on what the data cannot separate ({'; '.join(deps)}); "
            "change the weights to a combination of design rows, or fix the design"))
    if L.shape[0] > 1:
        found.extend(_dependent_rows(ctx, con))
    if _hand(ctx) is None or not con.estimable:
        return dataclasses.replace(con, findings=tuple(found))
    return _state(ctx, con, canonical, found)


def _dependent_rows(ctx: AuditContext, con: ContrastReport) -> list[AuditFinding]:
    """The rows of an F contrast that are combinations of its other rows, in words."""
    L = con.weights
    keep = independent_rows(L)
    if len(keep) == L.shape[0]:
        return []
    drop = [k for k in range(L.shape[0]) if k not in keep]
    texts = []
    for k in drop:
        coef, *_ = np.linalg.lstsq(L[keep].T, L[k], rcond=None)
        terms = []
        for b, a in enumerate(coef):
            if abs(a) > 1e-9:
                times = num_text(abs(a)) + " x " if abs(abs(a) - 1) > 1e-9 else ""
                terms.append(f"{'-' if a < 0 else '+'} {times}row {keep[b] + 1}")
        combo = " ".join(terms)
        texts.append(f"row {k + 1} = {combo.lstrip('+ ')}")
    return [_finding("error", "dependent_rows",
                     f"{con.title} ({where_rows(ctx, con)}) has {L.shape[0]} rows but only {len(keep)} are "
                     f"independent ({'; '.join(texts)}): the F test has {len(keep)} numerator degrees of "
                     f"freedom, not {L.shape[0]}; drop the dependent row{'s' * (len(drop) > 1)}")]


# ----- statements ----------------------------------------------------------------------------
def _bases(ctx: AuditContext) -> list[tuple[str | None, dict[str, str], np.ndarray]]:
    """(slope_of, hold description, basis over cells) in the order they are tried."""
    hd = _hand(ctx)
    assert hd is not None and hd.audit_rows is not None and ctx.columns is not None
    rows = hd.audit_rows
    real = list(ctx.columns.covariates)
    out: list[tuple[str | None, dict[str, str], np.ndarray]] = []
    hold_mean = {c: _hold_text(c, cv) for c, cv in hd.covariates.items()}
    out.append((None, hold_mean, rows))
    for c in hd.covariates:
        out.append((c, {k: v for k, v in hold_mean.items() if k != c}, hd.audit_slopes[c]))
    for k in range(1, len(real) + 1):
        for zs in combinations(real, k):
            if any(abs(hd.covariates[c].mean) <= UNCENTRED_MEAN_SD * hd.covariates[c].sd or hd.covariates[c].within
                   for c in zs):
                continue
            shifted = rows - sum(hd.audit_slopes[c] * hd.covariates[c].mean for c in zs)
            hold = dict(hold_mean)
            for c in zs:
                hold[c] = f"{c} at 0 (not at its mean {num_text(hd.covariates[c].mean)})"
            out.append((None, hold, shifted))
    return out


def _hold_text(name: str, cov: CovariateCoding) -> str:
    """Where a hand design holds a covariate when it states cell means: at its mean, or at each level's own."""
    if cov.within and isinstance(cov.center, dict):
        own = ", ".join(f"{num_text(m)} at {lv}" for lv, m in cov.center.items())
        return f"{name} at each {cov.within} level's own mean ({own}), so not adjusted for {name}"
    return f"{name} at its mean {num_text(cov.mean)}"


def _interpret(ctx: AuditContext, L: np.ndarray, tol: float) -> Interpretation | None:
    """Cell weights W (q, n_cells) with W @ basis = L, the slope covariate, the holds and the basis."""
    atol = max(1e-8 * max(1.0, float(np.abs(L).max())), 2 * tol)
    for slope_of, hold, basis in _bases(ctx):
        ok = np.isfinite(basis).all(axis=1)
        if not ok.any():
            continue
        b = basis[ok]
        w_ok = L @ np.linalg.pinv(b)
        if np.allclose(w_ok @ b, L, atol=atol, rtol=0):
            w = np.zeros((L.shape[0], basis.shape[0]))
            w[:, ok] = w_ok
            # When the cells have fewer columns than cells (no interaction), the weights are not unique and
            # the smallest ones spread a single cell's mean over several cells: say "that cell" instead (only
            # when one cell alone has that row; equal rows, as slopes without interaction, stay averaged).
            for k in range(L.shape[0]):
                same = np.flatnonzero(ok & (np.abs(np.where(ok[:, None], basis, np.inf) - L[k]).max(axis=1)
                                            <= atol))
                if same.size == 1:
                    w[k] = 0.0
                    w[k, same[0]] = 1.0
            w[np.abs(w) < 1e-12 * max(1.0, float(np.abs(w).max()))] = 0.0
            return Interpretation(w, slope_of, hold, np.where(ok[:, None], basis, 0.0))
    return None


def _canonical(ctx: AuditContext) -> dict[str, Any]:
    """Main effects and interactions of the hand design, built as groupmodel builds them."""
    hd = _hand(ctx)
    out: dict[str, Any] = {}
    if hd is None or hd.audit_rows is None or not np.isfinite(hd.audit_rows).all():
        return out
    space = RowSpace.of(hd.matrix)
    bodies: dict[str, dict[str, Any]] = {f"the main effect of {f}": {"main": f} for f in hd.factors}
    for r in ctx.roles:
        fs = [f for f in hd.factors if f in r.factors]
        if len(fs) >= 2:
            bodies[f"the {' x '.join(fs)} interaction"] = {"interaction": fs}
    for name, body in bodies.items():
        try:
            out[name] = build_hypothesis(hd, name, body, space)
        except GroupModelError:
            continue
    return out


def _state(ctx: AuditContext, con: ContrastReport, canonical: dict[str, Any], found: list[AuditFinding]
           ) -> ContrastReport:
    """What an estimable contrast tests over cell means (or slopes), then the classic mistakes."""
    from .mistakes import mistakes

    hd = _hand(ctx)
    assert hd is not None
    L = con.weights
    got = _interpret(ctx, L, con.tol)
    if got is None:
        statement = ("not a combination of cell means or of one covariate's slopes: it mixes means and "
                     "slopes, or weights columns no cell's row reaches")
        found.append(_finding("note", "contrast_tests", f"{con.title}: {statement}"))
        return dataclasses.replace(con, statement=statement, findings=tuple(found))
    holds = "; " + ", ".join(got.hold.values()) if got.hold else ""
    texts = [describe_cell_weights(hd, wr, got.slope_of) for wr in got.w]
    statement = "; and ".join(texts) + holds
    partial: list[AuditFinding] = []
    if con.test == "F":
        for name, h in canonical.items():
            if h.estimable and same_rows(L, h.weights, 1e-6 + 4 * con.tol):
                statement = f"{name}: {h.statement}"
                break
        else:
            partial = _part_of_effect(ctx, con, canonical)
    elif L.shape[0] == 1:
        statement = _trend_statement(ctx, con) or statement
    found.append(_finding("note", "contrast_tests", f"{con.title} tests: {statement}"))
    found.extend(partial)
    found.extend(mistakes(ctx, con, got))
    return dataclasses.replace(con, statement=statement, cell_weights=got.w, slope_of=got.slope_of,
                               findings=tuple(found))


def _trend_statement(ctx: AuditContext, con: ContrastReport) -> str | None:
    """A t contrast that is a polynomial trend of a factor the design codes with polynomials (up to rounding)."""
    hd = _hand(ctx)
    assert hd is not None and ctx.columns is not None
    x = ctx.files.x
    # Typed codes rounded (0.67 for 0.6708) move the contrast by up to the typing tolerance of the columns.
    tol = 1e-6 + 4 * con.tol + 4 * max(x.tolerance(j) for j in range(x.n_columns))
    degrees = {(m.factor, m.degree) for r in ctx.roles for m in r.members.values()
               if m.kind == "polynomial" and len(r.factors) == 1 and m.degree}
    space = RowSpace.of(hd.matrix)
    for f, d in sorted(degrees, key=lambda t: (t[0], t[1])):
        try:
            h = build_hypothesis(hd, f"trend of {f}", {"trend": f, "degree": d}, space)
        except GroupModelError:
            continue
        if h.estimable and same_rows(con.weights, h.weights, tol):
            exact = same_rows(con.weights, h.weights, 1e-6 + 4 * con.tol)
            rounded = "" if exact else " (up to the rounding of the typed codes)"
            return f"the {degree_name(d)} trend of {f}{rounded}: {h.statement}"
    return None


def _part_of_effect(ctx: AuditContext, con: ContrastReport, canonical: dict[str, Any]) -> list[AuditFinding]:
    """An F test whose rows span only part of a main effect or interaction: which part is missing."""
    hd = _hand(ctx)
    assert hd is not None
    L = con.weights
    rank = len(independent_rows(L))
    for name, h in canonical.items():
        H = np.atleast_2d(h.weights)
        full = len(independent_rows(H))
        if not h.estimable or rank >= full or not (RowSpace.of(H).residual(L) <= 1e-6 + 4 * con.tol).all():
            continue
        missing: list[np.ndarray] = []
        for row in H:  # the effect's own rows that the contrast's rows do not reach
            trial = np.vstack([L, *missing, row])
            if len(independent_rows(trial)) > rank + len(missing):
                missing.append(row)
        got = _interpret(ctx, np.array(missing), con.tol)
        words = [describe_cell_weights(hd, w, None) for w in got.w] if got is not None else []
        rows = "; ".join(row_text(r) for r in missing)
        return [_finding("warning", "partial_effect",
                         f"{con.title} ({where_rows(ctx, con)}) tests only part of {name}: {rank} of its {full} "
                         f"degrees of freedom (F with {rank} numerator degrees of freedom, not {full}); missing"
                         + (f": {'; and '.join(words)}" if words else "") + f"; to test {name} add the "
                         f"row{'s' * (len(missing) > 1)} {rows}")]
    return []


def dependents_in_words(x: np.ndarray, names: list[str], entry_tol: np.ndarray | None = None) -> list[str]:
    """:func:`groupmodel.checks.dependent_columns` for labels that already say 'column'; ``entry_tol`` (the
    rounding of the typed entries, per column) drops and shortens coefficients that are rounding noise."""
    return [d.replace("column column ", "column ") for d in dependent_columns(x, names, entry_tol)]


def same_rows(a: np.ndarray, b: np.ndarray, tol: float) -> bool:
    """Do the rows of ``a`` and ``b`` span the same space (relative residuals at most ``tol``)?"""
    a, b = np.atleast_2d(a), np.atleast_2d(b)
    if a.shape[1] != b.shape[1]:
        return False
    ra, rb = RowSpace.of(a), RowSpace.of(b)
    if ra.rank != rb.rank:
        return False
    return bool((ra.residual(b) <= tol).all() and (rb.residual(a) <= tol).all())
