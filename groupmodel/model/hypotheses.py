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

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import product
from typing import Any, Literal

import numpy as np

from ..errors import ModelError, SpecError
from ..text import number_text
from .coding import degree_name, orthogonal_polynomials
from .design import Design

Tail = Literal["two-sided", "greater", "less"]

#: Relative tolerance of the estimability test: a row L is estimable when
#: ||L - L P|| <= ESTIMABILITY_TOL * ||L||, P the projector on the design's row space.
ESTIMABILITY_TOL = 1e-8
#: Relative tolerance under which a row of weights counts as zero (the hypothesis vanishes in this model).
VANISH_TOL = 1e-10

_KINDS = ("main", "interaction", "compare", "mean", "trend", "slope", "cells", "weights")


@dataclass(frozen=True)
class Hypothesis:
    """One hypothesis, ready for the engine.

    Attributes
    ----------
    name : str
    kind : str
        ``main``, ``interaction``, ``compare``, ``mean``, ``trend``, ``slope``, ``cells`` or ``weights``.
    test : {"t", "F"}
    tail : {"two-sided", "greater", "less"}
        Always ``two-sided`` for F tests.
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
    tail: Tail
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
# Formatting
# --------------------------------------------------------------------------------------------------
_num = number_text


def _combination(terms: Sequence[tuple[float, str]]) -> str:
    """``[(1, "a"), (-1, "b"), (0.5, "c")]`` -> ``"a - b + 0.5 c"``."""
    out = ""
    for coef, text in terms:
        if abs(coef) < 1e-12:
            continue
        sign = "-" if coef < 0 else "+"
        mag = abs(coef)
        body = text if abs(mag - 1) < 1e-12 else f"{_num(mag)} {text}"
        out += (f"{sign} " if not out else f" {sign} ") + body if (out or sign == "-") else body
    return out.replace("- ", "-", 1) if out.startswith("- ") else out or "0"


def _mean_label(levels: Mapping[str, str]) -> str:
    return "mean(" + ", ".join(f"{f}={lv}" for f, lv in levels.items()) + ")"


# --------------------------------------------------------------------------------------------------
# Cell-weight machinery
# --------------------------------------------------------------------------------------------------
class _Cells:
    """Helpers over a design's cells for one hypothesis (its ``at`` slice and marginal weighting)."""

    def __init__(self, design: Design, at_levels: Mapping[str, str], marginal: str) -> None:
        self.design = design
        self.at_levels = dict(at_levels)
        self.marginal = marginal
        self.factor_names = list(design.factors)

    def select(self, levels: Mapping[str, str | Sequence[str]]) -> np.ndarray:
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

    def marginal_mean(self, levels: Mapping[str, str]) -> np.ndarray:
        """Cell weights (n_cells,) of the marginal mean over cells matching ``levels`` and ``at``."""
        mask = self.select(levels)
        if self.marginal == "observed":
            counts = self.design.cell_counts * mask
            if counts.sum() == 0:
                return mask / max(mask.sum(), 1)  # no observations: estimability will say so
            return counts / counts.sum()
        return mask / max(mask.sum(), 1)

    def averaged_over(self, used: Sequence[str]) -> str:
        others = [f for f in self.factor_names if f not in used and f not in self.at_levels]
        if not others:
            return ""
        how = "averaged equally over" if self.marginal == "equal" else "weighted by cell counts over"
        return f"{how} {' x '.join(others)}"


def _difference_matrix(k: int) -> np.ndarray:
    """(k-1, k): level i minus the last level; rows independent (common practice)."""
    return np.hstack([np.eye(k - 1), -np.ones((k - 1, 1))])


def _require_factor(design: Design, name: str, where: str, hname: str) -> None:
    if name not in design.factors:
        declared = list(design.factors)
        raise SpecError(
            f"hypotheses.{hname}.{where}: {name!r} is not a factor in the model terms (model factors {declared}); "
            "fix the name or add the factor to terms"
        )


def _require_level(design: Design, factor: str, level: Any, where: str, hname: str) -> None:
    if level not in design.factors[factor].levels:
        raise SpecError(
            f"hypotheses.{hname}.{where}: {level!r} is not a level of {factor} "
            f"{list(design.factors[factor].levels)}; fix the level"
        )


def _parse_at(design: Design, body: Mapping[str, Any], hname: str) -> tuple[dict[str, str], dict[str, float]]:
    at_levels: dict[str, str] = {}
    at_values: dict[str, float] = {}
    for key, value in (body.get("at") or {}).items():
        if key in design.factors:
            if not isinstance(value, str):
                raise SpecError(
                    f"hypotheses.{hname}.at.{key}: expected a level (text) of factor {key}, found {value!r}"
                )
            _require_level(design, key, value, f"at.{key}", hname)
            at_levels[key] = value
        elif key in design.covariates:
            if isinstance(value, str):
                raise SpecError(f"hypotheses.{hname}.at.{key}: expected a number for covariate {key}, found {value!r}")
            at_values[key] = float(value)
        else:
            raise SpecError(
                f"hypotheses.{hname}.at.{key}: {key!r} is neither a model factor {list(design.factors)} nor a model "
                f"covariate {list(design.covariates)}; fix the name"
            )
    return at_levels, at_values


def _hold_phrase(design: Design, at_values: Mapping[str, float], skip: str | None = None) -> str:
    parts = []
    for name, cov in design.covariates.items():
        if name == skip:
            continue
        if name in at_values:
            parts.append(f"{name} at {_num(at_values[name])}")
        elif cov.within:
            parts.append(f"{name} at each {cov.within} level's own mean")
        else:
            parts.append(f"{name} at its mean {_num(cov.mean)}")
    return ("; " + ", ".join(parts)) if parts else ""


def _tail_phrase(tail: str) -> str:
    return {"greater": " (alternative: > 0)", "less": " (alternative: < 0)"}.get(tail, "")


def _join(*parts: str) -> str:
    return ", ".join(p for p in parts if p)


# --------------------------------------------------------------------------------------------------
# Building one hypothesis
# --------------------------------------------------------------------------------------------------
def _cell_weights_for(
    design: Design, hname: str, body: Mapping[str, Any]
) -> tuple[str, np.ndarray, str, str | None]:
    """Return (kind, cell weights (q, n_cells), statement without holds, slope covariate or None)."""
    kind = next(k for k in _KINDS if k in body)
    marginal = body.get("marginal", "equal")
    at_levels, _ = _parse_at(design, body, hname)
    cells = _Cells(design, at_levels, marginal)
    at_text = ", ".join(f"{f}={lv}" for f, lv in at_levels.items())
    at_text = f"at {at_text}" if at_text else ""

    if kind == "main":
        f = body["main"]
        _require_factor(design, f, "main", hname)
        levels = design.factors[f].levels
        means = np.array([cells.marginal_mean({f: lv}) for lv in levels])
        w = _difference_matrix(len(levels)) @ means
        stmt = " = ".join(f"mean({f}={lv})" for lv in levels)
        return kind, w, _join(stmt, cells.averaged_over([f]), at_text), None

    if kind == "interaction":
        fs = list(body["interaction"])
        for i, f in enumerate(fs):
            _require_factor(design, f, f"interaction[{i}]", hname)
        combos = np.array(
            [cells.marginal_mean(dict(zip(fs, combo, strict=True)))
             for combo in product(*(design.factors[f].levels for f in fs))]
        )
        diff = np.ones((1, 1))
        for f in fs:
            diff = np.kron(diff, _difference_matrix(design.factors[f].n_levels))
        w = diff @ combos
        stmt = (
            f"every {' x '.join(fs)} interaction contrast of the cell means is 0 "
            f"(the differences among {fs[0]} levels are the same at every level of {' x '.join(fs[1:])})"
        )
        return kind, w, _join(stmt, cells.averaged_over(fs), at_text), None

    if kind == "compare":
        (f, sides), = body["compare"].items()
        _require_factor(design, f, "compare", hname)
        rows = []
        texts = []
        for s, side in enumerate(sides):
            lvls = [side] if isinstance(side, str) else list(side)
            for lv in lvls:
                _require_level(design, f, lv, f"compare.{f}[{s}]", hname)
            rows.append(np.mean([cells.marginal_mean({f: lv}) for lv in lvls], axis=0))
            if len(lvls) == 1:
                texts.append(f"mean({f}={lvls[0]})")
            else:
                texts.append("average of " + ", ".join(f"mean({f}={lv})" for lv in lvls))
        lhs = f"{texts[0]} - [{texts[1]}]" if texts[1].startswith("average") else f"{texts[0]} - {texts[1]}"
        if texts[0].startswith("average"):
            lhs = f"[{texts[0]}] - " + (f"[{texts[1]}]" if texts[1].startswith("average") else texts[1])
        overlap = set([sides[0]] if isinstance(sides[0], str) else sides[0]) & set(
            [sides[1]] if isinstance(sides[1], str) else sides[1]
        )
        if overlap:
            raise SpecError(
                f"hypotheses.{hname}.compare.{f}: level(s) {sorted(overlap)} are on both sides; "
                "each level may appear on one side only"
            )
        w = (rows[0] - rows[1])[None, :]
        return kind, w, _join(f"{lhs} = 0", cells.averaged_over([f]), at_text), None

    if kind == "mean":
        levels = dict(body["mean"])
        for f, lv in levels.items():
            _require_factor(design, f, f"mean.{f}", hname)
            _require_level(design, f, lv, f"mean.{f}", hname)
        w = cells.marginal_mean(levels)[None, :]
        label = _mean_label(levels) if levels else "mean of all cells"
        return kind, w, _join(f"{label} = 0", cells.averaged_over(list(levels)), at_text), None

    if kind == "trend":
        f = body["trend"]
        _require_factor(design, f, "trend", hname)
        fc = design.factors[f]
        degree = int(body.get("degree", 1))
        if degree > fc.n_levels - 1:
            raise SpecError(
                f"hypotheses.{hname}.degree: a factor with {fc.n_levels} levels has trends of degree 1 to "
                f"{fc.n_levels - 1}, found {degree}; lower the degree"
            )
        coef = orthogonal_polynomials(fc.scores or range(1, fc.n_levels + 1))[:, degree - 1]
        means = np.array([cells.marginal_mean({f: lv}) for lv in fc.levels])
        w = (coef @ means)[None, :]
        combo = _combination([(c, f"mean({f}={lv})") for c, lv in zip(coef, fc.levels, strict=True)])
        scores = ", ".join(map(_num, fc.scores or ()))
        stmt = f"{degree_name(degree)} trend over {f} scores [{scores}]: {combo} = 0"
        return kind, w, _join(stmt, cells.averaged_over([f]), at_text), None

    if kind == "slope":
        cov = body["slope"]
        if cov not in design.covariates:
            raise SpecError(
                f"hypotheses.{hname}.slope: {cov!r} is not a covariate in the model terms "
                f"(model covariates {list(design.covariates)}); fix the name or add it to terms"
            )
        w = cells.marginal_mean({})[None, :]
        return kind, w, _join(f"slope of {cov} = 0", cells.averaged_over([]), at_text), cov

    if kind == "cells":
        total = np.zeros(len(design.cells))
        parts = []
        for i, entry in enumerate(body["cells"]):
            levels = dict(entry["at"])
            for f, lv in levels.items():
                _require_factor(design, f, f"cells[{i}].at.{f}", hname)
                _require_level(design, f, lv, f"cells[{i}].at.{f}", hname)
            total = total + float(entry["weight"]) * cells.marginal_mean(levels)
            parts.append((float(entry["weight"]), _mean_label(levels)))
        return kind, total[None, :], _join(f"{_combination(parts)} = 0", at_text), None

    raise AssertionError(kind)


def _raw_weights(design: Design, hname: str, body: Mapping[str, Any]) -> np.ndarray:
    spec_rows = body["weights"]
    rows = [spec_rows] if isinstance(spec_rows, dict) else list(spec_rows)
    names = design.column_names
    out = np.zeros((len(rows), len(names)))
    for r, row in enumerate(rows):
        for col, w in row.items():
            if col not in names:
                where = "weights" if isinstance(spec_rows, dict) else f"weights[{r}]"
                raise SpecError(
                    f"hypotheses.{hname}.{where}: {col!r} is not a design column (columns {names}); "
                    "use the names of design.tsv"
                )
            out[r, names.index(col)] = float(w)
    return out


@dataclass(frozen=True)
class RowSpace:
    """The row space of a design, for estimability tests (from an SVD with a stated tolerance)."""

    basis: np.ndarray  # (r, p) orthonormal rows
    rank: int
    tol: float

    @classmethod
    def of(cls, matrix: np.ndarray) -> RowSpace:
        _, s, vt = np.linalg.svd(matrix, full_matrices=False)
        tol = s.max() * max(matrix.shape) * np.finfo(float).eps if s.size else 0.0
        r = int((s > tol).sum())
        return cls(vt[:r], r, tol)

    def residual(self, rows: np.ndarray) -> np.ndarray:
        """Relative distance of each row from the row space, shape (q,)."""
        rows = np.atleast_2d(rows)
        proj = rows @ self.basis.T @ self.basis
        norms = np.linalg.norm(rows, axis=1)
        return np.linalg.norm(rows - proj, axis=1) / np.where(norms > 0, norms, 1.0)

    def contains(self, rows: np.ndarray) -> np.ndarray:
        return self.residual(rows) <= ESTIMABILITY_TOL


def independent_rows(rows: np.ndarray) -> list[int]:
    """Indices of a maximal independent subset of ``rows``, earliest rows preferred."""
    kept: list[int] = []
    for i in range(rows.shape[0]):
        trial = rows[kept + [i]]
        s = np.linalg.svd(trial, compute_uv=False)
        if s.size and s.min() > s.max() * max(trial.shape) * np.finfo(float).eps * 10:
            kept.append(i)
    return kept


def describe_cell_weights(design: Design, w: np.ndarray, slope_of: str | None = None) -> str:
    """A cell-weight row (n_cells,) in words, simplified where it factorises.

    A factor over which the weights are an equal average becomes "averaged equally over F"; a factor on one
    of whose levels the weights are all concentrated becomes "at F=level"; the rest is written as a
    combination of (marginal) means.
    """
    names = list(design.factors)
    if not names:
        what = f"slope of {slope_of}" if slope_of else "mean of all observations"
        return f"{_combination([(float(w[0]), what)])} = 0"
    shape = tuple(design.factors[f].n_levels for f in names)
    tensor = np.asarray(w, dtype=float).reshape(shape)
    scale = np.abs(tensor).max() or 1.0
    averaged, fixed = [], {}
    for axis in reversed(range(len(names))):
        f = names[axis]
        k = tensor.shape[axis]
        moved = np.moveaxis(tensor, axis, -1)
        if np.allclose(moved, moved[..., :1], atol=1e-9 * scale) and k > 1:
            tensor = moved[..., 0] * k
            averaged.append(f)
            names.pop(axis)
            continue
        nonzero = [j for j in range(k) if np.abs(moved[..., j]).max() > 1e-9 * scale]
        if len(nonzero) == 1 and k > 1:
            fixed[f] = design.factors[f].levels[nonzero[0]]
            tensor = moved[..., nonzero[0]]
            names.pop(axis)
    terms = []
    if names:
        for idx in np.ndindex(tensor.shape):
            lv = {f: design.factors[f].levels[i] for f, i in zip(names, idx, strict=True)}
            label = _mean_label(lv)
            if slope_of:
                label = label.replace("mean(", f"slope of {slope_of} in (")
            terms.append((float(tensor[idx]), label))
    else:
        terms.append((float(tensor), f"slope of {slope_of}" if slope_of else "mean of the cells"))
    text = _combination(terms) + " = 0"
    extras = []
    if averaged:
        extras.append("averaged equally over " + " x ".join(reversed(averaged)))
    if fixed:
        extras.append("at " + ", ".join(f"{f}={lv}" for f, lv in reversed(list(fixed.items()))))
    return _join(text, *extras)


def interpret_weights(design: Design, rows: np.ndarray) -> tuple[np.ndarray | None, str | None, str]:
    """Say what rows of design-column weights test, in cell-mean terms.

    Returns
    -------
    cell_weights : ndarray (q, n_cells) or None
    slope_of : str or None
        The covariate whose cell slopes the weights combine, when they are a slope.
    statement : str
    """
    rows = np.atleast_2d(rows)
    candidates: list[tuple[str | None, np.ndarray, dict[str, float]]] = [(None, design.cell_rows(), {})]
    # Raw weights on the columns of an uncentred (or value-centred) covariate model compare cells where the
    # covariate's column is 0 (e.g. age = 0), not at its mean: try that too, and say so in the statement.
    at_zero = {n: float(c.center) for n, c in design.covariates.items()
               if c.within is None and not np.isclose(float(c.center), c.mean)}  # type: ignore[arg-type]
    if at_zero:
        candidates.append((None, design.cell_rows(at_zero), at_zero))
    for cov in design.covariates:
        candidates.append((cov, np.array([design.cell_slope_row(c, cov) for c in design.cells]), {}))
    for slope_of, basis, at in candidates:
        w = rows @ np.linalg.pinv(basis)
        if np.allclose(w @ basis, rows, atol=1e-8 * max(1.0, np.abs(rows).max())):
            texts = [describe_cell_weights(design, wr, slope_of) for wr in w]
            return w, slope_of, "; and ".join(texts) + _hold_phrase(design, at, skip=slope_of)
    return None, None, (
        "not a combination of cell means or of one covariate's slopes: it mixes intercepts and slopes, "
        "or involves columns that no cell's design row reaches"
    )


def build_hypothesis(design: Design, name: str, body: Mapping[str, Any], row_space: RowSpace) -> Hypothesis:
    """Turn one hypothesis of the spec into weights, a statement and an estimability verdict.

    Raises
    ------
    SpecError
        Unknown factor, level or column; a tail on an F test; a degree without a trend.
    ModelError
        The hypothesis vanishes in this model (e.g. an interaction the model leaves out).
    """
    kind = next(k for k in _KINDS if k in body)
    if "degree" in body and kind != "trend":
        raise SpecError(f"hypotheses.{name}.degree: 'degree' goes with 'trend' only; remove it")
    if "tail" in body and kind in ("main", "interaction"):
        raise SpecError(
            f"hypotheses.{name}.tail: a {kind} hypothesis is an F test, which has no tail; remove 'tail' "
            "or use compare/trend for a directional test"
        )
    _, at_values = _parse_at(design, body, name) if kind != "weights" else ({}, {})
    notes: list[str] = []
    slope_of: str | None = None
    if kind == "weights":
        weights = _raw_weights(design, name, body)
        cell_w, slope_of, statement = interpret_weights(design, weights)
        test: Literal["t", "F"] = "t" if weights.shape[0] == 1 else "F"
    else:
        kind, cell_w, statement, slope_of = _cell_weights_for(design, name, body)
        if slope_of is not None:
            basis = np.array([design.cell_slope_row(c, slope_of, at_values) for c in design.cells])
        else:
            basis = design.cell_rows(at_values)
        weights = cell_w @ basis
        statement = statement + _hold_phrase(design, at_values, skip=slope_of)
        test = "F" if kind in ("main", "interaction") else "t"
        if kind == "interaction" and weights.shape[0] == 1:
            notes.append("one-row interaction: F = t squared with df1 = 1")
    tail: Tail = body.get("tail", "two-sided")
    statement += _tail_phrase(tail)

    scale = max(np.abs(design.matrix).max(), 1.0)
    norms = np.linalg.norm(weights, axis=1)
    if np.all(norms <= VANISH_TOL * scale):
        reason = _vanish_reason(design, kind, body)
        raise ModelError(
            f"hypothesis {name}: its weights on the design columns are all zero in this model ({reason}); "
            "add the missing term or drop the hypothesis"
        )
    rows_given = weights.shape[0]
    nonzero = norms > VANISH_TOL * scale
    if not nonzero.all():
        notes.append(f"{int((~nonzero).sum())} of {rows_given} rows vanish in this model and were dropped")
        weights = weights[nonzero]
        cell_w = cell_w[nonzero] if cell_w is not None else None

    problems: list[str] = []
    ok = row_space.contains(weights)
    if not ok.all():
        problems.append(_non_estimable_reason(design, cell_w[~ok] if cell_w is not None else None, slope_of))
    if weights.shape[0] > 1:
        keep = independent_rows(weights)
        if len(keep) < weights.shape[0]:
            notes.append(
                f"{weights.shape[0]} rows given, {len(keep)} independent: kept rows {[k + 1 for k in keep]}"
            )
            weights = weights[keep]
            cell_w = cell_w[keep] if cell_w is not None else None
    return Hypothesis(
        name=name,
        kind=kind,
        test=test,
        tail=tail,
        weights=weights,
        cell_weights=cell_w,
        statement=statement,
        estimable=not problems,
        problems=problems,
        notes=notes,
        rows_given=rows_given,
        on_slopes=slope_of,
    )


def _vanish_reason(design: Design, kind: str, body: Mapping[str, Any]) -> str:
    present = {frozenset(t) for t in design.terms}
    if kind == "interaction":
        fs = body["interaction"]
        if frozenset(fs) not in present:
            return f"the interaction {':'.join(fs)} is not among the terms"
    if kind == "slope":
        return f"{body['slope']} enters no term"
    if kind == "main" and frozenset([body["main"]]) not in present:
        return f"{body['main']} has no main-effect term"
    return "the terms it needs are not in the model"


def _non_estimable_reason(design: Design, cell_w: np.ndarray | None, slope_of: str | None) -> str:
    if cell_w is not None:
        touched = np.abs(cell_w).max(axis=0) > 0
        empty = [design.cells[i] for i in np.flatnonzero(touched & (design.cell_counts == 0))]
        if empty:
            cells = "; ".join(design.cell_label(c) for c in empty)
            return f"no participant has {cells}"
    return "its weights are not in the row space of the design (the design is rank deficient and this " \
        "hypothesis depends on what the data cannot separate)"


def build_hypotheses(design: Design, specs: Mapping[str, Mapping[str, Any]]) -> dict[str, Hypothesis]:
    """Build every hypothesis of a spec, in order (errors stop at the first bad definition)."""
    space = RowSpace.of(design.matrix)
    return {name: build_hypothesis(design, name, body, space) for name, body in specs.items()}
