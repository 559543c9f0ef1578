"""The comparison of a hand-written design with the design and hypotheses a spec generates.

Part of ``groupmodel check`` (see :mod:`groupmodel.audit`): the same column space or not, and which generated
hypothesis each hand contrast equals (over the design columns when the spaces agree, over cell means when not).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..engine.linalg import matrix_rank
from ..model.design import Design
from .context import AuditContext
from .contrasts import ContrastReport, same_rows
from .read import AuditFinding


@dataclass(frozen=True)
class SpecComparison:
    """What the comparison found, and the spec's hypotheses each hand contrast matches (in contrast order)."""

    findings: tuple[AuditFinding, ...]
    matches: tuple[tuple[str, ...], ...]


@dataclass(frozen=True)
class _Pair:
    """The design rows both designs share: the hand rows, the spec's rows, and whether the spaces agree."""

    xh: np.ndarray
    xs: np.ndarray
    same: bool
    model: Any

    @property
    def projections(self) -> tuple[np.ndarray, np.ndarray]:
        return np.linalg.pinv(self.xh), np.linalg.pinv(self.xs)


def _spec(severity: str, code: str, message: str) -> AuditFinding:
    return AuditFinding(severity, code, message, "spec")  # type: ignore[arg-type]


def compare_with_spec(ctx: AuditContext) -> SpecComparison:
    """Build the spec's model; compare column spaces, then every estimable hand contrast with its hypotheses."""
    from ..model.assembly import build

    req = ctx.request
    assert req.spec is not None and ctx.columns is not None
    reports = ctx.contrasts.reports if ctx.contrasts is not None else ()
    none = tuple(() for _ in reports)
    model = build(req.spec)
    sname = req.spec.name
    spec_rows = {int(r) - 1: i for i, r in enumerate(model.design.observations["row"].tolist())}
    pairs = [(i, spec_rows[t]) for i, t in enumerate(ctx.columns.align) if t in spec_rows]
    if not pairs:
        return SpecComparison((_spec("warning", "spec_no_rows",
                                     f"no design row is a participant {sname} includes, so nothing can be compared; "
                                     "check that --participants is the spec's table and the design rows follow it"),),
                              none)
    xh = ctx.files.x.values[np.array([a for a, _ in pairs])]
    xs = model.design.matrix[np.array([b for _, b in pairs])]
    rh, rs = matrix_rank(xh), matrix_rank(xs)
    both = matrix_rank(np.hstack([xh, xs]))
    pair = _Pair(xh, xs, rh == rs == both, model)
    found = [_column_space(ctx, pair, rh)]
    matches = []
    projections = pair.projections
    for con in reports:
        m, texts = _contrast_vs_spec(ctx, con, pair, projections)
        matches.append(m)
        found.extend(texts)
    return SpecComparison(tuple(found), tuple(matches))


def _column_space(ctx: AuditContext, pair: _Pair, rank: int) -> AuditFinding:
    assert ctx.request.spec is not None
    sname = ctx.request.spec.name
    xh, xs = pair.xh, pair.xs
    if pair.same:
        return _spec("note", "spec_same_space",
                     f"the design spans the same column space as the design {sname} builds (rank {rank}; "
                     f"{xh.shape[1]} and {xs.shape[1]} columns): the same fitted values, so contrasts compare")
    miss_s = _outside(xs, xh)
    miss_h = _outside(xh, xs)
    parts = []
    if miss_s:
        parts.append("it cannot reproduce the spec's " + ", ".join(pair.model.design.column_names[j]
                                                                   for j in miss_s))
    if miss_h:
        parts.append("the spec's design cannot reproduce " + ", ".join(ctx.files.labels[j] for j in miss_h))
    return _spec("warning", "spec_column_space",
                 f"the design does not span the column space of the design {sname} builds: {'; '.join(parts)}; "
                 "the two models differ, and contrasts are compared over cell means only; add the missing "
                 "columns if the models are meant to be the same")


def _contrast_vs_spec(ctx: AuditContext, con: ContrastReport, pair: _Pair,
                      projections: tuple[np.ndarray, np.ndarray]) -> tuple[tuple[str, ...], list[AuditFinding]]:
    """The spec's hypotheses one hand contrast matches, and what to say about it.

    ``projections`` are the pseudo-inverses of the hand and the spec's design rows.
    """
    if not con.estimable:
        return (), []
    assert ctx.request.spec is not None
    sname = ctx.request.spec.name
    hyps = pair.model.hypotheses
    proj_h, proj_s = projections
    matches = []
    for name, h in hyps.items():
        if not h.estimable:
            continue
        if pair.same:
            a, b = con.weights @ proj_h, h.weights @ proj_s
            tol = 1e-6 + 4 * con.tol * math.sqrt(con.weights.shape[1])
        else:
            a, b = _cells_of(ctx, con, pair.model.design), _spec_cells(h, pair.model.design)
            if a is None or b is None:
                continue
            tol = 1e-6 + 4 * con.tol
        if same_rows(a, b, tol):
            sign = ""
            if con.test == "t" and h.weights.shape[0] == 1:
                dot = float((a * b).sum())
                if dot < 0:
                    sign = " with the sign reversed"
            matches.append(name + sign)
    found = []
    title = con.title
    how = "" if pair.same else " over cell means (the models differ)"
    if matches:
        text = f"{title} tests the same hypothesis as {sname}'s " + " and ".join(matches) + how
        found.append(_spec("note", "spec_match", text))
    names_plain = [m.split(" with ")[0] for m in matches]
    if con.name in hyps and con.name not in names_plain:
        other = f"it matches {', '.join(matches)}" if matches else "no hypothesis of the spec matches it"
        found.append(_spec("warning", "spec_name_mismatch",
                           f"{title} has the name of {sname}'s hypothesis {con.name} but tests something else "
                           f"({other}); {con.name} is: {hyps[con.name].statement}; fix the weights or the name"))
    elif not matches:
        found.append(_spec("note", "spec_no_match", f"{title}: no hypothesis of {sname} matches"))
    return tuple(matches), found


def _cells_of(ctx: AuditContext, con: ContrastReport, d: Design) -> np.ndarray | None:
    """A hand contrast's weights over the cells of the spec's factors, slopes marked by a tag column."""
    if con.cell_weights is None:
        return None
    assert ctx.columns is not None
    hd = ctx.columns.hd
    if set(hd.factors) - set(d.factors):
        return None
    out = np.zeros((con.cell_weights.shape[0], len(d.cells)))
    names = list(d.factors)
    for i, cell in enumerate(hd.cells):
        levels = dict(zip(hd.factors, cell, strict=True))
        targets = [j for j, c in enumerate(d.cells) if all(c[names.index(f)] == lv for f, lv in levels.items())]
        if not targets:
            return None
        for j in targets:
            out[:, j] += con.cell_weights[:, i] / len(targets)
    tag = 0.0 if con.slope_of is None else float(list(d.covariates).index(con.slope_of) + 1) \
        if con.slope_of in d.covariates else -1.0
    return np.hstack([out, np.full((out.shape[0], 1), tag * np.abs(out).sum(axis=1, keepdims=True).max())])


def _spec_cells(h: Any, d: Design) -> np.ndarray | None:
    if h.cell_weights is None:
        return None
    tag = 0.0 if h.on_slopes is None else float(list(d.covariates).index(h.on_slopes) + 1)
    w = h.cell_weights
    return np.hstack([w, np.full((w.shape[0], 1), tag * np.abs(w).sum(axis=1, keepdims=True).max())])


def _outside(a: np.ndarray, b: np.ndarray) -> list[int]:
    """Columns of ``a`` not in the column space of ``b``."""
    coef, *_ = np.linalg.lstsq(b, a, rcond=None)
    resid = np.linalg.norm(a - b @ coef, axis=0)
    norms = np.linalg.norm(a, axis=0)
    return [j for j in range(a.shape[1]) if resid[j] > 1e-8 * max(norms[j], 1e-300)]
