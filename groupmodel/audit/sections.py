"""The sections of the ``groupmodel check`` report, each a function of the finished :class:`AuditContext`
returning its findings in report order.
"""

from __future__ import annotations

import math
from itertools import combinations

import numpy as np

from ..engine.linalg import condition_number, has_constant_column, matrix_rank, variance_inflation, vif_text
from ..model.checks import CONDITION_WARN, VIF_WARN
from .context import AuditContext, file_findings
from .contrasts import UNCENTRED_MEAN_SD, ContrastReport, dependents_in_words
from .read import AuditFinding, listing, num_text
from .rows import row_and_image_findings

__all__ = ["SMD_WARN", "column_findings", "contrast_findings", "covariate_findings", "rank_findings",
           "row_and_image_findings", "shape_findings", "spec_findings"]

#: Standardized mean difference (Cohen's d, pooled SD) of a covariate between two levels of a factor above
#: which the covariate is reported as confounded with the factor: Cohen's "large" effect (common practice).
SMD_WARN = 0.8


def _at(section: str, severity: str, code: str, message: str) -> AuditFinding:
    return AuditFinding(severity, code, message, section)  # type: ignore[arg-type]


def shape_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Entries of the design and contrast files that are not finite numbers, rows of unequal length."""
    out = file_findings(ctx.files)
    if not ctx.files.x.complete:
        out.append(_at("files", "note", "stopped",
                       "the other checks need every design entry to be a finite number; fix the entries above first"))
    return out


def rank_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Rank with the dependent columns in words; condition number and variance inflation."""
    x = ctx.files.x.values
    n, p = x.shape
    names = [ctx.brief(j) for j in range(p)]
    rank = matrix_rank(x)
    out = []
    if p > n:
        out.append(_at("rank", "warning", "too_many_columns",
                       f"the design has {p} columns but only {n} rows: it cannot be full rank"))
    if rank < p:
        deps = dependents_in_words(x, names, ctx.files.x.tolerances())
        out.append(_at("rank", "warning", "rank_deficient",
                       f"the design has rank {rank} with {p} columns: " + "; ".join(deps)
                       + " (an empty cell, a level coded twice, or an indicator of every level beside an intercept); "
                       "it can be fitted with a generalised "
                       f"inverse (n - rank = {n - rank} residual degrees of freedom): the contrasts the rows determine "
                       "are estimable, any other is an error below"))
    if n - rank < 1:
        out.append(_at("rank", "error", "no_error_df",
                       f"the design leaves no residual degrees of freedom (n = {n}, rank = {rank}); "
                       "remove columns or add participants"))
    if rank < p or n - rank < 1:
        return out
    cond = condition_number(x)
    out.append(_at("rank", "note", "rank",
                   f"full column rank ({p}); {n - p} residual degrees of freedom; condition number {cond:.3g} "
                   f"(columns scaled to unit length)"))
    if cond > CONDITION_WARN:
        out.append(_at("rank", "warning", "ill_conditioned",
                       f"condition number {cond:.3g} (columns scaled to unit length) is above {CONDITION_WARN:g}: "
                       "estimates are sensitive to small changes in the data; centre covariates or drop a "
                       "nearly redundant column"))
    # VIF regresses each column on the others plus a constant; without a constant column (a cell-means
    # design) the indicators sum to that constant and the figure means nothing, so it is skipped.
    constant = has_constant_column(x)
    for col, v in (variance_inflation(x, names) if constant else {}).items():
        if v > VIF_WARN:
            out.append(_at("rank", "warning", "high_vif",
                           f"{col} has variance inflation factor {vif_text(v)} (above {VIF_WARN:g}): it is nearly a "
                           "combination of the other columns; centre the covariates it involves, or drop one of "
                           "the near-duplicates"))
    return out


def column_findings(ctx: AuditContext) -> list[AuditFinding]:
    """What each column encodes: factors and covariates used (or not), the codings, each column, empty cells."""
    if ctx.columns is None:
        return []
    return _usage_notes(ctx) + _column_notes(ctx) + _empty_cells(ctx) + _no_intercept(ctx)


def _no_intercept(ctx: AuditContext) -> list[AuditFinding]:
    """Sum-to-zero factor columns in a design whose column space does not hold the constant (no intercept)."""
    ident = ctx.columns
    assert ident is not None
    coded = [r for r in ident.roles if r.kind == "factor" and r.members
             and all(m.kind in ("effect", "polynomial") for m in r.members.values())]
    if not coded:
        return []
    x = ctx.files.x.values
    ones = np.ones(x.shape[0])
    fit, *_ = np.linalg.lstsq(x, ones, rcond=None)
    if np.linalg.norm(x @ fit - ones) <= 1e-8 * math.sqrt(x.shape[0]):
        return []
    factors = list(dict.fromkeys(f for r in coded for f in r.factors))
    cols = ", ".join(r.label for r in coded)
    return [_at("columns", "error", "no_intercept",
                f"the design has sum-to-zero codes of {' and '.join(factors)} ({cols}) but no intercept: no "
                "combination of its columns is constant, so the model forces the grand mean to 0: the residual "
                "variance is inflated by the grand mean, and with unequal group sizes (the codes are then not "
                "orthogonal to the constant) every estimate is biased too; add a column of ones (the intercept)")]


def _usage_notes(ctx: AuditContext) -> list[AuditFinding]:
    """The factors and covariates named but unused, or those found in the table when none were named."""
    req, ident = ctx.request, ctx.columns
    assert ident is not None
    used_f, used_c = ident.factors, ident.covariates
    out = []
    for f in (req.factors or (req.spec.model_factors() if req.spec else [])):
        if f not in used_f:
            out.append(_at("columns", "note", "factor_unused", f"no design column encodes factor {f}"))
    for c in (req.covariates or (req.spec.model_covariates() if req.spec else [])):
        if c not in used_c:
            out.append(_at("columns", "note", "covariate_unused", f"no design column uses covariate {c}"))
    tname = req.participants.name
    if req.factors is None and req.spec is None and used_f:
        out.append(_at("columns", "note", "factors_found",
                       f"factors read from {tname}: {', '.join(used_f)} (the columns the design "
                       "encodes; give --factors to choose)"))
    if req.covariates is None and req.spec is None and used_c:
        out.append(_at("columns", "note", "covariates_found",
                       f"covariates read from {tname}: {', '.join(used_c)} (give --covariates "
                       "to choose)"))
    return out


def _column_notes(ctx: AuditContext) -> list[AuditFinding]:
    """The coding of every factor, then every column in words (unexplained and mixed columns as warnings)."""
    ident = ctx.columns
    assert ident is not None
    view = ident.view
    out = [_at("columns", "note", "factor_coding", text) for text in ident.coding_texts]
    # The factors and covariates tried: those named (or the spec's, or the table's), not only those used.
    req, tried = ctx.request, ctx.alignment.table if ctx.alignment is not None else ident.table
    tried_f = list(req.factors or (req.spec.model_factors() if req.spec else []) or tried.factors or view.factors)
    tried_c = list(req.covariates or (req.spec.model_covariates() if req.spec else []) or tried.covariates
                   or view.covariates)
    for r in ident.roles:
        if r.kind == "unexplained" and r.index in ident.held:
            continue  # another table column than the one named: covariate_mismatch says so
        if r.kind == "unexplained":
            out.append(_at("columns", "warning", "column_unexplained",
                           f"{r.label}: unexplained: it is not a coding of the factors "
                           f"({', '.join(tried_f) or 'none'}) nor a covariate "
                           f"({', '.join(tried_c) or 'none'}) of {req.participants.name}; if it is "
                           "a covariate or factor of the table, name it with --covariates or --factors; contrasts "
                           "are stated with it held at its mean"))
        elif r.kind == "covariate_mixed":
            out.append(_at("columns", "warning", "column_mixed",
                           f"{r.label}: {r.description}; it mixes a covariate with factor offsets that are not a "
                           "centring; check how the column was computed"))
        else:
            out.append(_at("columns", "note", "column", f"{r.label}: {r.description}"))
    return out


def _empty_cells(ctx: AuditContext) -> list[AuditFinding]:
    """Cells of an interaction no design row has."""
    ident = ctx.columns
    assert ident is not None
    factors = list(ident.factors)
    counts = ident.hd.cell_counts
    inter = [r for r in ident.roles if len(r.factors) >= 2 or (r.covariate and r.factors)]
    if not inter:
        return []
    fs = sorted({f for r in inter for f in r.factors}, key=factors.index)
    sub = [i for i, f in enumerate(factors) if f in fs]
    full: dict[tuple[str, ...], int] = {}
    for c, k in zip(ident.cells, counts, strict=True):
        key = tuple(c[i] for i in sub)
        full[key] = full.get(key, 0) + int(k)
    empty = [", ".join(f"{fs[a]}={lv}" for a, lv in enumerate(key)) for key, k in full.items() if k == 0]
    if not empty:
        return []
    return [_at("columns", "warning", "empty_cell",
                f"no design row has {listing(empty)}, yet the design has interaction columns of "
                f"{' x '.join(fs)}: contrasts that need those cells are not estimable; drop those interaction "
                "columns or collect data for the empty cells")]


def contrast_findings(ctx: AuditContext) -> list[AuditFinding]:
    """The contrast file as a whole, then every contrast: estimability, F rows, statement, mistakes."""
    if ctx.contrasts is None:
        return []
    out = list(ctx.contrasts.findings)
    for con in ctx.contrasts.reports:
        out.extend(con.findings)
    if ctx.alignment is not None and any(
            f.code == "repeated_measures" and "not estimable" in f.message for f in ctx.alignment.findings):
        # participant columns absorb the between-participant effects: the repeated-measures finding says so
        out = [f for f in out if f.code != "not_estimable"]
    return out


def covariate_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Covariates uncentred in an interaction, or confounded with a factor."""
    if ctx.columns is None:
        return []
    return (_uncentred(ctx) + _within_centred(ctx)
            + [f for c in ctx.columns.covariates for f in _confounded(ctx, c)])


def _within_centred(ctx: AuditContext) -> list[AuditFinding]:
    """A covariate centred within a factor's levels: that factor's comparisons are not adjusted for it."""
    ident = ctx.columns
    assert ident is not None
    view = ident.view
    out = []
    seen: set[tuple[str, str]] = set()
    for r in ident.roles:
        if r.centre_kind != "within" or not r.covariate or not r.within or (r.covariate, r.within) in seen:
            continue
        c, f = r.covariate, r.within
        seen.add((c, f))
        vals, codes = view.covariates[c][view.valid], view.codes[f][view.valid]
        own = ", ".join(f"{num_text(float(vals[codes == i].mean()))} at {lv}"
                        for i, lv in enumerate(view.factors[f]) if (codes == i).any())
        out.append(_at("covariates", "warning", "within_centred_covariate",
                       f"{r.label}: covariate {c} centred within each level of {f} (its own mean subtracted in "
                       f"each: {own}): the {f} comparisons are then between levels at their own mean {c}, not "
                       f"adjusted for {c}; to adjust for it, subtract the overall mean "
                       f"({num_text(ident.means[c])}) instead"))
    return out


def _uncentred(ctx: AuditContext) -> list[AuditFinding]:
    ident = ctx.columns
    assert ident is not None
    flagged: dict[tuple[str, float], list] = {}
    for r in ident.roles:
        if r.kind == "covariate_interaction" and r.centre_kind in ("none", "value") and r.covariate:
            c = r.covariate
            where = 0.0 if r.centre_kind == "none" else float(r.centre or 0.0)
            if abs(ident.means[c] - where) > UNCENTRED_MEAN_SD * ident.sds[c]:
                flagged.setdefault((c, round(where, 9)), []).append(r)
    out = []
    for (c, where), rs in flagged.items():
        mean = ident.means[c]
        fs = " x ".join(dict.fromkeys(f for r in rs for f in r.factors))
        how = "uncentred" if rs[0].centre_kind == "none" else f"centred at {num_text(where)}, not at its mean,"
        cols = ", ".join(r.label for r in rs)
        out.append(_at("covariates", "warning", "uncentred_interaction",
                       f"{cols}: covariate {c} {how} times {fs}: the columns of {fs} then describe differences at "
                       f"{c} = {num_text(where)}, not at a typical {c} (mean {num_text(mean)}), and they are nearly "
                       "collinear "
                       f"with the {c} columns; subtract the mean ({num_text(mean)}) from {c} before multiplying"))
    return out


def _confounded(ctx: AuditContext, c: str) -> list[AuditFinding]:
    """The factors whose levels differ most in covariate ``c`` (|d| above SMD_WARN)."""
    ident = ctx.columns
    assert ident is not None
    view = ident.view
    vals = view.covariates[c][view.valid]
    out = []
    for f in ident.factors:
        codes = view.codes[f][view.valid]
        best = None
        for a, b in combinations(range(len(view.factors[f])), 2):
            xa, xb = vals[codes == a], vals[codes == b]
            if len(xa) < 2 or len(xb) < 2:
                continue
            pooled = math.sqrt(((len(xa) - 1) * xa.var(ddof=1) + (len(xb) - 1) * xb.var(ddof=1))
                               / (len(xa) + len(xb) - 2))
            if pooled <= 0:
                continue
            d = (xa.mean() - xb.mean()) / pooled
            if best is None or abs(d) > abs(best[0]):
                best = (d, a, b, xa.mean(), xb.mean())
        if best is not None and abs(best[0]) > SMD_WARN:
            d, a, b, ma, mb = best
            la, lb = view.factors[f][a], view.factors[f][b]
            out.append(_at("covariates", "warning", "confounded_covariate",
                           f"covariate {c} differs strongly between levels of {f}: mean {num_text(ma)} at {la}, "
                           f"{num_text(mb)} at {lb}, standardized difference d = {d:.2f} (pooled SD; |d| above "
                           f"{SMD_WARN:g}, Cohen's 'large'): the {f} effect and the {c} slope are hard to tell "
                           f"apart, and comparing {f} levels at the mean {c} extrapolates; report it, or match "
                           "the groups"))
    return out


def spec_findings(ctx: AuditContext) -> list[AuditFinding]:
    """With a spec: the same column space or not, and which generated hypothesis each contrast equals."""
    return list(ctx.spec.findings) if ctx.spec is not None else []


def with_spec_matches(ctx: AuditContext) -> list[ContrastReport]:
    """The contrast reports with the spec's hypotheses each matches filled in."""
    import dataclasses

    reports = list(ctx.contrasts.reports) if ctx.contrasts is not None else []
    if ctx.spec is None:
        return reports
    return [dataclasses.replace(con, spec_matches=list(m)) for con, m in zip(reports, ctx.spec.matches, strict=True)]
