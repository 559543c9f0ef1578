"""The wording of hypotheses over cell means.

Every statement a user reads (in contrasts.json, map sidecars, the terminal and the audit of hand-written
contrasts) is put together here: combinations of means, the covariate values held, the tail, and the
description of any row of cell weights in the simplest words it allows.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from ..text import number_text, value_text
from .design import Design

_num = number_text


def combination(terms: Sequence[tuple[float, str]]) -> str:
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


def mean_label(levels: Mapping[str, str]) -> str:
    """``{"a": "x", "b": "y"}`` -> ``"mean(a=x, b=y)"``."""
    return "mean(" + ", ".join(f"{f}={lv}" for f, lv in levels.items()) + ")"


def hold_phrase(design: Design, at_values: Mapping[str, float], skip: str | None = None) -> str:
    """``"; age at its mean 30, ..."``: where each covariate (but ``skip``) is held; empty without covariates."""
    parts = []
    for name, cov in design.covariates.items():
        if name == skip:
            continue
        if name in at_values:
            parts.append(f"{name} at {value_text(at_values[name])}")
        elif cov.within:
            parts.append(f"{name} at each {cov.within} level's own mean")
        else:
            parts.append(f"{name} at its mean {value_text(cov.mean)}")
    return ("; " + ", ".join(parts)) if parts else ""


def tail_phrase(tail: str) -> str:
    """The alternative of a one-sided test, ``" (alternative: > 0)"``; empty for two-sided."""
    return {"greater": " (alternative: > 0)", "less": " (alternative: < 0)"}.get(tail, "")


def join(*parts: str) -> str:
    """The non-empty parts, separated by commas."""
    return ", ".join(p for p in parts if p)


def at_text(at_levels: Mapping[str, str | tuple[str, ...]], skip: Sequence[str] = ()) -> str:
    """``"at f=lv, g=lv"`` for the single factor levels a hypothesis is evaluated at; empty when none.

    Lists of levels are not here: :func:`averaged_over` and :func:`over_levels` say them.
    """
    text = ", ".join(f"{f}={lv}" for f, lv in at_levels.items() if isinstance(lv, str) and f not in skip)
    return f"at {text}" if text else ""


def _level_list_text(factor: str, levels: Sequence[str]) -> str:
    """``scanner (A, B)``: a factor over some of its levels (:func:`crossing` drops the brackets when alone)."""
    return f"{factor} ({', '.join(levels)})"


def crossing(items: Sequence[str]) -> str:
    """Factors joined by `` x ``; a lone factor over some levels loses its brackets: ``scanner A, B``."""
    if len(items) == 1 and items[0].endswith(")") and " (" in items[0]:
        name, levels = items[0][:-1].split(" (", 1)
        return f"{name} {levels}"
    return " x ".join(items)


def averaged_over(factor_names: Sequence[str], used: Sequence[str],
                  at_levels: Mapping[str, str | tuple[str, ...]], marginal: str) -> str:
    """How the factors a hypothesis does not name are averaged over (a factor with an ``at`` list over those
    levels only: ``averaged equally over scanner A, B``); empty when none is left."""
    others = [
        _level_list_text(f, at_levels[f]) if isinstance(at_levels.get(f), tuple) else f
        for f in factor_names if f not in used and not isinstance(at_levels.get(f), str)
    ]
    if not others:
        return ""
    how = "averaged equally over" if marginal == "equal" else "weighted by cell counts over"
    return f"{how} {crossing(others)}"


def over_levels(factors: Sequence[str], at_levels: Mapping[str, str | tuple[str, ...]]) -> str:
    """``over scanner A, B`` for the factors a hypothesis is about whose levels an ``at`` list restricts."""
    parts = [_level_list_text(f, at_levels[f]) for f in factors if isinstance(at_levels.get(f), tuple)]
    return f"over {crossing(parts)} only" if parts else ""


def _factorise(design: Design, w: np.ndarray) -> tuple[np.ndarray, list[str], list[str], dict[str, str]]:
    """Fold away factors over which ``w`` is an equal average or concentrated on one level.

    Returns the remaining tensor, the remaining factor names, the averaged factors and the fixed levels.
    """
    names = list(design.factors)
    shape = tuple(design.factors[f].n_levels for f in names)
    tensor = np.asarray(w, dtype=float).reshape(shape)
    scale = np.abs(tensor).max() or 1.0
    averaged: list[str] = []
    fixed: dict[str, str] = {}
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
            continue
        part = moved[..., nonzero]
        if 1 < len(nonzero) < k and np.allclose(part, part[..., :1], atol=1e-9 * scale):
            # An equal average over some levels only (an "at" list): "averaged equally over scanner A, B".
            tensor = part[..., 0] * len(nonzero)
            averaged.append(_level_list_text(f, [design.factors[f].levels[j] for j in nonzero]))
            names.pop(axis)
    return tensor, names, averaged, fixed


def _positive_first(terms: list[tuple[float, str]]) -> list[tuple[float, str]]:
    """A difference of two terms written as ``a - b``, never ``-b + a``; other combinations keep level order (a
    trend reads best in the order of its levels)."""
    scale = max((abs(c) for c, _ in terms), default=0.0) or 1.0
    used = [(c, s) for c, s in terms if abs(c) > 1e-12 * scale]
    if len(used) == 2 and used[0][0] < 0 < used[1][0]:
        return [used[1], used[0]]
    return terms


def describe_cell_weights(design: Design, w: np.ndarray, slope_of: str | None = None) -> str:
    """A cell-weight row (n_cells,) in words, simplified where it factorises.

    A factor over which the weights are an equal average becomes "averaged equally over F"; a factor on one
    of whose levels the weights are all concentrated becomes "at F=level"; the rest is written as a
    combination of (marginal) means.
    """
    if not list(design.factors):
        what = f"slope of {slope_of}" if slope_of else "mean of all observations"
        return f"{combination([(float(w[0]), what)])} = 0"
    tensor, names, averaged, fixed = _factorise(design, w)
    terms = []
    if names:
        for idx in np.ndindex(tensor.shape):
            lv = {f: design.factors[f].levels[i] for f, i in zip(names, idx, strict=True)}
            label = mean_label(lv)
            if slope_of:
                label = label.replace("mean(", f"slope of {slope_of} in (")
            terms.append((float(tensor[idx]), label))
    else:
        terms.append((float(tensor), f"slope of {slope_of}" if slope_of else "mean of the cells"))
    text = combination(_positive_first(terms)) + " = 0"
    extras = []
    if averaged:
        extras.append("averaged equally over " + crossing(list(reversed(averaged))))
    if fixed:
        extras.append("at " + ", ".join(f"{f}={lv}" for f, lv in reversed(list(fixed.items()))))
    return join(text, *extras)


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
            return w, slope_of, "; and ".join(texts) + hold_phrase(design, at, skip=slope_of)
    return None, None, (
        "not a combination of cell means or of one covariate's slopes: it mixes intercepts and slopes, "
        "or involves columns that no cell's design row reaches"
    )
