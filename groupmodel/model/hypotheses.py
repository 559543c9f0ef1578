"""Hypotheses stated over cell means, mapped through the design.

One mechanism serves every coding.  A hypothesis is first written as weights
over the cells of the model's factors (``W``, shape ``(q, n_cells)``); the
weights over the design columns are then ``L = W @ R`` where ``R`` holds each
cell's design row (covariates held at their mean, or at the values the
hypothesis gives).  Slopes use the derivative of each cell's row with respect
to the covariate instead of the row itself.  No coding gets a special case: a
main effect under treatment coding with an interaction present comes out as the
true marginal comparison, because the cell rows carry the coding.

Then each row of ``L`` is checked for estimability (it must lie in the row
space of the observed design) and the rows of an F test are reduced to an
independent set.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from ..engine.linalg import ESTIMABILITY_TOL, RowSpace, dependent_columns, independent_rows
from ..errors import ModelError, SpecError
from .checks import empty_cells_text
from .design import Design
from .hypothesis_kinds import BUILDERS, At, CellWeights, ColumnWeights, parse_at, register
from .spec import HypothesisSpec, Interaction, Main, Slope, Tail
from .statements import describe_cell_weights, interpret_weights, tail_phrase

__all__ = [
    "BUILDERS",
    "ESTIMABILITY_TOL",
    "VANISH_TOL",
    "At",
    "CellWeights",
    "ColumnWeights",
    "Hypothesis",
    "RowSpace",
    "build_hypotheses",
    "build_hypothesis",
    "describe_cell_weights",
    "independent_rows",
    "interpret_weights",
    "parse_at",
    "register",
]

# ESTIMABILITY_TOL, RowSpace and independent_rows live in groupmodel.engine.linalg (one definition each);
# describe_cell_weights and interpret_weights in groupmodel.model.statements; the builders of each kind, and
# what they return, in groupmodel.model.hypothesis_kinds.  They stay importable here.

#: Relative tolerance under which a row of weights counts as zero (the hypothesis vanishes in this model).
VANISH_TOL = 1e-10

#: The tail of a hypothesis as reported: a t test's alternative, or ``upper`` for an F test (its one
#: rejection region: large F).
ReportedTail = Literal["two-sided", "greater", "less", "upper"]


@dataclass(frozen=True)
class Hypothesis:
    """One hypothesis, ready for the engine.

    Attributes
    ----------
    name : str
    kind : str
        ``main``, ``interaction``, ``compare``, ``mean``, ``trend``, ``slope``, ``cells`` or ``weights``.
    test : {"t", "F"}
    tail : {"two-sided", "greater", "less", "upper"}
        The alternative of a t test; ``upper`` for every F test (p is the upper tail of F).
    weights : ndarray, shape (q, p)
        Independent rows over the design columns (what goes into contrasts.tsv).
    cell_weights : ndarray, shape (q, n_cells) or None
        The same rows over cell means (over cell slopes for ``slope``); None for raw weights that no
        combination of cell rows reproduces.
    statement : str
        The null hypothesis in the study's words.
    estimable : bool
    problems : list of str
        Why it is not estimable (empty when estimable).
    notes : list of str
        E.g. dependent rows dropped.
    """

    name: str
    kind: str
    test: Literal["t", "F"]
    tail: ReportedTail
    weights: np.ndarray
    cell_weights: np.ndarray | None
    statement: str
    estimable: bool
    problems: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    rows_given: int = 1
    on_slopes: str | None = None

    @property
    def n_rows(self) -> int:
        return self.weights.shape[0]

    @property
    def test_tail(self) -> Tail:
        """The tail as the engine takes it: an F test's upper tail is the engine's ``two-sided`` (|t| for q = 1)."""
        return "two-sided" if self.tail == "upper" else self.tail

    def as_dict(self, design: Design) -> dict[str, Any]:
        out: dict[str, Any] = {
            "test": self.test,
            "kind": self.kind,
            "rows": self.n_rows,
            "rows_given": self.rows_given,
            "tail": self.tail,
            "statement": self.statement,
            "estimable": self.estimable,
            "weights": {name: self.weights[:, j].tolist() for j, name in enumerate(design.column_names)},
        }
        if self.cell_weights is not None:
            label = "slope_weights_over_cells" if self.on_slopes else "weights_over_cells"
            out[label] = [
                {"cell": dict(zip(design.factors, c, strict=True)), "weight": self.cell_weights[:, i].tolist()}
                for i, c in enumerate(design.cells)
                if np.any(self.cell_weights[:, i] != 0)
            ]
            if self.on_slopes:
                out["slope_of"] = self.on_slopes
        if self.problems:
            out["problems"] = self.problems
        if self.notes:
            out["notes"] = self.notes
        return out


# --------------------------------------------------------------------------------------------------
# Building one hypothesis
# --------------------------------------------------------------------------------------------------
def _check_keys(h: HypothesisSpec) -> None:
    """Keys that do not go with the kind (before anything is built)."""
    if h.degree is not None and h.kind != "trend":
        raise SpecError(f"{h.where}.degree: 'degree' goes with 'trend' only; remove it")
    if h.tail is not None and BUILDERS[h.kind].f_test:
        raise SpecError(
            f"{h.where}.tail: a {h.kind} hypothesis is an F test, which has no tail; remove 'tail' "
            "or use compare/trend for a directional test"
        )


def build_hypothesis(design: Design, name: str, body: HypothesisSpec | Mapping[str, Any],
                     row_space: RowSpace) -> Hypothesis:
    """Turn one hypothesis of the spec into weights, a statement and an estimability verdict.

    ``body`` is the hypothesis as read (:class:`~groupmodel.model.spec.HypothesisSpec`) or its JSON object.

    Raises
    ------
    SpecError
        Unknown factor, level or column; a tail on an F test; a degree without a trend.
    ModelError
        The hypothesis vanishes in this model (e.g. an interaction the model leaves out).
    """
    h = body if isinstance(body, HypothesisSpec) else HypothesisSpec.read(name, body)
    _check_keys(h)
    kind = BUILDERS[h.kind]
    at = parse_at(design, h) if kind.uses_at else At()
    built = kind.build(h, design, at)
    if built.test == "F" and h.tail not in (None, "two-sided"):
        raise SpecError(
            f"{h.where}.tail: {h.kind} with several rows is an F test, which has one rejection region (large F) "
            f"and no tail; remove 'tail', or give one row for a directional t test"
        )
    weights = built.column_weights(design, at)
    statement = built.statement(design, at) + tail_phrase(h.tail_or_default)
    weights, cell_w, notes, rows_given = _drop_vanishing(design, h, weights, built.cell_weights, list(built.notes))

    problems: list[str] = []
    ok = row_space.contains(weights)
    if not ok.all():
        problems.append(_non_estimable_reason(design, cell_w[~ok] if cell_w is not None else None))
    if weights.shape[0] > 1:
        keep = independent_rows(weights)
        if len(keep) < weights.shape[0]:
            notes.append(
                f"{weights.shape[0]} rows given, {len(keep)} independent: kept rows {[k + 1 for k in keep]}"
            )
            weights = weights[keep]
            cell_w = cell_w[keep] if cell_w is not None else None
    return Hypothesis(
        name=h.name,
        kind=h.kind,
        test=built.test,
        tail="upper" if built.test == "F" else h.tail_or_default,
        weights=weights,
        cell_weights=cell_w,
        statement=statement,
        estimable=not problems,
        problems=problems,
        notes=notes,
        rows_given=rows_given,
        on_slopes=built.slope_of,
    )


def _drop_vanishing(design: Design, h: HypothesisSpec, weights: np.ndarray, cell_w: np.ndarray | None,
                    notes: list[str]) -> tuple[np.ndarray, np.ndarray | None, list[str], int]:
    """Refuse a hypothesis whose weights all vanish in this model; drop (and note) rows that vanish."""
    scale = max(np.abs(design.matrix).max(), 1.0)
    if cell_w is not None:  # relative to the size of the weights over cells (a trend's may be small)
        scale = scale * np.maximum(np.linalg.norm(cell_w, axis=1), np.finfo(float).tiny)
    norms = np.linalg.norm(weights, axis=1)
    if np.all(norms <= VANISH_TOL * scale):
        raise ModelError(
            f"hypothesis {h.name}: its weights on the design columns are all zero in this model "
            f"({_vanish_reason(design, h)}); add the missing term or drop the hypothesis"
        )
    rows_given = weights.shape[0]
    nonzero = norms > VANISH_TOL * scale
    if not nonzero.all():
        notes.append(f"{int((~nonzero).sum())} of {rows_given} rows vanish in this model and were dropped")
        weights = weights[nonzero]
        cell_w = cell_w[nonzero] if cell_w is not None else None
    return weights, cell_w, notes, rows_given


def _vanish_reason(design: Design, h: HypothesisSpec) -> str:
    present = {frozenset(t) for t in design.terms}
    target = h.target
    if isinstance(target, Interaction):
        fs = target.factors
        if frozenset(fs) not in present:
            return f"the interaction {':'.join(fs)} is not among the terms"
    if isinstance(target, Slope):
        return f"{target.covariate} enters no term"
    if isinstance(target, Main) and frozenset([target.factor]) not in present:
        return f"{target.factor} has no main-effect term"
    return "the terms it needs are not in the model"


def _non_estimable_reason(design: Design, cell_w: np.ndarray | None) -> str:
    if cell_w is not None:
        touched = np.abs(cell_w).max(axis=0) > 0
        empty = [design.cells[i] for i in np.flatnonzero(touched & (design.cell_counts == 0))]
        if empty:
            return f"no participant has {empty_cells_text(design, empty)}"
    deps = dependent_columns(design.matrix, design.column_names)
    return "its weights are not in the row space of the design: it depends on what the rank-deficient design " \
        f"cannot separate ({'; '.join(deps)})"


def build_hypotheses(design: Design,
                     specs: Mapping[str, HypothesisSpec | Mapping[str, Any]]) -> dict[str, Hypothesis]:
    """Build every hypothesis of a spec, in order (errors stop at the first bad definition)."""
    space = RowSpace.of(design.matrix)
    return {name: build_hypothesis(design, name, body, space) for name, body in specs.items()}
