"""Within-participant factors: each hypothesis in its error stratum.

With an observations table (several images per participant), every hypothesis is still written as weights over
cell means, the cells now crossing the between-participant factors with the within-participant ones.  Rewritten
per participant, a hypothesis row is ``sum_b sum_w W[b, w] mu[b, w]``; it is tested in one stratum when ``W``
is a product ``l c'`` of between-cell weights ``l`` and within-cell weights ``c`` (an F test: when its rows span
products ``L (x) C``):

* ``c`` the equal average over the within cells: the **between** stratum, on each participant's average;
* ``C`` orthogonal to that average (contrasts): the **within** stratum, on each participant's within contrasts
  (orthonormal when there are several: the multivariate-to-univariate reduction that gives the classical
  split-plot F, sphericity assumed);
* one ``c`` that is neither (e.g. the mean at one session): **mixed**, on each participant's weighted sum ``c``.

In every stratum the transformed data of each participant (a linear map of that participant's observations,
:meth:`Strata.transformed`) are fitted with the between-participant design, and the hypothesis is the
between weights ``l`` mapped through that design's cell rows.  A participant without an observation in a
within cell the hypothesis needs is left out of it (with the reason) and kept for the others.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from itertools import product
from typing import Literal

import numpy as np
import pandas as pd

from ..engine.linalg import RowSpace, independent_rows
from ..text import number_text
from .design import Cell, Design, build_design
from .hypotheses import Hypothesis
from .hypothesis_kinds import parse_at
from .spec import HypothesisSpec, ModelSpec
from .table import Sample, between_spec

Stratum = Literal["between", "within", "mixed"]

#: Relative tolerance of the rank of a hypothesis's weights arranged between x within.
RANK_TOL = 1e-9


@dataclass(frozen=True)
class StratumTest:
    """One hypothesis as tested in its stratum.

    Attributes
    ----------
    stratum : {"between", "within", "mixed"}
    within_weights : ndarray, shape (k, c)
        Applied to each participant's values over the within cells: the transformed data (c per participant).
    between_weights : ndarray, shape (a, p_b)
        Rows over the between-participant design columns.
    entered : ndarray of int
        Indices (into :attr:`Strata.participant_ids`) of the participants who enter this hypothesis.
    left_out : tuple of (participant_id, reason)
    transformed : str
        What the transformed data are, in words.
    problems : tuple of str
        Why it cannot be tested in a stratum (empty when it can).
    """

    name: str
    stratum: Stratum
    test: Literal["t", "F"]
    tail: str
    within_weights: np.ndarray
    between_weights: np.ndarray
    entered: np.ndarray
    left_out: tuple[tuple[str, str], ...]
    transformed: str
    problems: tuple[str, ...] = ()
    #: The between rows over the between-participant cells (before the design's cell rows): is the between
    #: part a mean (weights not summing to 0) or a comparison?  Decides sign flips or permutations.
    between_cells: np.ndarray | None = None

    @property
    def is_t(self) -> bool:
        """A t test in its stratum: one between row and one transformed value per participant."""
        return self.test == "t" and self.between_weights.shape[0] * self.within_weights.shape[1] == 1

    @property
    def within_df(self) -> int:
        """Columns of transformed data per participant (the within-participant df of an F test)."""
        return int(self.within_weights.shape[1])

    def as_dict(self, strata: Strata) -> dict[str, object]:
        return {
            "stratum": self.stratum,
            "transformed_data": self.transformed,
            "within_weights": {strata.cell_label(w): self.within_weights[i].tolist()
                               for i, w in enumerate(strata.within_cells)},
            "between_weights": {n: self.between_weights[:, j].tolist()
                                for j, n in enumerate(strata.between.column_names)},
            "participants": len(self.entered),
            "left_out": [{"participant_id": p, "reason": r} for p, r in self.left_out],
            **({"problems": list(self.problems)} if self.problems else {}),
        }


@dataclass(frozen=True)
class Strata:
    """Participants, their observations over the within cells, the between design and every hypothesis's test.

    ``observation_index[i, w]`` is the row (in the design / sample data) of participant ``i``'s observation in
    within cell ``w``, or -1 when there is none.
    """

    within_factors: tuple[str, ...]
    within_cells: tuple[Cell, ...]
    participant_ids: tuple[str, ...]
    observation_index: np.ndarray
    between: Design
    tests: dict[str, StratumTest]

    @property
    def n_observations(self) -> int:
        return int((self.observation_index >= 0).sum())

    def cell_label(self, cell: Cell) -> str:
        return ", ".join(f"{f}={lv}" for f, lv in zip(self.within_factors, cell, strict=True))

    def transformed(self, name: str, values: np.ndarray) -> np.ndarray:
        """A hypothesis's transformed data from values over the observations (n_obs, v): (n_entered, c, v).

        Row ``i * c + j`` of the result's (n_entered * c, v) reshaping is entered participant ``i``'s ``j``-th
        transformed value: the within weights' column ``j`` over that participant's observations.  They are
        gathered by within cell, (k, n_entered, v), and the (c, k) within weights applied in one product, so the
        work grows with the observations, not with their square as a dense (n_entered * c, n_obs) transform's
        would (1,000 participants x 4 sessions: 12 million multiply-adds per voxel)."""
        t = self.tests[name]
        k, c = t.within_weights.shape
        index = self.observation_index[t.entered].T  # (k, n_entered); -1: no observation (its weight unused)
        values = np.asarray(values, dtype=np.float64)
        gathered = values[np.where(index >= 0, index, 0)]  # (k, n_entered, v)
        gathered[index < 0] = 0.0
        z = t.within_weights.T @ gathered.reshape(k, -1)  # (c, n_entered * v)
        return np.ascontiguousarray(z.reshape(c, len(t.entered), values.shape[1]).transpose(1, 0, 2))

    def design_of(self, name: str) -> np.ndarray:
        """The between design over the participants who enter a hypothesis."""
        return self.between.matrix[self.tests[name].entered]


# --------------------------------------------------------------------------------------------------
# Building
# --------------------------------------------------------------------------------------------------
def between_design(spec: ModelSpec, design: Design) -> tuple[Design, tuple[str, ...]]:
    """The between-participant design, one row per participant (in order of first observation)."""
    sample = design.sample
    assert sample is not None
    bspec = between_spec(spec)
    obs = design.observations
    first = obs.drop_duplicates("participant_id", keep="first").reset_index(drop=True)
    cols = ["participant_id", "row", *bspec.columns_used()]
    data = pd.DataFrame({c: first[c] for c in cols})
    levels = {f: sample.levels[f] for f in bspec.model_factors()}
    people = Sample(data=data, exclusions=(), levels=levels, source=spec.participants)
    return build_design(bspec, people), tuple(first["participant_id"])


def build_strata(spec: ModelSpec, design: Design, hypotheses: Mapping[str, Hypothesis]) -> Strata:
    """Assign every hypothesis to its stratum (see the module text)."""
    within = spec.within_factors()
    between, ids = between_design(spec, design)
    within_cells = tuple(product(*(design.factors[f].levels for f in within)))
    index = np.full((len(ids), len(within_cells)), -1, dtype=int)
    pos = {p: i for i, p in enumerate(ids)}
    wpos = {c: j for j, c in enumerate(within_cells)}
    obs = design.observations
    for r, rec in enumerate(obs.to_dict("records")):
        index[pos[rec["participant_id"]], wpos[tuple(rec[f] for f in within)]] = r
    strata = Strata(within, within_cells, ids, index, between, {})
    cell_map = _cell_map(design, between, within)
    for name, h in hypotheses.items():
        strata.tests[name] = _stratum_test(strata, design, h, spec.hypotheses[name], cell_map)
    return strata


def _cell_map(design: Design, between: Design, within: tuple[str, ...]) -> np.ndarray:
    """For every cell of the full design, its (between cell, within cell) index pair, shape (n_cells, 2)."""
    names = list(design.factors)
    bpos = {c: i for i, c in enumerate(between.cells)}
    wcells = tuple(product(*(design.factors[f].levels for f in within)))
    wpos = {c: j for j, c in enumerate(wcells)}
    out = np.zeros((len(design.cells), 2), dtype=int)
    for i, cell in enumerate(design.cells):
        levels = dict(zip(names, cell, strict=True))
        out[i] = bpos[tuple(levels[f] for f in between.factors)], wpos[tuple(levels[f] for f in within)]
    return out


def _arranged(h: Hypothesis, cell_map: np.ndarray, nb: int, k: int) -> np.ndarray:
    """A hypothesis's cell weights arranged (q, between cell, within cell)."""
    assert h.cell_weights is not None
    out = np.zeros((h.cell_weights.shape[0], nb, k))
    out[:, cell_map[:, 0], cell_map[:, 1]] = h.cell_weights
    return out


def _span(rows: np.ndarray) -> np.ndarray:
    """An orthonormal basis of the row space of ``rows``, as rows."""
    _, s, vt = np.linalg.svd(rows, full_matrices=False)
    if s.size == 0 or s[0] == 0:
        return vt[:0]
    return vt[: int((s > RANK_TOL * s[0]).sum())]


def _stratum_test(strata: Strata, design: Design, h: Hypothesis, hs: HypothesisSpec,
                  cell_map: np.ndarray) -> StratumTest:
    k, nb = len(strata.within_cells), len(strata.between.cells)
    empty = np.zeros((k, 0)), np.zeros((0, strata.between.n_columns))
    if h.cell_weights is None:
        return _refused(h, empty, "raw weights over the design columns cannot be placed in an error stratum; "
                                  "state the hypothesis over cell means (main, compare, cells, ...)")
    w = _arranged(h, cell_map, nb, k)
    within_basis = _span(w.reshape(-1, k))  # (c, k)
    between_basis = _span(w.transpose(0, 2, 1).reshape(-1, nb))  # (a, nb)
    c, a = within_basis.shape[0], between_basis.shape[0]
    if np.linalg.matrix_rank(w.reshape(w.shape[0], -1), tol=None) != a * c:
        return _refused(h, empty, "its weights mix between- and within-participant parts that no single error "
                                  "stratum tests; split it into hypotheses of one kind each")
    average = np.ones(k) / np.sqrt(k)
    along = within_basis @ average
    if c == 1 and abs(abs(along[0]) - 1) < 1e-9:
        stratum: Stratum = "between"
    elif np.all(np.abs(along) < 1e-9):
        stratum = "within"
    elif c == 1:
        stratum = "mixed"
    else:
        return _refused(h, empty, "it tests participant averages and within-participant contrasts in one F test; "
                                  "split it into a between-participant and a within-participant hypothesis")
    if c == 1:
        cvec = np.ones(k) / k if stratum == "between" else _scaled(w)
        lrows = w @ cvec / (cvec @ cvec)  # (q, nb)
        within_weights = cvec[:, None]
    else:
        lrows, within_weights = between_basis, within_basis.T
    at = parse_at(design, hs)
    b = strata.between
    if h.on_slopes:
        basis = np.array([b.cell_slope_row(cell, h.on_slopes, at.values) for cell in b.cells])
    else:
        basis = b.cell_rows(at.values)
    lb = lrows @ basis
    if lb.shape[0] > 1:
        lb = lb[independent_rows(lb)]
    entered, left_out = _who_enters(strata, within_weights)
    problems = []
    if not RowSpace.of(b.matrix[entered]).contains(lb).all():
        problems.append(f"in the {stratum} stratum its weights are not estimable from the between-participant "
                        f"design of the {len(entered)} participants who enter it (check for empty groups)")
    return StratumTest(h.name, stratum, h.test, h.tail, within_weights, lb, entered, left_out,
                       _transformed_text(strata, stratum, within_weights), tuple(problems),
                       None if h.on_slopes else lrows)


def _refused(h: Hypothesis, empty: tuple[np.ndarray, np.ndarray], why: str) -> StratumTest:
    return StratumTest(h.name, "mixed", h.test, h.tail, empty[0], empty[1], np.zeros(0, dtype=int), (), "",
                       (why,))


def _scaled(w: np.ndarray) -> np.ndarray:
    """The within weights of a one-row hypothesis: its largest row over within cells, scaled so that its positive
    weights sum to 1 (``post - pre`` stays ``post - pre``; a single cell has weight 1)."""
    rows = w[0]
    c = rows[np.argmax(np.linalg.norm(rows, axis=1))]
    positive = c[c > 0].sum()
    return c / (positive if positive > 0 else np.abs(c).sum())


def _who_enters(strata: Strata, within_weights: np.ndarray) -> tuple[np.ndarray, tuple[tuple[str, str], ...]]:
    """Participants with an observation in every within cell the transformation uses; the others with why."""
    needed = np.flatnonzero(np.abs(within_weights).max(axis=1) > RANK_TOL) if within_weights.size else []
    entered, left_out = [], []
    for i, pid in enumerate(strata.participant_ids):
        missing = [strata.cell_label(strata.within_cells[w]) for w in needed if strata.observation_index[i, w] < 0]
        if missing:
            left_out.append((pid, f"no observation for {'; '.join(missing)}, which this hypothesis needs"))
        else:
            entered.append(i)
    return np.array(entered, dtype=int), tuple(left_out)


def _involved(strata: Strata, within_weights: np.ndarray) -> list[str]:
    """Within factors along which the transformation varies."""
    out = []
    cells = np.array(strata.within_cells, dtype=object).reshape(len(strata.within_cells), -1)
    for j, f in enumerate(strata.within_factors):
        others = [tuple(row[:j]) + tuple(row[j + 1:]) for row in cells]
        groups: dict[tuple[str, ...], list[int]] = {}
        for w, key in enumerate(others):
            groups.setdefault(key, []).append(w)
        if any(np.ptp(within_weights[idx], axis=0).max() > RANK_TOL for idx in groups.values() if len(idx) > 1):
            out.append(f)
    return out


def _sum_text(terms: list[tuple[float, str]]) -> str:
    """``[(1, "session=post"), (-1, "session=pre")]`` -> ``"[session=post] - [session=pre]"``."""
    out = ""
    for i, (x, label) in enumerate(terms):
        sign = ("-" if x < 0 else "+") if i else ("-" if x < 0 else "")
        size = "" if abs(abs(x) - 1) < 1e-12 else f"{number_text(abs(x))} x "
        out += (f" {sign} " if i else sign) + f"{size}[{label}]"
    return out


def _transformed_text(strata: Strata, stratum: Stratum, within_weights: np.ndarray) -> str:
    k, c = within_weights.shape
    if stratum == "between":
        return "each participant's average over the within-participant cells (" + \
            "; ".join(strata.cell_label(w) for w in strata.within_cells) + ")"
    involved = " x ".join(_involved(strata, within_weights)) or "the within-participant cells"
    if c > 1:
        return f"each participant's {c} orthonormal contrasts of {involved}"
    text = _sum_text([(float(x), strata.cell_label(cell))
                      for x, cell in zip(within_weights[:, 0], strata.within_cells, strict=True) if abs(x) > RANK_TOL])
    if stratum == "within":
        return f"each participant's contrast of {involved}: {text}"
    return (f"each participant's weighted sum {text} (neither an average nor a contrast: its error mixes "
            "between- and within-participant variation)")


def stratify(spec: ModelSpec, design: Design, hypotheses: dict[str, Hypothesis],
             ) -> tuple[Strata, dict[str, Hypothesis], list[tuple[str, str, str]]]:
    """The strata, the hypotheses with their statements saying where each is tested, and findings
    ``(severity, code, message)``: hypotheses no stratum tests are errors, participants left out are notes."""
    strata = build_strata(spec, design, hypotheses)
    out: dict[str, Hypothesis] = {}
    findings: list[tuple[str, str, str]] = []
    for name, h in hypotheses.items():
        t = strata.tests[name]
        for problem in t.problems:
            findings.append(("error", "stratum", f"hypothesis {name} cannot be tested: {problem}"))
        if t.left_out:
            who = ", ".join(f"{p} ({r})" for p, r in t.left_out)
            findings.append(("note", "stratum_left_out",
                             f"hypothesis {name}: {len(t.left_out)} participant(s) left out: {who}"))
        where = f" [tested in the {t.stratum} stratum on {t.transformed}]" if not t.problems else ""
        out[name] = replace(h, statement=h.statement + where)
    return strata, out, findings
