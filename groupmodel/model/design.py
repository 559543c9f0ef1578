"""The design matrix and everything it means.

A :class:`Design` is built once from a validated spec and the selected sample,
and everything downstream (hypotheses, checks, sidecars, pictures, the fit)
reads it instead of re-deriving codings or cells.  Rows are observations (one
per participant for between-participant designs).

Columns: the intercept first (if any), then the terms in the order given; within
a term the product of its members' columns, the first member varying slowest
(``numpy.kron`` order).  An interaction's columns are elementwise products of its
members' columns (factor by factor, factor by covariate, covariate by covariate).
A factor whose term lacks its marginal term is coded fully (all its levels; see
:mod:`.marginality`), so every coding spans the same columns.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cached_property
from itertools import product

import numpy as np
import pandas as pd

from ..errors import ModelError, SpecError
from .coding import FactorCoding, make_coding
from .marginality import Subterm, term_subterms
from .spec import ModelSpec, Term, term_label
from .table import Sample

#: A cell: one level of every model factor, in the design's factor order.
Cell = tuple[str, ...]


@dataclass(frozen=True)
class CovariateCoding:
    """How a covariate's raw values become its design column: ``(x - centre) / scale``.

    Attributes
    ----------
    name : str
    center_kind : {"mean", "none", "value", "within"}
    center : float or dict
        The value subtracted; for ``within`` a dict level -> that level's mean.
    within : str or None
        The factor whose levels get their own centre.
    scale : float
        The divisor (1.0 unless ``"scale": "sd"``, then the SD over included observations, ddof=1).
    mean, sd : float
        Raw mean and SD (ddof=1) over the included observations.
    """

    name: str
    center_kind: str
    center: float | dict[str, float]
    within: str | None
    scale: float
    mean: float
    sd: float

    def transform(self, raw: np.ndarray | float, within_level: np.ndarray | str | None = None) -> np.ndarray:
        """Design-column value(s) for raw covariate value(s)."""
        raw = np.asarray(raw, dtype=float)
        if self.within is None:
            c = np.asarray(self.center, dtype=float)
        else:
            assert isinstance(self.center, dict) and within_level is not None
            lv = np.asarray(within_level, dtype=object)
            c = np.vectorize(self.center.__getitem__, otypes=[float])(lv)
        return (raw - c) / self.scale

    def default_hold(self, within_level: str | None = None) -> float:
        """The raw value at which hypotheses hold this covariate unless told otherwise.

        The overall mean over included observations, so that centring changes no hypothesis; with
        ``center: {"within": f}`` each level's own mean, since that is what within-centring asks for.
        """
        if self.within is not None and within_level is not None:
            assert isinstance(self.center, dict)
            return self.center[within_level]
        return self.mean

    @property
    def is_centred(self) -> bool:
        return self.center_kind != "none" and not (self.center_kind == "value" and self.center == 0.0)

    def as_dict(self) -> dict[str, object]:
        return {
            "center": self.center_kind,
            "center_value": self.center,
            "within": self.within,
            "scale": self.scale,
            "mean": self.mean,
            "sd": self.sd,
        }


@dataclass(frozen=True)
class Column:
    """One design column.

    ``parts`` has one entry per term member in the column: ``(factor, coding-column label)`` or
    ``(covariate, None)``; ``full`` names the factors coded fully (all levels) in it by the marginality rule.
    """

    name: str
    term: Term
    parts: tuple[tuple[str, str | None], ...]
    full: tuple[str, ...] = ()

    @property
    def term_label(self) -> str:
        return term_label(self.term)


@dataclass(frozen=True)
class Design:
    """A design matrix that knows what it means.

    Attributes
    ----------
    matrix : ndarray, shape (n_observations, n_columns)
        float64.
    columns : tuple of Column
    terms : tuple of Term
        The intercept (empty tuple) first if present, then the model terms.
    term_columns : dict
        Term -> slice of its columns.
    factors : dict
        Model factor -> its FactorCoding, in the design's factor order (the cell order).
    covariates : dict
        Model covariate -> its CovariateCoding.
    observations : DataFrame
        One row per design row: ``participant_id``, ``row`` (in the table), factor levels, raw covariates.
    """

    matrix: np.ndarray
    columns: tuple[Column, ...]
    terms: tuple[Term, ...]
    term_columns: dict[Term, slice]
    factors: dict[str, FactorCoding]
    covariates: dict[str, CovariateCoding]
    observations: pd.DataFrame
    intercept: bool
    sample: Sample | None = field(default=None, repr=False, compare=False)
    #: Term -> its column blocks (:func:`.marginality.term_subterms`); a term not listed is one block with every
    #: factor coded by its contrasts.
    term_blocks: dict[Term, tuple[Subterm, ...]] = field(default_factory=dict, repr=False, compare=False)

    # ----- shape and names -------------------------------------------------
    @property
    def n_observations(self) -> int:
        return self.matrix.shape[0]

    @property
    def n_columns(self) -> int:
        return self.matrix.shape[1]

    @property
    def column_names(self) -> list[str]:
        return [c.name for c in self.columns]

    @property
    def participant_ids(self) -> list[str]:
        return self.observations["participant_id"].tolist()

    def column_index(self, name: str) -> int:
        return self.column_names.index(name)

    # ----- cells -------------------------------------------------------------
    @cached_property
    def cells(self) -> tuple[Cell, ...]:
        """Every cell of the crossing of the model factors (first factor slowest); ``((),)`` without factors."""
        return tuple(product(*(f.levels for f in self.factors.values())))

    @cached_property
    def observation_cells(self) -> np.ndarray:
        """Index into :attr:`cells` of every observation, shape (n,)."""
        index = {c: i for i, c in enumerate(self.cells)}
        names = list(self.factors)
        if not names:
            return np.zeros(self.n_observations, dtype=int)
        tuples = zip(*(self.observations[f].tolist() for f in names), strict=True)
        return np.array([index[t] for t in tuples], dtype=int)

    @cached_property
    def cell_counts(self) -> np.ndarray:
        """Observations per cell, shape (n_cells,)."""
        return np.bincount(self.observation_cells, minlength=len(self.cells))

    def cell_label(self, cell: Cell) -> str:
        return ", ".join(f"{f}={lv}" for f, lv in zip(self.factors, cell, strict=True)) or "all observations"

    def hold_values(self, cell: Cell, at: Mapping[str, float] | None = None) -> dict[str, float]:
        """Raw covariate values at which a cell's design row is taken (``at`` overrides the defaults)."""
        levels = dict(zip(self.factors, cell, strict=True))
        out = {}
        for name, cov in self.covariates.items():
            if at and name in at:
                out[name] = float(at[name])
            else:
                out[name] = cov.default_hold(levels.get(cov.within) if cov.within else None)
        return out

    def row(self, levels: Mapping[str, str], covariates: Mapping[str, float]) -> np.ndarray:
        """The design row of one observation with these factor levels and raw covariate values, shape (p,)."""
        transformed = {
            name: float(cov.transform(covariates[name], levels.get(cov.within) if cov.within else None))
            for name, cov in self.covariates.items()
        }
        return self._row_transformed(levels, transformed)

    def blocks_of(self, term: Term) -> tuple[Subterm, ...]:
        """A term's column blocks: per block, its factors and whether each is coded fully."""
        return self.term_blocks.get(term, (tuple((m, False) for m in term if m in self.factors),))

    def coding_of(self, factor: str, full: bool) -> FactorCoding:
        """A factor's coding in a block: its own, or all its levels (indicator) when coded fully."""
        if not full:
            return self.factors[factor]
        fc = self.factors[factor]
        return make_coding(factor, fc.levels, "indicator", scores=fc.scores)

    def _row_transformed(self, levels: Mapping[str, str], transformed: Mapping[str, float]) -> np.ndarray:
        parts = []
        for term in self.terms:
            for block in self.blocks_of(term):
                full = dict(block)
                vec = np.ones(1)
                for m in term:
                    if m in self.factors and m not in full:
                        continue
                    member = (self.coding_of(m, full[m]).row(levels[m]) if m in self.factors
                              else np.array([transformed[m]]))
                    # kron order (first member slowest); outer().ravel() is the same for vectors and much faster
                    vec = np.outer(vec, member).ravel()
                parts.append(vec)
        return np.concatenate(parts)

    def cell_row(self, cell: Cell, at: Mapping[str, float] | None = None) -> np.ndarray:
        """Expected-value row of a cell with covariates held at :meth:`hold_values`, shape (p,)."""
        levels = dict(zip(self.factors, cell, strict=True))
        return self.row(levels, self.hold_values(cell, at))

    def cell_rows(self, at: Mapping[str, float] | None = None) -> np.ndarray:
        """Design rows of all cells, shape (n_cells, p)."""
        return np.array([self.cell_row(c, at) for c in self.cells]).reshape(len(self.cells), self.n_columns)

    def cell_slope_row(self, cell: Cell, covariate: str, at: Mapping[str, float] | None = None) -> np.ndarray:
        """Derivative of a cell's design row with respect to the raw covariate, shape (p,).

        The design is multilinear in the transformed covariates (a covariate enters a term at most once), so
        the derivative is a difference of rows at transformed values 1 and 0, divided by the scale.
        """
        levels = dict(zip(self.factors, cell, strict=True))
        hold = self.hold_values(cell, at)
        transformed = {
            n: float(c.transform(hold[n], levels.get(c.within) if c.within else None))
            for n, c in self.covariates.items()
        }
        hi = self._row_transformed(levels, {**transformed, covariate: 1.0})
        lo = self._row_transformed(levels, {**transformed, covariate: 0.0})
        return (hi - lo) / self.covariates[covariate].scale

    def column_sidecar(self) -> list[dict[str, object]]:
        """Per column: name, term, and the coding of each member (for design.json)."""
        out = []
        for col in self.columns:
            members = []
            for m, label in col.parts:
                if m in col.full:
                    members.append({"factor": m, "column": label, "coding": "indicator", "reference": None,
                                    "levels": list(self.factors[m].levels),
                                    "coded_fully": "marginality rule: the term without this factor is not in the "
                                                   "model, so all its levels are coded within the term"})
                elif m in self.factors:
                    fc = self.factors[m]
                    members.append({"factor": m, "column": label, "coding": fc.scheme, "reference": fc.reference,
                                    "levels": list(fc.levels)})
                else:
                    members.append({"covariate": m, **self.covariates[m].as_dict()})
            out.append({"name": col.name, "term": col.term_label, "members": members})
        return out


def _covariate_coding(spec: ModelSpec, name: str, data: pd.DataFrame) -> CovariateCoding:
    cs = spec.covariates[name]
    x = data[name].to_numpy(dtype=float)
    mean = float(x.mean())
    sd = float(x.std(ddof=1)) if x.size > 1 else 0.0
    scale = 1.0
    if cs.scale == "sd":
        if not sd > 0:
            raise ModelError(
                f"covariate {name}: cannot scale by its SD, which is 0 over the included participants; "
                'remove "scale": "sd" or the covariate'
            )
        scale = sd
    within = cs.within
    if within is not None:
        if within not in spec.model_factors():
            raise SpecError(
                f"{spec.name} $.covariates.{name}.center.within: factor {within!r} is not in the model terms; "
                "add it to terms or centre on the overall mean"
            )
        groups = data.groupby(within, sort=False)[name].mean()
        center: float | dict[str, float] = {str(k): float(v) for k, v in groups.items()}
        kind = "within"
    elif cs.center == "mean":
        center, kind = mean, "mean"
    elif cs.center == "none":
        center, kind = 0.0, "none"
    else:
        assert isinstance(cs.center, int | float)
        center, kind = float(cs.center), "value"
    return CovariateCoding(name, kind, center, within, scale, mean, sd)


#: The parts of one column: ``(member, coding-column label)`` for a factor, ``(member, None)`` for a covariate.
ColumnParts = tuple[tuple[str, str | None], ...]


def _term_block(term: Term, data: pd.DataFrame, factors: Mapping[str, FactorCoding],
                covariates: Mapping[str, CovariateCoding]) -> tuple[np.ndarray, list[ColumnParts]]:
    """A block's columns (n, k): elementwise products of its members' columns, the first member slowest; and
    each column's parts (one ``(member, coding-column label or None)`` per member).  ``factors`` holds the
    coding of each factor in the block (a factor of the term not in it is left out)."""
    n = len(data)
    block = np.ones((n, 1))
    labels: list[ColumnParts] = [()]
    for m in term:
        if m not in covariates and m not in factors:
            continue
        if m in factors:
            fc = factors[m]
            idx = np.array([fc.levels.index(v) for v in data[m]])
            member = fc.matrix[idx]
            member_labels: list[tuple[str, str | None]] = [(m, lab) for lab in fc.labels]
        else:
            cov = covariates[m]
            member = cov.transform(data[m].to_numpy(float), data[cov.within] if cov.within else None)[:, None]
            member_labels = [(m, None)]
        block = (block[:, :, None] * member[:, None, :]).reshape(n, -1)
        labels = [old + (new,) for old in labels for new in member_labels]
    return block, labels


def _all_columns(terms: list[Term], term_blocks: Mapping[Term, tuple[Subterm, ...]], data: pd.DataFrame,
                 factors: Mapping[str, FactorCoding], covariates: Mapping[str, CovariateCoding],
                 ) -> tuple[list[np.ndarray], list[Column], dict[Term, slice]]:
    """Every term's column blocks (a factor coded fully where the marginality rule says so), its columns and
    its slice of the design."""
    blocks: list[np.ndarray] = []
    columns: list[Column] = []
    term_columns: dict[Term, slice] = {}
    start = 0
    for term in terms:
        width = 0
        for sub in term_blocks.get(term, ((),)):
            codings = {f: make_coding(f, factors[f].levels, "indicator", scores=factors[f].scores) if full
                       else factors[f] for f, full in sub}
            block, labels = _term_block(term, data, codings, covariates)
            blocks.append(block)
            full_factors = tuple(f for f, full in sub if full)
            for parts in labels:
                name = "intercept" if not parts else ":".join(lab if lab is not None else m for m, lab in parts)
                columns.append(Column(name, term, parts, full_factors))
            width += block.shape[1]
        term_columns[term] = slice(start, start + width)
        start += width
    return blocks, columns, term_columns


def build_design(spec: ModelSpec, sample: Sample) -> Design:
    """Build the design of ``spec`` on the observations of ``sample``.

    Raises
    ------
    ModelError
        No observations, or no columns.
    """
    data = sample.data
    n = len(data)
    if n == 0:
        raise ModelError(
            f"{sample.source.name}: no participant is left after include/exclude and n/a exclusions; "
            "check the filters and missing values"
        )
    factors: dict[str, FactorCoding] = {}
    for f in spec.model_factors():
        fs = spec.factors[f]
        factors[f] = make_coding(f, sample.levels[f], fs.coding, fs.reference, fs.scores)
    covariates = {c: _covariate_coding(spec, c, data) for c in spec.model_covariates()}

    terms: list[Term] = ([()] if spec.intercept else []) + list(spec.terms)
    term_blocks = term_subterms(spec.terms, factors, spec.intercept)
    blocks, columns, term_columns = _all_columns(terms, term_blocks, data, factors, covariates)
    if not columns:
        raise ModelError(
            f"{spec.name}: the model has no columns (no intercept and no terms); add terms or set intercept true"
        )
    matrix = np.hstack(blocks).astype(float)
    obs_cols = ["participant_id", "row"] + list(factors) + list(covariates)
    extra = [c for c in spec.columns_used() if c not in obs_cols]
    observations = data[obs_cols + extra].copy()
    return Design(
        matrix=matrix,
        columns=tuple(columns),
        terms=tuple(terms),
        term_columns=term_columns,
        factors=factors,
        covariates=covariates,
        observations=observations,
        intercept=spec.intercept,
        sample=sample,
        term_blocks=term_blocks,
    )
