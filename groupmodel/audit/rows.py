"""Rows of a hand-written design: which participant each row is, rows out of place, image lists.

Part of ``groupmodel check`` (see :mod:`groupmodel.audit`).  Rows follow the participants table (after the
spec's exclusions, or after rows with n/a when that makes the count fit) unless the design has a
``participant_id`` column.  A row whose factor columns carry another cell's coding is out of place; one whose
coding matches no cell is miscoded; an image list is checked against the participant ids in its paths.
"""

from __future__ import annotations

import dataclasses
import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import TableError
from ..model.table import MISSING, read_sidecar_levels
from .columns import ColumnRole, TableView
from .read import listing, num_text, participant_in_path, read_image_list

#: Designs up to this many rows get a search for the one missing or extra row when the count is off by one.
GUESS_MAX_ROWS = 400


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


@dataclass
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


def prepare_table(frame: pd.DataFrame, path: Path, factors: Sequence[str] | None, covariates: Sequence[str] | None,
                   spec_levels: Mapping[str, tuple[str, ...]] | None, spec_scores: Mapping[str, Any] | None,
                   rows: np.ndarray | None) -> PreparedTable:
    """Choose factor and covariate columns (given, or every plausible column) and code them for every row.

    ``rows`` limits automatic choices to the table rows the design could use (None: all).
    """
    sidecar_path = path.with_suffix(".json")
    sidecar = read_sidecar_levels(sidecar_path) if sidecar_path.exists() else {}
    columns = [c for c in frame.columns if c != "participant_id"]
    for given, what in ((factors, "--factors"), (covariates, "--covariates")):
        for c in given or ():
            if c not in frame.columns:
                raise TableError(
                    f"{what}: column {c!r} is not in {path.name} (columns {columns}); fix the name"
                )
    sub = frame if rows is None else frame.iloc[rows]
    explicit_factors, explicit_covariates = factors is not None, covariates is not None
    if factors is None:
        factors = []
        for c in columns:
            vals = [v for v in sub[c].tolist() if v not in MISSING]
            distinct = set(vals)
            if 2 * len(vals) < len(sub) or len(distinct) < 2 or len(distinct) > 12:
                continue
            if all(_is_float(v) for v in distinct) and len(distinct) > 2:
                continue
            factors.append(c)
    if covariates is None:
        covariates = []
        for c in columns:
            if c in factors:
                continue
            vals = [v for v in sub[c].tolist() if v not in MISSING]
            if 2 * len(vals) >= len(sub) and all(_is_float(v) for v in vals) and len(set(vals)) > 2:
                covariates.append(c)
    out_levels: dict[str, tuple[str, ...]] = {}
    out_scores: dict[str, tuple[float, ...]] = {}
    codes: dict[str, np.ndarray] = {}
    for f in factors:
        values = frame[f].tolist()
        present = [v for v in values if v not in MISSING]
        if spec_levels and f in spec_levels:
            levels = tuple(spec_levels[f]) + tuple(sorted({v for v in present} - set(spec_levels[f])))
        else:
            levels = _order_levels(present, sidecar.get(f))
        out_levels[f] = levels
        sc = (spec_scores or {}).get(f)
        out_scores[f] = tuple(float(s) for s in sc) if sc is not None and len(sc) == len(levels) else tuple(
            float(i) for i in range(1, len(levels) + 1))
        index = {lv: i for i, lv in enumerate(levels)}
        codes[f] = np.array([index.get(v, -1) if v not in MISSING else -1 for v in values], dtype=int)
    covs: dict[str, np.ndarray] = {}
    for c in covariates:
        covs[c] = np.array([float(v) if v not in MISSING and _is_float(v) else np.nan for v in frame[c].tolist()])
    return PreparedTable(frame, path, out_levels, out_scores, codes, covs, explicit_factors, explicit_covariates)


class RowsMixin:
    """The row checks of :class:`groupmodel.audit._Auditor` (alignment, order, images)."""

    def _align(self) -> None:
        """Which table row every design row is (``self.align``), with the shape findings on rows."""
        rep, x = self.report, self.x_file
        frame = self.frame
        ids = frame["participant_id"].tolist()
        pos = {p: i for i, p in enumerate(ids)}
        n = x.n_rows
        tname = self.participants.name
        self.align = None
        self.hd = None
        self.roles: list[ColumnRole] = []
        sample_rows = None
        if self.sample is not None:
            sample_rows = np.array(self.sample.data["row"].tolist(), dtype=int) - 1
        spec_levels = self.sample.levels if self.sample is not None else None
        spec_scores = None
        if self.spec is not None:
            spec_scores = {f: fs.scores for f, fs in self.spec.factors.items() if fs.scores is not None}
        factors = self.given_factors
        covariates = self.given_covariates
        if factors is None and self.spec is not None:
            factors = list(self.spec.model_factors())
        if covariates is None and self.spec is not None:
            covariates = list(self.spec.model_covariates())

        if x.ids is not None:
            align = np.full(n, -1)
            unknown = []
            seen: dict[str, int] = {}
            for i, pid in enumerate(x.ids):
                if pid in seen:
                    rep.add("rows", "error", "duplicate_participant",
                            f"{x.where(i)}: participant_id {pid} already names row {seen[pid] + 1}; "
                            "give each participant one row")
                    continue
                seen[pid] = i
                if pid in pos:
                    align[i] = pos[pid]
                else:
                    unknown.append(f"row {i + 1} ({pid})")
            if unknown:
                rep.add("rows", "error", "unknown_participant",
                        f"{self.design_path.name}: participant_id not in {tname}: {listing(unknown)}; "
                        "fix the ids or add the participants to the table")
            if sample_rows is not None:
                in_design = set(align[align >= 0].tolist())
                missing = [ids[t] for t in sample_rows if t not in in_design]
                reasons = {e.participant_id: e.reason for e in self.sample.exclusions} if self.sample else {}
                in_sample = set(sample_rows.tolist())
                extra = [f"{ids[t]} ({reasons.get(ids[t], 'left out')})" for t in align[align >= 0]
                         if t not in in_sample]
                if missing or extra:
                    parts = []
                    if missing:
                        parts.append(f"missing {len(missing)} participant(s) the spec includes: {listing(missing)}")
                    if extra:
                        parts.append(f"has {len(extra)} the spec leaves out: {listing(extra)}")
                    rep.add("rows", "error", "row_count",
                            f"{self.design_path.name} has {n} rows, {self.spec_path.name if self.spec_path else ''} "
                            f"includes {len(sample_rows)} participants of {tname}: it " + "; it ".join(parts)
                            + "; make the design rows the spec's participants")
            else:
                in_design = set(align[align >= 0].tolist())
                absent = [ids[t] for t in range(len(ids)) if t not in in_design]
                if absent:
                    rep.add("rows", "note", "not_in_design",
                            f"{len(absent)} participant(s) of {tname} have no design row: {listing(absent)}")
            self.table = prepare_table(frame, self.participants, factors, covariates, spec_levels, spec_scores,
                                        align[align >= 0])
            self._finish_align(align)
            return

        # No ids: rows follow the table (after the spec's exclusions, or after n/a rows if that fits).
        if sample_rows is not None:
            expected = sample_rows
            how = f"{self.spec_path.name if self.spec_path else 'the spec'} includes {len(expected)} " \
                  f"participants of {tname}"
        else:
            expected = np.arange(len(frame))
            how = f"{tname} has {len(expected)} participants"
            if n != len(expected):
                alt = self._drop_missing(factors, covariates)
                if alt is not None and len(alt[0]) == n:
                    expected, cols = alt
                    dropped = [ids[t] for t in range(len(frame)) if t not in set(expected.tolist())]
                    rep.add("rows", "note", "rows_after_na",
                            f"{self.design_path.name} has {n} rows: it matches {tname} with the "
                            f"{len(dropped)} row(s) that have n/a in {', '.join(cols)} left out "
                            f"({listing(dropped)})")
        self.table = prepare_table(frame, self.participants, factors, covariates, spec_levels, spec_scores,
                                    expected)
        if n == len(expected):
            self._finish_align(np.asarray(expected))
            return
        diff = n - len(expected)
        words = f"{abs(diff)} row{'s' * (abs(diff) != 1)} {'too many' if diff > 0 else 'too few'}"
        message = f"{self.design_path.name} has {n} rows, but {how}: {words}"
        fix = "; give one row per participant in table order, or add a participant_id column"
        # One row too many or too few: try every position (a few hundred quick identifications at most).
        guess = self._guess_one(np.asarray(expected)) if abs(diff) == 1 and n <= GUESS_MAX_ROWS else None
        if guess is None:
            rep.add("rows", "error", "row_count", message + fix
                    + "; the checks that need the table (columns, cells, contrast statements) were skipped")
            return
        align, text = guess
        rep.add("rows", "error", "row_count", message + f"; {text}" + fix)
        self._finish_align(align)

    def _drop_missing(self, factors: list[str] | None, covariates: list[str] | None
                      ) -> tuple[np.ndarray, list[str]] | None:
        """Table rows without n/a in the given columns (or, with none given, in some set of columns)."""
        frame = self.frame
        na = {c: frame[c].isin(MISSING).to_numpy() for c in frame.columns if c != "participant_id"}
        given = list(factors or []) + list(covariates or [])
        if given:
            cols = [c for c in given if c in na]
            bad = np.zeros(len(frame), dtype=bool)
            for c in cols:
                bad |= na[c]
            return np.flatnonzero(~bad), [c for c in cols if na[c].any()]
        with_na = [c for c in na if na[c].any()]
        target = self.x_file.n_rows
        found: dict[tuple[int, ...], list[str]] = {}
        for k in range(1, min(len(with_na), 5) + 1):
            for cols in combinations(with_na, k):
                bad = np.zeros(len(frame), dtype=bool)
                for c in cols:
                    bad |= na[c]
                if (~bad).sum() == target:
                    found.setdefault(tuple(np.flatnonzero(~bad).tolist()), list(cols))
        if len(found) == 1:
            rows, cols = next(iter(found.items()))
            return np.array(rows, dtype=int), cols
        return None

    def _guess_one(self, expected: np.ndarray) -> tuple[np.ndarray, str] | None:
        """With one row too many or too few and no ids: the single row whose removal explains every column."""
        x = self.x_file
        n, p = x.values.shape
        ids = self.table.ids
        best: list[tuple[int, np.ndarray]] = []
        if n == len(expected) - 1:
            for t in range(len(expected)):
                align = np.delete(expected, t)
                if self._score(align) == p:
                    best.append((t, align))
            if len(best) == 1:
                t, align = best[0]
                pid = ids[expected[t]]
                return align, f"the rows match the participants if {pid} ({self.participants.name} row " \
                              f"{expected[t] + 1}) is the one left out"
        elif n == len(expected) + 1:
            for d in range(n):
                align = np.insert(expected, d, -1)
                if self._score(align) == p:
                    best.append((d, align))
            if len(best) == 1:
                d, align = best[0]
                return align, f"the rows match the participants if design row {d + 1} " \
                              f"({self.design_path.name} line {x.lines[d]}) is dropped"
        return None

    def _score(self, align: np.ndarray) -> int:
        """How many columns a quick identification (factor codings and plain covariates) explains."""
        view = self.table.view(align)
        x = self.x_file
        count = 0
        names = list(view.factors)
        from .columns import _covariate_fit, _factor_function

        for j in range(x.n_columns):
            col, tol = x.values[:, j], x.tolerance(j)
            if _factor_function(col, tol, view, names) is not None:
                count += 1
                continue
            if any(_covariate_fit(col, tol, view, [], c) is not None for c in view.covariates):
                count += 1
        return count

    def _finish_align(self, align: np.ndarray) -> None:
        """Record which table row every design row is (``self.claimed`` keeps it as the file claims it)."""
        self.align = np.asarray(align, dtype=int)
        self.claimed = self.align.copy()

    def _missing_values(self, factors: Sequence[str], covariates: Sequence[str]) -> None:
        """Design rows of participants whose entry in a column the design uses is n/a: an error."""
        table = self.table
        ids = table.ids
        problems = []
        for i, t in enumerate(self.claimed):
            if t < 0:
                continue
            cols = [f for f in factors if table.codes[f][t] < 0] + [
                c for c in covariates if not np.isfinite(table.covariates[c][t])]
            if cols:
                problems.append(f"row {i + 1} ({ids[t]}: {', '.join(cols)})")
        if problems:
            self.report.add("rows", "error", "missing_value_row",
                            f"{self.design_path.name}: design rows of participants whose "
                            f"{self.participants.name} entry is n/a: {listing(problems)}; the design gives them "
                            "values the table does not have: leave them out or fill in the table")

    # ----- columns -----------------------------------------------------------------------------
    def _row_order(self, view: TableView, roles: list[ColumnRole]) -> tuple[np.ndarray, np.ndarray] | None:
        """Rows whose factor columns disagree with their participant's levels (out of place, or miscoded).

        The factor columns of a correct design take one pattern per cell.  The pattern most rows of a cell
        share is that cell's coding; a row with another cell's pattern is out of place, a row with no cell's
        pattern is miscoded.  Returns a corrected alignment and the rows to leave out of the identification,
        or None when every row agrees.
        """
        rep, x = self.report, self.x_file
        if not (self.table.explicit_factors or self.spec is not None) or not view.factors:
            return None  # the factors are not known before the columns are read: no order to check against
        valid = view.valid
        names = list(view.factors)
        cell_key = view.key(tuple(names))
        # A coding takes at most one value per cell; columns with more values are covariates, left out here.
        n_cells = max(2, len(np.unique(cell_key[valid])))
        discrete = [r.index for r in roles if r.kind in ("unexplained", "factor", "interaction", "cell_function")
                    and len(np.unique(np.round(x.values[valid, r.index], 9))) <= n_cells]
        if not any(roles[j].kind == "unexplained" for j in discrete):
            return None
        tol = np.array([2 * x.tolerance(j) for j in discrete])
        patterns = [tuple(np.round(x.values[i, discrete] / tol).astype(int).tolist()) for i in range(x.n_rows)]
        majority: dict[int, tuple[int, ...]] = {}
        for k in np.unique(cell_key[valid]):
            rows = np.flatnonzero(valid & (cell_key == k))
            pat, count = Counter(patterns[i] for i in rows).most_common(1)[0]
            if count * 2 > len(rows):
                majority[int(k)] = pat
        misfit = [i for i in np.flatnonzero(valid) if int(cell_key[i]) in majority
                  and patterns[i] != majority[int(cell_key[i])]]
        if not misfit:
            return None
        by_pattern: dict[tuple[int, ...], list[int]] = {}
        for k, pat in majority.items():
            by_pattern.setdefault(pat, []).append(k)
        dims = view.dims(tuple(names))

        def cell_text(k: int) -> str:
            idx = np.unravel_index(k, dims)
            return ", ".join(f"{f}={view.factors[f][i]}" for f, i in zip(names, idx, strict=True))

        ids = self.table.ids
        decoded = {i: by_pattern.get(patterns[i]) for i in misfit}
        reorder = all(decoded[i] for i in misfit) and Counter(patterns[i] for i in misfit) == Counter(
            majority[int(cell_key[i])] for i in misfit)
        invalid = np.zeros(x.n_rows, dtype=bool)
        if reorder:
            align = self.align.copy()
            assign = self._reassign(misfit, patterns, majority, cell_key, view, discrete)
            texts = []
            for i in misfit:
                texts.append(f"row {i + 1} ({ids[self.align[i]]}, {cell_text(int(cell_key[i]))}) is coded as "
                             f"{' or '.join(cell_text(k) for k in decoded[i] or [])}")
            for i, t in assign.items():
                align[i] = t
            swaps = [(i, j) for i, j in combinations(misfit, 2) if assign.get(i) == self.align[j]
                     and assign.get(j) == self.align[i]]
            swap_text = ""
            if swaps and len(swaps) * 2 == len(misfit):
                swap_text = " (" + "; ".join(f"rows {i + 1} and {j + 1} look swapped" for i, j in swaps) + ")"
            rep.add("rows", "error", "rows_out_of_place",
                    f"{self.design_path.name}: the rows match the participants' factor levels only after "
                    f"reordering{swap_text}: {listing(texts, '; ')}; put the rows in {self.participants.name} order "
                    "or add a participant_id column (the rest of this report reads them reordered)")
            return align, invalid
        for i in misfit:
            t = self.align[i]
            expect = majority[int(cell_key[i])]
            if decoded[i]:
                what = f"is coded as {' or '.join(cell_text(k) for k in decoded[i] or [])}"
            else:
                diffs = [f"{self.labels[j]} is {num_text(x.values[i, j])} where the other rows of that cell have "
                         f"{num_text(expect[d] * tol[d])}"
                         for d, j in enumerate(discrete) if patterns[i][d] != expect[d]]
                what = "matches no cell's coding: " + "; ".join(diffs)
            rep.add("rows", "error", "row_coding",
                    f"{x.where(i)} is {ids[t]} ({cell_text(int(cell_key[i]))}) but {what}; fix the row "
                    "(the rest of this report leaves it out when reading the columns)")
            invalid[i] = True
        return self.align.copy(), invalid

    def _reassign(self, misfit: list[int], patterns: list[tuple[int, ...]], majority: dict[int, tuple[int, ...]],
                  cell_key: np.ndarray, view: TableView, discrete: list[int]) -> dict[int, int]:
        """Match out-of-place rows to the participants of those places: same coding, nearest covariate columns."""
        from scipy.optimize import linear_sum_assignment

        x = self.x_file
        slots = [self.align[i] for i in misfit]
        expected = [majority[int(cell_key[i])] for i in misfit]
        cost = np.array([[0.0 if patterns[i] == expected[b] else 1e6 for b in range(len(misfit))] for i in misfit])
        others = [j for j in range(x.n_columns) if j not in discrete]
        covs = list(view.covariates)
        if others and covs:
            fit_rows = np.array([i for i in np.flatnonzero(view.valid) if i not in set(misfit)])
            basis_full = np.column_stack([np.ones(len(self.table.frame))] + [self.table.covariates[c] for c in covs])
            basis = basis_full[self.align[fit_rows]]
            ok = np.isfinite(basis).all(axis=1)
            if ok.sum() > basis.shape[1]:
                coef, *_ = np.linalg.lstsq(basis[ok], x.values[fit_rows[ok]][:, others], rcond=None)
                pred = np.nan_to_num(basis_full[slots] @ coef)
                sd = x.values[:, others].std(axis=0) + 1e-12
                for a, i in enumerate(misfit):
                    cost[a] += (((x.values[i, others] - pred) / sd) ** 2).sum(axis=1)
        r, c = linear_sum_assignment(cost)
        return {misfit[a]: int(slots[b]) for a, b in zip(r, c, strict=True)}

    def _images(self) -> None:
        rep = self.report
        assert self.images_path is not None
        entries = read_image_list(self.images_path)
        name = self.images_path.name
        n = self.x_file.n_rows
        if self.x_file.ids is not None:
            claimed = list(self.x_file.ids)
        elif getattr(self, "claimed", None) is not None:
            ids = self.table.ids
            claimed = [ids[t] if t >= 0 else "?" for t in self.claimed]
        else:
            rep.add("rows", "note", "images_unchecked",
                    f"{name}: the design rows could not be matched to participants, so the image order was not checked")
            return
        found = [(ln, path, participant_in_path(path)) for ln, path in entries]
        no_id = [f"line {ln}" for ln, _, pid in found if pid is None]
        if no_id:
            rep.add("rows", "warning", "image_no_id",
                    f"{name}: no participant id (sub-<label>) in the path at {listing(no_id)}, so the order of "
                    "those images cannot be checked; name the files with the BIDS sub-<label>")
        claimed_set = set(claimed)
        listed = {pid for _, _, pid in found if pid}
        extra = [f"line {ln} ({pid})" for ln, _, pid in found if pid and pid not in claimed_set]
        absent = [f"row {i + 1} ({pid})" for i, pid in enumerate(claimed) if pid not in listed]
        if len(entries) != n or extra or absent:
            parts = []
            if extra:
                parts.append(f"images of participants with no design row at {listing(extra)}")
            if absent:
                parts.append(f"no image for design {listing(absent)}")
            detail = ": " + "; ".join(parts) if parts else ""
            rep.add("rows", "error", "image_count",
                    f"{name} lists {len(entries)} images, the design has {n} rows{detail}; list one image per "
                    "design row, in row order")
        # Order: the images of design participants against the design rows of listed participants.
        seq = [(ln, pid) for ln, _, pid in found if pid in claimed_set]
        rows = [(i, pid) for i, pid in enumerate(claimed) if pid in listed]
        wrong = [f"line {ln} is {pid} but design row {i + 1} is {want}"
                 for (ln, pid), (i, want) in zip(seq, rows, strict=False) if pid != want]
        if wrong:
            rep.add("rows", "error", "image_order",
                    f"{name} does not follow the design rows (the same participants in another order): "
                    f"{listing(wrong)}; list the images in design-row order")
        base = self.images_path.parent
        missing = [f"line {ln}" for ln, p in entries if not (Path(p).exists() or (base / p).exists())]
        if missing:
            rep.add("rows", "note", "image_missing",
                    f"{name}: {len(missing)} listed image(s) do not exist (relative to the current folder or to "
                    f"{name}'s folder): {listing(missing)}")
        if not wrong and not extra and not absent and len(entries) == n and not no_id:
            rep.add("rows", "note", "image_order_ok",
                    f"{name}: the participant id in every image path matches its design row")
