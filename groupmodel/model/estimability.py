"""What can be tested instead of a hypothesis the observed cells do not determine.

A hypothesis is not estimable in a rank-deficient design when its weights reach a cell no participant is in
(or, more rarely, columns that repeat each other).  Two ways out are offered, each checked before it is
offered (the changed hypothesis or model is built and found estimable):

* the same hypothesis over the levels where its cells are observed: an ``"at"`` entry that keeps, for one
  factor, the levels none of whose touched cells is empty (a list of levels averages equally over them; for
  the factor a main effect or interaction is about, it restricts that factor's levels);
* the same hypothesis in a model without the interactions whose crossing has an empty cell (this assumes
  those interactions are absent).
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np

from ..engine.linalg import RowSpace
from ..errors import GroupModelError
from .checks import cell_counts_by_term
from .design import Design, build_design
from .hypotheses import Hypothesis, build_hypothesis
from .spec import HypothesisSpec, Interaction, Main, ModelSpec, Term, term_label

__all__ = ["alternatives"]


def alternatives(spec: ModelSpec, design: Design, hypothesis: Hypothesis, body: HypothesisSpec) -> str:
    """``"; estimable instead: ..."`` naming what can be tested, or empty when nothing simple is found."""
    found = _restricted(design, hypothesis, body) + _without_interactions(spec, design, body)
    if not found:
        found = _without_a_term(spec, design, body)
    return ("; estimable instead: " + "; or ".join(found)) if found else ""


def _empty_touched(design: Design, hypothesis: Hypothesis) -> list[tuple[str, ...]]:
    """The empty cells the hypothesis's cell weights reach."""
    if hypothesis.cell_weights is None:
        return []
    touched = np.abs(hypothesis.cell_weights).max(axis=0) > 0
    return [design.cells[i] for i in np.flatnonzero(touched & (design.cell_counts == 0))]


def _own_factors(body: HypothesisSpec) -> tuple[list[str], bool]:
    """The factors the hypothesis is about, and whether an ``at`` list may restrict their levels."""
    target = body.target
    if isinstance(target, Main):
        return [target.factor], True
    if isinstance(target, Interaction):
        return list(target.factors), True
    factor = getattr(target, "factor", None)
    return ([factor] if isinstance(factor, str) else []), False


def _restricted(design: Design, hypothesis: Hypothesis, body: HypothesisSpec) -> list[str]:
    """For each factor: the hypothesis over the levels not involved in its empty cells, when estimable."""
    empty = _empty_touched(design, hypothesis)
    if not empty or body.kind in ("weights", "cells"):
        return []
    own, lists_allowed = _own_factors(body)
    space = RowSpace.of(design.matrix)
    names = list(design.factors)
    out = []
    for g in names:
        if g in own and not lists_allowed:
            continue
        dropped = {cell[names.index(g)] for cell in empty}
        keep = [lv for lv in design.factors[g].levels if lv not in dropped]
        if len(keep) < (2 if g in own else 1):
            continue
        value: str | list[str] = keep[0] if len(keep) == 1 else keep
        at = tuple((k, v) for k, v in body.at if k != g) + ((g, value if isinstance(value, str) else tuple(value)),)
        try:
            other = build_hypothesis(design, body.name, dataclasses.replace(body, at=at), space)
        except GroupModelError:
            continue
        if other.estimable:
            out.append(f"{_short(other.statement)} (\"at\": {json.dumps({g: value})})")
    return out


def _without_interactions(spec: ModelSpec, design: Design, body: HypothesisSpec) -> list[str]:
    """The hypothesis in a model without the interactions whose cells are not all observed, when estimable."""
    incomplete = {term for term, table in cell_counts_by_term(design).items()
                  if ":" in term and min(table.values()) == 0}
    drop: list[Term] = [t for t in spec.terms
                        if any(set(k.split(":")) <= {m for m in t if m in design.factors} for k in incomplete)]
    if not drop or not _estimable_without(spec, design, body, drop):
        return []
    labels = ", ".join(term_label(t) for t in drop)
    return [f"the same hypothesis in a model without the interaction {labels}, which "
            f"assumes {'that interaction is' if len(drop) == 1 else 'those interactions are'} absent"]


def _without_a_term(spec: ModelSpec, design: Design, body: HypothesisSpec) -> list[str]:
    """The hypothesis in a model without one term (and the terms containing it), when that makes it estimable:
    the columns of that term repeat others (two factors that split the participants the same way)."""
    out = []
    for term in spec.terms:
        drop = [t for t in spec.terms if set(term) <= set(t)]
        if _estimable_without(spec, design, body, drop):
            out.append(f"the same hypothesis in a model without the term {term_label(term)}, whose columns the "
                       "data cannot tell apart from others")
    return out


def _estimable_without(spec: ModelSpec, design: Design, body: HypothesisSpec, drop: list[Term]) -> bool:
    """Whether the hypothesis builds, and is estimable, in the model without the terms ``drop``."""
    if design.sample is None:
        return False
    reduced = dataclasses.replace(spec, terms=tuple(t for t in spec.terms if t not in drop))
    try:
        smaller = build_design(reduced, design.sample)
        other = build_hypothesis(smaller, body.name, body, RowSpace.of(smaller.matrix))
    except GroupModelError:
        return False
    return other.estimable


def _short(statement: str) -> str:
    """A statement without the covariate values held (they do not change), to keep the message short."""
    return statement.split("; ")[0]
