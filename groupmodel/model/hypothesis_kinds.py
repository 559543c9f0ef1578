"""The kinds of hypothesis: one builder each, registered in :data:`BUILDERS`.

A builder takes a hypothesis as read (:class:`~groupmodel.model.spec.HypothesisSpec`), the design and where
the hypothesis is evaluated (:class:`At`), and returns its weights over cell means (:class:`CellWeights`)
with the statement in parts, or, for raw weights, weights over the design columns (:class:`ColumnWeights`).
:func:`groupmodel.model.hypotheses.build_hypothesis` does the rest (weights over columns, holds, tail,
vanishing and dependent rows, estimability), the same for every kind.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from itertools import product
from typing import Any, Literal

import numpy as np

from ..errors import SpecError
from ..text import number_text
from .coding import degree_name
from .design import Design
from .spec import Cells, Compare, HypothesisSpec, Interaction, Main, Mean, Slope, Trend, Weights
from .statements import (
    at_text,
    averaged_over,
    combination,
    hold_phrase,
    interpret_weights,
    join,
    mean_label,
    over_levels,
)


# --------------------------------------------------------------------------------------------------
# What a builder returns: weights over cells (or, for raw weights, over the design columns)
# --------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class At:
    """Where a hypothesis is evaluated: factor levels (a slice of the cells) and covariate values.

    A factor's entry in ``levels`` is one level (the hypothesis is taken at that level) or a tuple of at least
    two levels in the design's level order (averaged over those levels only; for the factor a ``main`` or
    ``interaction`` hypothesis is about, its levels are restricted to those).
    """

    levels: dict[str, str | tuple[str, ...]] = field(default_factory=dict)
    values: dict[str, float] = field(default_factory=dict)

    def levels_of(self, design: Design, factor: str) -> tuple[str, ...]:
        """The levels of ``factor`` this hypothesis spans: those of an ``at`` list, else all of them."""
        chosen = self.levels.get(factor)
        return chosen if isinstance(chosen, tuple) else tuple(design.factors[factor].levels)


@dataclass(frozen=True)
class CellWeights:
    """A hypothesis as weights over cell means (over cell slopes of ``slope_of`` for a slope).

    Attributes
    ----------
    weights : ndarray, shape (q, n_cells)
    parts : tuple of str
        The statement over cell means, in parts joined by commas (empty parts left out); the covariate
        values held and the tail are added when the hypothesis is built.
    test : {"t", "F"}
    slope_of : str or None
    notes : tuple of str
    """

    weights: np.ndarray
    parts: tuple[str, ...]
    test: Literal["t", "F"]
    slope_of: str | None = None
    notes: tuple[str, ...] = ()

    @property
    def cell_weights(self) -> np.ndarray:
        return self.weights

    def column_weights(self, design: Design, at: At) -> np.ndarray:
        """``L = W @ R``: R the design row (or slope row) of every cell, covariates held at ``at``."""
        if self.slope_of is not None:
            basis = np.array([design.cell_slope_row(c, self.slope_of, at.values) for c in design.cells])
        else:
            basis = design.cell_rows(at.values)
        return self.weights @ basis

    def statement(self, design: Design, at: At) -> str:
        return join(*self.parts) + hold_phrase(design, at.values, skip=self.slope_of)


@dataclass(frozen=True)
class ColumnWeights:
    """Raw weights over the design columns, with what they test over cell means when that can be said."""

    rows: np.ndarray  # (q, p)
    cell_weights: np.ndarray | None
    slope_of: str | None
    text: str
    test: Literal["t", "F"]
    notes: tuple[str, ...] = ()

    def column_weights(self, design: Design, at: At) -> np.ndarray:
        return self.rows

    def statement(self, design: Design, at: At) -> str:
        return self.text


Built = CellWeights | ColumnWeights
Builder = Callable[[HypothesisSpec, Design, At], Built]


@dataclass(frozen=True)
class Kind:
    """A registered kind of hypothesis: its builder and what the checks before building need to know."""

    build: Builder
    f_test: bool  # always an F test (a tail makes no sense)
    uses_at: bool  # reads "at" (raw weights do not)


#: kind -> how to build it.  Adding a kind of hypothesis = registering a builder (and its reader in
#: :data:`groupmodel.model.spec.TARGET_READERS`, and its key in the schema).
BUILDERS: dict[str, Kind] = {}


def register(kind: str, f_test: bool = False, uses_at: bool = True) -> Callable[[Builder], Builder]:
    """Decorator: register ``builder`` for hypotheses of ``kind``."""
    def add(builder: Builder) -> Builder:
        BUILDERS[kind] = Kind(builder, f_test, uses_at)
        return builder
    return add


# --------------------------------------------------------------------------------------------------
# Cell-weight machinery
# --------------------------------------------------------------------------------------------------
class _Cells:
    """Helpers over a design's cells for one hypothesis (its ``at`` slice and marginal weighting)."""

    def __init__(self, design: Design, at_levels: Mapping[str, str | tuple[str, ...]], marginal: str) -> None:
        self.design = design
        self.at_levels = dict(at_levels)
        self.marginal = marginal
        self.factor_names = list(design.factors)

    def select(self, levels: Mapping[str, str | tuple[str, ...]]) -> np.ndarray:
        """Boolean over cells: matches every constraint and the hypothesis's ``at`` levels."""
        mask = np.ones(len(self.design.cells), dtype=bool)
        constraints: dict[str, Any] = {**self.at_levels, **levels}
        for i, cell in enumerate(self.design.cells):
            for f, want in constraints.items():
                lv = cell[self.factor_names.index(f)]
                if (lv != want) if isinstance(want, str) else (lv not in want):
                    mask[i] = False
                    break
        return mask

    def marginal_mean(self, levels: Mapping[str, str | tuple[str, ...]]) -> np.ndarray:
        """Cell weights (n_cells,) of the marginal mean over cells matching ``levels`` and ``at``."""
        mask = self.select(levels)
        if self.marginal == "observed":
            counts = self.design.cell_counts * mask
            if counts.sum() == 0:
                return mask / max(mask.sum(), 1)  # no observations: estimability will say so
            return counts / counts.sum()
        return mask / max(mask.sum(), 1)

    def is_participant_mean(self, w: np.ndarray) -> bool:
        """Whether cell weights ``w`` weight each cell of the ``at`` slice by its count: the mean over its
        participants (marginal "observed", a balanced slice, or a model without factors)."""
        counts = self.design.cell_counts * self.select({})
        total = counts.sum()
        return bool(total > 0 and np.allclose(w, counts / total, rtol=0, atol=1e-12))

    def averaged_over(self, used: Sequence[str]) -> str:
        return averaged_over(self.factor_names, used, self.at_levels, self.marginal)


def _difference_matrix(k: int) -> np.ndarray:
    """(k-1, k): level i minus the last level; rows independent (common practice)."""
    return np.hstack([np.eye(k - 1), -np.ones((k - 1, 1))])


def _require_factor(design: Design, name: str, where: str, h: HypothesisSpec) -> None:
    if name not in design.factors:
        declared = list(design.factors)
        raise SpecError(
            f"{h.where}.{where}: {name!r} is not a factor in the model terms (model factors {declared}); "
            "fix the name or add the factor to terms"
        )


def _require_level(design: Design, factor: str, level: Any, where: str, h: HypothesisSpec) -> None:
    if level not in design.factors[factor].levels:
        raise SpecError(
            f"{h.where}.{where}: {level!r} is not a level of {factor} "
            f"{list(design.factors[factor].levels)}; fix the level"
        )


def parse_at(design: Design, h: HypothesisSpec) -> At:
    """The hypothesis's ``at`` over this design: factor levels (one, or a list) and covariate values, each checked.

    A list of one level is that level; a list of every level is no restriction.
    """
    at_levels: dict[str, str | tuple[str, ...]] = {}
    at_values: dict[str, float] = {}
    for key, value in h.at:
        if key in design.factors:
            if isinstance(value, list | tuple):
                levels = _level_list(design, key, value, h)
                if len(levels) == 1:
                    at_levels[key] = levels[0]
                elif len(levels) < design.factors[key].n_levels:
                    at_levels[key] = levels
                continue
            if not isinstance(value, str):
                raise SpecError(
                    f"{h.where}.at.{key}: expected a level (text) of factor {key}, or a list of levels, found {value!r}"
                )
            _require_level(design, key, value, f"at.{key}", h)
            at_levels[key] = value
        elif key in design.covariates:
            if isinstance(value, str | list | tuple):
                shown = list(value) if isinstance(value, tuple) else value
                raise SpecError(f"{h.where}.at.{key}: expected a number for covariate {key}, found {shown!r}")
            at_values[key] = float(value)
        else:
            raise SpecError(
                f"{h.where}.at.{key}: {key!r} is neither a model factor {list(design.factors)} nor a model "
                f"covariate {list(design.covariates)}; fix the name"
            )
    return At(at_levels, at_values)


def _level_list(design: Design, factor: str, value: Sequence[Any], h: HypothesisSpec) -> tuple[str, ...]:
    """An ``at`` list of levels of ``factor``: checked (levels of the factor, none twice) and in level order."""
    where = f"{h.where}.at.{factor}"
    if not value:
        raise SpecError(f"{where}: expected at least one level of {factor}, found an empty list; name the levels")
    for i, lv in enumerate(value):
        if not isinstance(lv, str):
            raise SpecError(f"{where}[{i}]: expected a level (text) of factor {factor}, found {lv!r}")
        _require_level(design, factor, lv, f"at.{factor}[{i}]", h)
    twice = sorted({lv for lv in value if list(value).count(lv) > 1})
    if twice:
        raise SpecError(f"{where}: level(s) {twice} listed twice; list each level once")
    return tuple(lv for lv in design.factors[factor].levels if lv in value)


def _own_factor_at(h: HypothesisSpec, at: At, factors: Sequence[str], lists_allowed: bool) -> None:
    """Refuse an ``at`` on a factor the hypothesis is about (a list restricts its levels where that is allowed)."""
    for f in factors:
        if f not in at.levels:
            continue
        if lists_allowed and isinstance(at.levels[f], tuple):
            continue
        fix = "give a list of at least two of its levels, or remove it" if lists_allowed else "remove it"
        raise SpecError(
            f"{h.where}.at.{f}: {f} is the factor this {h.kind} hypothesis is about, so it cannot also be held "
            f"at {'a level' if isinstance(at.levels[f], str) else 'some levels'}; {fix}"
        )


# --------------------------------------------------------------------------------------------------
# The builders, one per kind
# --------------------------------------------------------------------------------------------------
@register("main", f_test=True)
def _main(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Main)
    f = h.target.factor
    cells = _Cells(design, at.levels, h.marginal)
    _require_factor(design, f, "main", h)
    _own_factor_at(h, at, [f], lists_allowed=True)
    levels = at.levels_of(design, f)
    means = np.array([cells.marginal_mean({f: lv}) for lv in levels])
    w = _difference_matrix(len(levels)) @ means
    stmt = " = ".join(f"mean({f}={lv})" for lv in levels)
    return CellWeights(w, (stmt, cells.averaged_over([f]), at_text(at.levels, skip=[f])), "F")


@register("interaction", f_test=True)
def _interaction(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Interaction)
    fs = list(h.target.factors)
    cells = _Cells(design, at.levels, h.marginal)
    for i, f in enumerate(fs):
        _require_factor(design, f, f"interaction[{i}]", h)
    _own_factor_at(h, at, fs, lists_allowed=True)
    levels = [at.levels_of(design, f) for f in fs]
    combos = np.array(
        [cells.marginal_mean(dict(zip(fs, combo, strict=True))) for combo in product(*levels)]
    )
    diff = np.ones((1, 1))
    for lvls in levels:
        diff = np.kron(diff, _difference_matrix(len(lvls)))
    w = diff @ combos
    stmt = (
        f"every {' x '.join(fs)} interaction contrast of the cell means is 0 "
        f"(the differences among {fs[0]} levels are the same at every level of {' x '.join(fs[1:])})"
    )
    notes = ("one-row interaction: F = t squared with df1 = 1",) if w.shape[0] == 1 else ()
    return CellWeights(w, (stmt, over_levels(fs, at.levels), cells.averaged_over(fs), at_text(at.levels, skip=fs)),
                       "F", notes=notes)


def _side_text(f: str, lvls: Sequence[str]) -> str:
    if len(lvls) == 1:
        return f"mean({f}={lvls[0]})"
    return "average of " + ", ".join(f"mean({f}={lv})" for lv in lvls)


@register("compare")
def _compare(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Compare)
    f, sides = h.target.factor, h.target.sides
    cells = _Cells(design, at.levels, h.marginal)
    _require_factor(design, f, "compare", h)
    _own_factor_at(h, at, [f], lists_allowed=False)
    rows = []
    texts = []
    for s, lvls in enumerate(sides):
        for lv in lvls:
            _require_level(design, f, lv, f"compare.{f}[{s}]", h)
        rows.append(np.mean([cells.marginal_mean({f: lv}) for lv in lvls], axis=0))
        texts.append(_side_text(f, lvls))
    lhs = f"{texts[0]} - [{texts[1]}]" if texts[1].startswith("average") else f"{texts[0]} - {texts[1]}"
    if texts[0].startswith("average"):
        lhs = f"[{texts[0]}] - " + (f"[{texts[1]}]" if texts[1].startswith("average") else texts[1])
    overlap = set(sides[0]) & set(sides[1])
    if overlap:
        raise SpecError(
            f"{h.where}.compare.{f}: level(s) {sorted(overlap)} are on both sides; "
            "each level may appear on one side only"
        )
    w = (rows[0] - rows[1])[None, :]
    return CellWeights(w, (f"{lhs} = 0", cells.averaged_over([f]), at_text(at.levels)), "t")


@register("mean")
def _mean(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Mean)
    levels = dict(h.target.levels)
    cells = _Cells(design, at.levels, h.marginal)
    for f, lv in levels.items():
        _require_factor(design, f, f"mean.{f}", h)
        _require_level(design, f, lv, f"mean.{f}", h)
    w = cells.marginal_mean(levels)[None, :]
    if not levels and cells.is_participant_mean(w[0]):
        return CellWeights(w, ("mean over participants = 0", at_text(at.levels)), "t")
    label = mean_label(levels) if levels else "mean of all cells"
    return CellWeights(w, (f"{label} = 0", cells.averaged_over(list(levels)), at_text(at.levels)), "t")


def trend_weights(scores: Sequence[float], degree: int) -> np.ndarray:
    """Weights over the level means (k,) whose sum is the degree-``degree`` trend in units of the scores.

    The weights are ``P / (P . P)``, ``P`` the monic polynomial of that degree orthogonal (over the scores) to
    every lower degree: the sum is the coefficient of ``score**degree`` in the least-squares polynomial of
    that degree through the level means; for degree 1 the least-squares slope of the means per unit of score.
    They are the orthonormal polynomial contrast (R's ``contr.poly``) rescaled: t and p are the same.
    """
    x = np.asarray(scores, dtype=float)
    vander = np.vander(x - x.mean(), degree + 1, increasing=True)
    q, r = np.linalg.qr(vander)
    monic = q[:, degree] * r[degree, degree]  # score**degree minus its projection on the lower degrees
    return monic / (monic @ monic)


def _trend_units(degree: int, factor: str) -> str:
    """What the estimate of a trend is, in units of the scores."""
    if degree == 1:
        return f"the least-squares slope of the {factor} means per unit of score"
    fit = degree_name(degree) if degree <= 3 else f"polynomial of degree {degree}"
    return f"the score^{degree} coefficient of the least-squares {fit} through the {factor} means"


@register("trend")
def _trend(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Trend)
    f, degree = h.target.factor, h.target.degree
    cells = _Cells(design, at.levels, h.marginal)
    _require_factor(design, f, "trend", h)
    _own_factor_at(h, at, [f], lists_allowed=False)
    fc = design.factors[f]
    if degree > fc.n_levels - 1:
        raise SpecError(
            f"{h.where}.degree: a factor with {fc.n_levels} levels has trends of degree 1 to "
            f"{fc.n_levels - 1}, found {degree}; lower the degree"
        )
    coef = trend_weights(fc.scores or range(1, fc.n_levels + 1), degree)
    means = np.array([cells.marginal_mean({f: lv}) for lv in fc.levels])
    w = (coef @ means)[None, :]
    combo = combination([(c, f"mean({f}={lv})") for c, lv in zip(coef, fc.levels, strict=True)])
    scores = ", ".join(map(number_text, fc.scores or ()))
    stmt = f"{degree_name(degree)} trend over {f} scores [{scores}], {_trend_units(degree, f)}: {combo} = 0"
    return CellWeights(w, (stmt, cells.averaged_over([f]), at_text(at.levels)), "t")


@register("slope")
def _slope(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Slope)
    cov = h.target.covariate
    cells = _Cells(design, at.levels, h.marginal)
    if cov not in design.covariates:
        raise SpecError(
            f"{h.where}.slope: {cov!r} is not a covariate in the model terms "
            f"(model covariates {list(design.covariates)}); fix the name or add it to terms"
        )
    w = cells.marginal_mean({})[None, :]
    return CellWeights(w, (f"slope of {cov} = 0", cells.averaged_over([]), at_text(at.levels)), "t", slope_of=cov)


@register("cells")
def _cells(h: HypothesisSpec, design: Design, at: At) -> CellWeights:
    assert isinstance(h.target, Cells)
    cells = _Cells(design, at.levels, h.marginal)
    total = np.zeros(len(design.cells))
    parts = []
    for i, entry in enumerate(h.target.entries):
        levels = dict(entry.levels)
        for f, lv in levels.items():
            _require_factor(design, f, f"cells[{i}].at.{f}", h)
            _require_level(design, f, lv, f"cells[{i}].at.{f}", h)
        total = total + entry.weight * cells.marginal_mean(levels)
        parts.append((entry.weight, mean_label(levels)))
    listed = [f for f, lv in at.levels.items() if isinstance(lv, tuple)]
    over = cells.averaged_over([f for f in design.factors if f not in listed])
    return CellWeights(total[None, :], (f"{combination(parts)} = 0", over, at_text(at.levels)), "t")


@register("weights", uses_at=False)
def _weights(h: HypothesisSpec, design: Design, at: At) -> ColumnWeights:
    assert isinstance(h.target, Weights)
    names = design.column_names
    out = np.zeros((len(h.target.rows), len(names)))
    for r, row in enumerate(h.target.rows):
        for col, w in row:
            if col not in names:
                where = "weights" if h.target.one_row else f"weights[{r}]"
                raise SpecError(
                    f"{h.where}.{where}: {col!r} is not a design column (columns {names}); "
                    "use the names of design.tsv"
                )
            out[r, names.index(col)] = w
    cell_w, slope_of, statement = interpret_weights(design, out)
    return ColumnWeights(out, cell_w, slope_of, statement, "t" if out.shape[0] == 1 else "F")
