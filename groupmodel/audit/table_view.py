"""The participants table as the audit sees it: factor codes and covariate values per table row, and per design row.

The file is read by :func:`groupmodel.model.table.read_table` (and ``participants.json`` by
:func:`~groupmodel.model.table.read_sidecar_levels`), the one reader of the table; this module only interprets
the text it returns for the audit: which columns are plausible factors or covariates when none are named,
which values count as numbers, and the order of the levels.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import TableError
from ..model.table import MISSING, read_sidecar_levels


@dataclass(frozen=True)
class TableView:
    """The table's columns, aligned with the design rows.

    Attributes
    ----------
    factors : dict
        Factor -> its levels in order.
    scores : dict
        Factor -> level scores for polynomial codings (default 1..k).
    codes : dict
        Factor -> (n,) int level index per design row, -1 where unknown.
    covariates : dict
        Covariate -> (n,) float raw values, NaN where unknown.
    valid : ndarray of bool, shape (n,)
        Rows usable for identification (known levels, finite covariates, coding not in doubt).
    known : ndarray of bool, shape (n,), optional
        Rows whose covariates are known, miscoded or not: covariate means and SDs are taken over these, as
        the author of the design would have (default: ``valid``).
    """

    factors: dict[str, tuple[str, ...]]
    scores: dict[str, tuple[float, ...]]
    codes: dict[str, np.ndarray]
    covariates: dict[str, np.ndarray]
    valid: np.ndarray
    known: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.known is None:
            object.__setattr__(self, "known", self.valid)

    @property
    def n(self) -> int:
        return int(self.valid.size)

    def key(self, subset: tuple[str, ...]) -> np.ndarray:
        """Integer group key of every row for a subset of factors (0 for the empty subset)."""
        if not subset:
            return np.zeros(self.n, dtype=int)
        codes = [np.where(self.codes[f] >= 0, self.codes[f], 0) for f in subset]
        dims = [len(self.factors[f]) for f in subset]
        return np.ravel_multi_index(codes, dims)

    def dims(self, subset: tuple[str, ...]) -> tuple[int, ...]:
        return tuple(len(self.factors[f]) for f in subset)



def _is_float(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def _order_levels(values: Sequence[str], declared: Sequence[str] | None) -> tuple[str, ...]:
    observed = list(dict.fromkeys(values))
    if declared:
        return tuple(lv for lv in declared if lv in observed) + tuple(
            sorted(lv for lv in observed if lv not in declared))
    if all(_is_float(v) for v in observed):
        return tuple(sorted(observed, key=float))
    return tuple(sorted(observed))


@dataclass(frozen=True)
class PreparedTable:
    """The participants table prepared for alignment: factor codes and covariate values for every table row."""

    frame: pd.DataFrame
    path: Path
    factors: dict[str, tuple[str, ...]]
    scores: dict[str, tuple[float, ...]]
    codes: dict[str, np.ndarray]  # (n_table,) level index, -1 missing
    covariates: dict[str, np.ndarray]  # (n_table,) float, NaN missing
    explicit_factors: bool
    explicit_covariates: bool

    @property
    def ids(self) -> list[str]:
        return self.frame["participant_id"].tolist()

    def restrict(self, factors: Sequence[str], covariates: Sequence[str]) -> PreparedTable:
        """The same table with only some factor and covariate columns (so n/a elsewhere does not matter)."""
        return dataclasses.replace(
            self,
            factors={f: lv for f, lv in self.factors.items() if f in factors},
            scores={f: sc for f, sc in self.scores.items() if f in factors},
            codes={f: c for f, c in self.codes.items() if f in factors},
            covariates={c: v for c, v in self.covariates.items() if c in covariates},
        )

    def view(self, align: np.ndarray, extra_invalid: np.ndarray | None = None,
             restrict_levels: bool = False) -> TableView:
        """The table's columns at the design rows ``align`` (table row index per design row, -1 unknown)."""
        known = align >= 0
        safe = np.where(known, align, 0)
        codes = {f: np.where(known, c[safe], -1) for f, c in self.codes.items()}
        covs = {c: np.where(known, v[safe], np.nan) for c, v in self.covariates.items()}
        valid = known.copy()
        for c in codes.values():
            valid &= c >= 0
        for v in covs.values():
            valid &= np.isfinite(v)
        if extra_invalid is not None:
            valid &= ~extra_invalid
        factors = dict(self.factors)
        scores = dict(self.scores)
        if restrict_levels:
            for f in list(factors):
                present = sorted(set(codes[f][valid].tolist()))
                if len(present) < len(factors[f]):
                    remap = np.full(len(factors[f]), -1)
                    remap[present] = np.arange(len(present))
                    codes[f] = np.where(codes[f] >= 0, remap[np.maximum(codes[f], 0)], -1)
                    factors[f] = tuple(factors[f][i] for i in present)
                    scores[f] = tuple(scores[f][i] for i in present)
        base = known.copy()
        for v in covs.values():
            base &= np.isfinite(v)
        return TableView(factors, scores, codes, covs, valid, base)


@dataclass(frozen=True)
class TableChoice:
    """The columns to read and how: given factor/covariate names (None: choose), the spec's levels and scores."""

    factors: Sequence[str] | None
    covariates: Sequence[str] | None
    spec_levels: Mapping[str, tuple[str, ...]] | None = None
    spec_scores: Mapping[str, Any] | None = None


def prepare_table(frame: pd.DataFrame, path: Path, choice: TableChoice, rows: np.ndarray | None) -> PreparedTable:
    """Choose factor and covariate columns (given, or every plausible column) and code them for every row.

    ``rows`` limits automatic choices to the table rows the design could use (None: all).
    """
    sidecar_path = path.with_suffix(".json")
    sidecar = read_sidecar_levels(sidecar_path) if sidecar_path.exists() else {}
    columns = [c for c in frame.columns if c != "participant_id"]
    for given, what in ((choice.factors, "--factors"), (choice.covariates, "--covariates")):
        for c in given or ():
            if c not in frame.columns:
                raise TableError(
                    f"{what}: column {c!r} is not in {path.name} (columns {columns}); fix the name"
                )
    sub = frame if rows is None else frame.iloc[rows]
    factors = list(choice.factors) if choice.factors is not None else _plausible_factors(sub, columns)
    covariates = list(choice.covariates) if choice.covariates is not None else _plausible_covariates(
        sub, columns, factors)
    out_levels: dict[str, tuple[str, ...]] = {}
    out_scores: dict[str, tuple[float, ...]] = {}
    codes: dict[str, np.ndarray] = {}
    for f in factors:
        values = frame[f].tolist()
        levels = _factor_levels(f, values, choice.spec_levels, sidecar)
        out_levels[f] = levels
        sc = (choice.spec_scores or {}).get(f)
        out_scores[f] = tuple(float(s) for s in sc) if sc is not None and len(sc) == len(levels) else tuple(
            float(i) for i in range(1, len(levels) + 1))
        index = {lv: i for i, lv in enumerate(levels)}
        codes[f] = np.array([index.get(v, -1) if v not in MISSING else -1 for v in values], dtype=int)
    covs: dict[str, np.ndarray] = {}
    for c in covariates:
        covs[c] = np.array([float(v) if v not in MISSING and _is_float(v) else np.nan for v in frame[c].tolist()])
    return PreparedTable(frame, path, out_levels, out_scores, codes, covs, choice.factors is not None,
                         choice.covariates is not None)


def _plausible_factors(sub: pd.DataFrame, columns: list[str]) -> list[str]:
    """Columns with 2 to 12 distinct values in at least half the rows, not numbers with more than 2 values."""
    factors = []
    for c in columns:
        vals = [v for v in sub[c].tolist() if v not in MISSING]
        distinct = set(vals)
        if 2 * len(vals) < len(sub) or len(distinct) < 2 or len(distinct) > 12:
            continue
        if all(_is_float(v) for v in distinct) and len(distinct) > 2:
            continue
        factors.append(c)
    return factors


def _plausible_covariates(sub: pd.DataFrame, columns: list[str], factors: list[str]) -> list[str]:
    """Columns (not factors) of numbers in at least half the rows, with more than 2 distinct values."""
    covariates = []
    for c in columns:
        if c in factors:
            continue
        vals = [v for v in sub[c].tolist() if v not in MISSING]
        if 2 * len(vals) >= len(sub) and all(_is_float(v) for v in vals) and len(set(vals)) > 2:
            covariates.append(c)
    return covariates


def _factor_levels(f: str, values: list[str], spec_levels: Mapping[str, tuple[str, ...]] | None,
                   sidecar: Mapping[str, tuple[str, ...]]) -> tuple[str, ...]:
    """The spec's levels (then any others, sorted), or the sidecar's order, or the audit's own order."""
    present = [v for v in values if v not in MISSING]
    if spec_levels and f in spec_levels:
        return tuple(spec_levels[f]) + tuple(sorted({v for v in present} - set(spec_levels[f])))
    return _order_levels(present, sidecar.get(f))
