"""What can be tested instead of a hypothesis the observed cells do not determine.

A hypothesis is not estimable in a rank-deficient design when its weights reach a cell no participant is in
(or, more rarely, columns that repeat each other).  These ways out are offered, each checked before it is
offered (the changed hypothesis or model is built and found estimable):

* the same hypothesis over the levels where its cells are observed: an ``"at"`` entry that keeps, for one
  factor, the levels none of whose touched cells is empty (a list of levels averages equally over them; for
  the factor a main effect or interaction is about, it restricts that factor's levels); when no single factor
  will do, the restriction of two factors that keeps the most cells (a bounded search);
* the same hypothesis in a model without the interactions whose crossing has an empty cell (this assumes
  those interactions are absent);
* when neither applies (two terms that split the participants the same way), the model without one term.
"""

from __future__ import annotations

import dataclasses
import json
from itertools import combinations

import numpy as np

from ..engine.linalg import RowSpace
from ..errors import GroupModelError
from .checks import cell_counts_by_term
from .design import Design, build_design
from .hypotheses import Hypothesis, build_hypothesis
from .spec import HypothesisSpec, Interaction, Main, ModelSpec, Term, term_label

__all__ = ["PAIR_SEARCH_LIMIT", "alternatives"]

#: The restrictions of two factors at once tried when no single factor's restriction makes a hypothesis
#: estimable are searched only when there are at most this many per pair of factors.
PAIR_SEARCH_LIMIT = 64


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
    """For each factor: the hypothesis over the levels not involved in its empty cells, when estimable; failing
    that, the largest estimable restriction of two factors at once."""
    empty = _empty_touched(design, hypothesis)
    if not empty or body.kind in ("weights", "cells"):
        return []
    own, lists_allowed = _own_factors(body)
    space = RowSpace.of(design.matrix)
    names = [g for g in design.factors if lists_allowed or g not in own]
    out = []
    for g in names:
        dropped = {cell[list(design.factors).index(g)] for cell in empty}
        keep = tuple(lv for lv in design.factors[g].levels if lv not in dropped)
        if len(keep) >= (2 if g in own else 1):
            out += _offer(design, body, space, {g: keep})
    if out:
        return out
    return _pair_search(design, body, space, names, own)


def _pair_search(design: Design, body: HypothesisSpec, space: RowSpace, names: list[str],
                 own: list[str]) -> list[str]:
    """The estimable restriction of two factors that keeps the most cells (a small, bounded search)."""
    options = {g: [sub for k in range(2 if g in own else 1, design.factors[g].n_levels)
                   for sub in combinations(design.factors[g].levels, k)] for g in names}
    pairs = [(g, h) for g, h in combinations(names, 2) if len(options[g]) * len(options[h]) <= PAIR_SEARCH_LIMIT]
    trials = sorted(((a, b, g, h) for g, h in pairs for a in options[g] for b in options[h]),
                    key=lambda t: -len(t[0]) * len(t[1]))
    for a, b, g, h in trials:
        found = _offer(design, body, space, {g: a, h: b})
        if found:
            return found
    return []


def _offer(design: Design, body: HypothesisSpec, space: RowSpace, levels: dict[str, tuple[str, ...]]) -> list[str]:
    """The hypothesis with these ``at`` levels, in words with its ``"at"``, when it builds and is estimable."""
    at = tuple((k, v) for k, v in body.at if k not in levels) + tuple(
        (g, lv[0] if len(lv) == 1 else lv) for g, lv in levels.items())
    try:
        other = build_hypothesis(design, body.name, dataclasses.replace(body, at=at), space)
    except GroupModelError:
        return []
    if not other.estimable:
        return []
    shown = {g: lv[0] if len(lv) == 1 else list(lv) for g, lv in levels.items()}
    return [f"{_short(other.statement)} (\"at\": {json.dumps(shown)})"]


def _without_interactions(spec: ModelSpec, design: Design, body: HypothesisSpec) -> list[str]:
    """The hypothesis in a model without the interactions whose cells are not all observed, when estimable."""
    incomplete = {term for term, table in cell_counts_by_term(design).items()
                  if ":" in term and min(table.values()) == 0}
    drop: list[Term] = [t for t in spec.terms
                        if any(set(k.split(":")) <= {m for m in t if m in design.factors} for k in incomplete)]
    if not drop or not _estimable_without(spec, design, body, drop):
        return []
    labels = ", ".join(term_label(t) for t in drop)
    which = "interaction {}, which assumes that interaction is" if len(drop) == 1 else \
        "interactions {}, which assumes those interactions are"
    return [f"the same hypothesis in a model without the {which.format(labels)} absent"]


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
