"""Contrasts of a hand-written design: estimability, what they test over cell means, the classic mistakes,
and the comparison with the hypotheses a spec generates.

Part of ``groupmodel check`` (see :mod:`groupmodel.audit`).  Statements reuse :mod:`groupmodel.hypotheses`
through :class:`HandDesign`, a :class:`~groupmodel.design.Design` whose cell rows come from the column
identification of :mod:`groupmodel.audit_columns`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import combinations
from typing import Any

import numpy as np

from ..errors import GroupModelError
from ..model.checks import dependent_columns, matrix_rank
from ..model.design import Design
from ..model.hypotheses import ESTIMABILITY_TOL, RowSpace, build_hypothesis, describe_cell_weights, independent_rows
from .read import num_text, row_text

#: An uncentred covariate only matters (a warning; contrasts held at 0) when its mean is this many SDs from 0.
UNCENTRED_MEAN_SD = 0.1


@dataclass(frozen=True)
class HandDesign(Design):
    """A :class:`~groupmodel.design.Design` over a hand-written matrix.

    The cells are those of the factors the identification found; each cell's design row (covariates at their
    mean) and each covariate's slope rows come from :func:`groupmodel.audit_columns.fill_cells` instead of
    from codings, so :mod:`groupmodel.hypotheses` can state hand contrasts over cell means.
    """

    audit_rows: np.ndarray | None = field(default=None, repr=False, compare=False)
    audit_slopes: dict[str, np.ndarray] = field(default_factory=dict, repr=False, compare=False)

    def cell_rows(self, at: Mapping[str, float] | None = None) -> np.ndarray:
        if at:
            raise ValueError("a hand design holds covariates at their mean only")
        assert self.audit_rows is not None
        return self.audit_rows

    def cell_row(self, cell: tuple[str, ...], at: Mapping[str, float] | None = None) -> np.ndarray:
        return self.cell_rows(at)[self.cells.index(cell)]

    def cell_slope_row(self, cell: tuple[str, ...], covariate: str, at: Mapping[str, float] | None = None
                       ) -> np.ndarray:
        return self.audit_slopes[covariate][self.cells.index(cell)]


@dataclass
class ContrastReport:
    """One hand contrast: the rows of the contrast file that share a name (an F test when more than one)."""

    name: str
    file_rows: list[int]
    weights: np.ndarray
    estimable: bool | None = None
    statement: str | None = None
    cell_weights: np.ndarray | None = None
    slope_of: str | None = None
    spec_matches: list[str] = field(default_factory=list)
    tol: float = 1e-12  # rounding of the typed weights (see MatrixFile.entry_tolerance)

    @property
    def test(self) -> str:
        return "t" if self.weights.shape[0] == 1 else "F"

    def as_dict(self, cells: Sequence[Mapping[str, str]] | None) -> dict[str, Any]:
        out: dict[str, Any] = {
            "name": self.name,
            "test": self.test,
            "file_rows": [r + 1 for r in self.file_rows],
            "weights": self.weights.tolist(),
            "estimable": self.estimable,
            "statement": self.statement,
        }
        if self.cell_weights is not None and cells is not None:
            # The same layout as contrasts.json of groupmodel build: weights over cell means, or over cell slopes.
            key = "slope_weights_over_cells" if self.slope_of else "weights_over_cells"
            out[key] = [{"cell": dict(c), "weight": self.cell_weights[:, i].tolist()}
                        for i, c in enumerate(cells) if np.any(np.abs(self.cell_weights[:, i]) > 1e-12)]
            if self.slope_of:
                out["slope_of"] = self.slope_of
        out["spec_matches"] = self.spec_matches
        return out


class ContrastsMixin:
    """The contrast checks of :class:`groupmodel.audit._Auditor`."""

    def _contrast_matrix(self) -> np.ndarray | None:
        """Contrast rows over the design columns (reordered by header names when both files have them)."""
        rep, c, x = self.report, self.c_file, self.x_file
        assert c is not None
        p = x.n_columns
        if c.ragged:
            rep.add("contrasts", "note", "stopped", "contrasts not checked until their rows have equal length")
            return None
        values = c.values
        if c.names and x.names:
            unknown = [nm for nm in c.names if nm not in x.names]
            absent = [nm for nm in x.names if nm not in c.names]
            if unknown or absent:
                parts = []
                if unknown:
                    parts.append(f"columns {unknown} are not design columns")
                if absent:
                    parts.append(f"design columns {absent} have no weights")
                rep.add("contrasts", "error", "contrast_columns",
                        f"{c.path.name} header: {'; '.join(parts)}; name one column per design column "
                        f"({x.names})")
                return None
            values = values[:, [c.names.index(nm) for nm in x.names]]
        elif c.n_columns != p:
            rep.add("contrasts", "error", "contrast_columns",
                    f"{c.path.name}: expected {p} weights per row (one per design column), found {c.n_columns} "
                    f"in every row (line {c.lines[0]} onward); give one weight per design column")
            return None
        if not np.isfinite(values).all():
            rep.add("contrasts", "note", "stopped", "contrasts not checked until every weight is a finite number")
            return None
        return values

    def _contrasts(self) -> None:
        rep, c = self.report, self.c_file
        if c is None:
            return
        values = self._contrast_matrix()
        if values is None:
            return
        groups: dict[str, list[int]] = {}
        for i in range(c.n_rows):
            name = c.labels[i] if c.labels and c.labels[i] else f"row {i + 1}"
            groups.setdefault(name, []).append(i)
        x = self.x_file.values
        space = RowSpace.of(x)
        canonical = self._canonical()
        for name, rows in groups.items():
            con = ContrastReport(name, rows, values[rows], tol=c.entry_tolerance(rows))
            rep.contrasts.append(con)
            self._one_contrast(con, space, canonical)

    def _where_rows(self, con: ContrastReport) -> str:
        assert self.c_file is not None
        lines = [str(self.c_file.lines[i]) for i in con.file_rows]
        return f"{self.c_file.path.name} line{'s' * (len(lines) > 1)} {', '.join(lines)}"

    def _title(self, con: ContrastReport) -> str:
        q = con.weights.shape[0]
        return f"contrast {con.name} [{con.test}{f', {q} rows' if q > 1 else ''}]"

    def _one_contrast(self, con: ContrastReport, space: RowSpace, canonical: dict[str, Any]) -> None:
        rep = self.report
        L = con.weights
        title = self._title(con)
        zero = [k for k in range(L.shape[0]) if np.abs(L[k]).max() <= con.tol]
        if zero:
            rep.add("contrasts", "error", "zero_contrast",
                    f"{title} ({self._where_rows(con)}): row {', '.join(str(k + 1) for k in zero)} is all zero; "
                    "give the weights or remove the row")
            con.estimable = False
            return
        norms = np.linalg.norm(L, axis=1)
        slack = np.maximum(ESTIMABILITY_TOL, 2 * con.tol * math.sqrt(L.shape[1]) / norms)
        ok = space.residual(L) <= slack
        con.estimable = bool(ok.all())
        if not ok.all():
            bad = ", ".join(str(k + 1) for k in np.flatnonzero(~ok))
            deps = dependents_in_words(self.x_file.values, [self._brief(j) for j in range(L.shape[1])])
            rep.add("contrasts", "error", "not_estimable",
                    f"{title} ({self._where_rows(con)}) is not estimable: row {bad} is not in the row space of "
                    f"the design, so its value depends on what the data cannot separate ({'; '.join(deps)}); "
                    "change the weights to a combination of design rows, or fix the design")
        if L.shape[0] > 1:
            keep = independent_rows(L)
            if len(keep) < L.shape[0]:
                drop = [k for k in range(L.shape[0]) if k not in keep]
                texts = []
                for k in drop:
                    coef, *_ = np.linalg.lstsq(L[keep].T, L[k], rcond=None)
                    terms = []
                    for b, a in enumerate(coef):
                        if abs(a) > 1e-9:
                            times = num_text(abs(a)) + " x " if abs(abs(a) - 1) > 1e-9 else ""
                            terms.append(f"{'-' if a < 0 else '+'} {times}row {keep[b] + 1}")
                    combo = " ".join(terms)
                    texts.append(f"row {k + 1} = {combo.lstrip('+ ')}")
                rep.add("contrasts", "error", "dependent_rows",
                        f"{title} ({self._where_rows(con)}) has {L.shape[0]} rows but only {len(keep)} are "
                        f"independent ({'; '.join(texts)}): the F test has {len(keep)} numerator degrees of "
                        f"freedom, not {L.shape[0]}; drop the dependent row{'s' * (len(drop) > 1)}")
        if self.hd is None or not con.estimable:
            return
        self._state(con, canonical)

    # ----- statements ----------------------------------------------------------------------------
    def _bases(self) -> list[tuple[str | None, dict[str, str], np.ndarray]]:
        """(slope_of, hold description, basis over cells) in the order they are tried."""
        hd = self.hd
        assert hd is not None and hd.audit_rows is not None
        rows = hd.audit_rows
        real = [c for c in self.report.covariates]
        out: list[tuple[str | None, dict[str, str], np.ndarray]] = []
        hold_mean = {c: f"{c} at its mean {num_text(cv.mean)}" for c, cv in hd.covariates.items()}
        out.append((None, hold_mean, rows))
        for c in hd.covariates:
            out.append((c, {k: v for k, v in hold_mean.items() if k != c}, hd.audit_slopes[c]))
        for k in range(1, len(real) + 1):
            for zs in combinations(real, k):
                if any(abs(hd.covariates[c].mean) <= UNCENTRED_MEAN_SD * hd.covariates[c].sd for c in zs):
                    continue
                shifted = rows - sum(hd.audit_slopes[c] * hd.covariates[c].mean for c in zs)
                hold = dict(hold_mean)
                for c in zs:
                    hold[c] = f"{c} at 0 (not at its mean {num_text(hd.covariates[c].mean)})"
                out.append((None, hold, shifted))
        return out

    def _interpret(self, L: np.ndarray, tol: float
                   ) -> tuple[np.ndarray, str | None, dict[str, str], np.ndarray] | None:
        """Cell weights W (q, n_cells) with W @ basis = L, the slope covariate, the holds and the basis."""
        atol = max(1e-8 * max(1.0, float(np.abs(L).max())), 2 * tol)
        for slope_of, hold, basis in self._bases():
            ok = np.isfinite(basis).all(axis=1)
            if not ok.any():
                continue
            b = basis[ok]
            w_ok = L @ np.linalg.pinv(b)
            if np.allclose(w_ok @ b, L, atol=atol, rtol=0):
                w = np.zeros((L.shape[0], basis.shape[0]))
                w[:, ok] = w_ok
                # When the cells have fewer columns than cells (no interaction), the weights are not unique and
                # the smallest ones spread a single cell's mean over several cells: say "that cell" instead (only
                # when one cell alone has that row; equal rows, as slopes without interaction, stay averaged).
                for k in range(L.shape[0]):
                    same = np.flatnonzero(ok & (np.abs(np.where(ok[:, None], basis, np.inf) - L[k]).max(axis=1)
                                                <= atol))
                    if same.size == 1:
                        w[k] = 0.0
                        w[k, same[0]] = 1.0
                w[np.abs(w) < 1e-12 * max(1.0, float(np.abs(w).max()))] = 0.0
                return w, slope_of, hold, np.where(ok[:, None], basis, 0.0)
        return None

    def _canonical(self) -> dict[str, Any]:
        """Main effects and interactions of the hand design, built as groupmodel builds them."""
        hd = self.hd
        out: dict[str, Any] = {}
        if hd is None or hd.audit_rows is None or not np.isfinite(hd.audit_rows).all():
            return out
        space = RowSpace.of(hd.matrix)
        bodies: dict[str, dict[str, Any]] = {f"the main effect of {f}": {"main": f} for f in hd.factors}
        for r in self.roles:
            fs = [f for f in hd.factors if f in r.factors]
            if len(fs) >= 2:
                bodies[f"the {' x '.join(fs)} interaction"] = {"interaction": fs}
        for name, body in bodies.items():
            try:
                out[name] = build_hypothesis(hd, name, body, space)
            except GroupModelError:
                continue
        return out

    def _state(self, con: ContrastReport, canonical: dict[str, Any]) -> None:
        rep, hd = self.report, self.hd
        assert hd is not None
        L = con.weights
        title = self._title(con)
        got = self._interpret(L, con.tol)
        if got is None:
            con.statement = ("not a combination of cell means or of one covariate's slopes: it mixes means and "
                             "slopes, or weights columns no cell's row reaches")
            rep.add("contrasts", "note", "contrast_tests", f"{title}: {con.statement}")
            return
        w, slope_of, hold, basis = got
        con.cell_weights, con.slope_of = w, slope_of
        holds = "; " + ", ".join(hold.values()) if hold else ""
        texts = [describe_cell_weights(hd, wr, slope_of) for wr in w]
        statement = "; and ".join(texts) + holds
        if con.test == "F":
            for name, h in canonical.items():
                if h.estimable and _same_rows(L, h.weights, 1e-6 + 4 * con.tol):
                    statement = f"{name}: {h.statement}"
                    break
        con.statement = statement
        rep.add("contrasts", "note", "contrast_tests", f"{title} tests: {statement}")
        self._mistakes(con, w, slope_of, hold, basis)

    def _mistakes(self, con: ContrastReport, w: np.ndarray, slope_of: str | None, hold: dict[str, str],
                  basis: np.ndarray) -> None:
        rep, hd, L = self.report, self.hd, con.weights
        assert hd is not None
        title = self._title(con)
        roles = self.roles
        factors = list(hd.factors)
        shape = tuple(hd.factors[f].n_levels for f in factors)
        # (a) A "main effect" read off one factor's columns while an interaction with that factor is present.
        used = [j for j in range(L.shape[1]) if np.abs(L[:, j]).max() > con.tol]
        fs = {roles[j].factors for j in used}
        if slope_of is None and len(fs) == 1 and all(roles[j].kind == "factor" for j in used):
            f = next(iter(fs))[0]
            partners = sorted({g for r in roles if f in r.factors and len(r.factors) >= 2 for g in r.factors
                               if g != f}, key=factors.index)
            fixed = []
            for g in partners:
                ax = factors.index(g)
                t = w.reshape((w.shape[0],) + shape)
                mass = np.abs(np.moveaxis(t, ax + 1, -1)).reshape(-1, shape[ax]).sum(axis=0)
                nz = np.flatnonzero(mass > 1e-9 * mass.max())
                if len(nz) == 1:
                    fixed.append((g, hd.factors[g].levels[nz[0]], ax))
            # A simple effect is fine when meant, and the contrast's name saying the level is the sign of it: then
            # the finding is a note.
            label = con.name.lower()
            meant = bool(fixed) and all(lv.lower() in label for _, lv, _ in fixed)
            if fixed:
                t = w.reshape((w.shape[0],) + shape)
                for g, lv, ax in fixed:
                    sl = np.take(t, [hd.factors[g].levels.index(lv)], axis=ax + 1)
                    t = np.repeat(sl, shape[ax], axis=ax + 1) / shape[ax]
                fix = t.reshape(w.shape) @ basis
                at = ", ".join(f"{g}={lv}" for g, lv, _ in fixed)
                over = " x ".join(g for g, _, _ in fixed)
                cols = ", ".join(str(j + 1) for j in used)
                if meant:
                    rep.add("contrasts", "note", "simple_effect",
                            f"{title} tests {f} at {at} only, as its name says (not the main effect)")
                    fixed = []
            if fixed:
                rep.add("contrasts", "warning", "main_effect_at_reference",
                        f"{title} weights only the columns of {f} (column{'s' * (len(used) > 1)} {cols}) while the "
                        f"design has the interaction of {f} with {over}: it tests {f} at {at} only (the level the "
                        f"coding sets to 0), not the main effect averaged over {over}; for the main effect use "
                        + "; ".join(row_text(r) for r in fix))
        # (b) and (c): weights over cells (or cell slopes) that are neither a comparison nor a mean.
        pinv = np.linalg.pinv(basis)
        for k, wr in enumerate(w):
            total = float(wr.sum())
            sens = float(np.abs(pinv @ np.ones(basis.shape[0])).sum()) if slope_of is None else float(
                np.abs(pinv).sum(axis=1).max())
            if abs(total) <= max(1e-9 * np.abs(wr).sum(), 2 * con.tol * sens):
                continue
            big = np.abs(wr) > max(1e-9 * np.abs(wr).max(), 2 * con.tol * sens)
            if not ((wr[big] > 0).any() and (wr[big] < 0).any()):
                continue  # one-signed weights: a (weighted) mean of cells
            if _nonnegative_solution(basis, L[k], max(1e-9, 2 * con.tol)):
                continue  # other weights over the cells give the same row and are one-signed: a mean after all
            row_note = f" row {k + 1}" if L.shape[0] > 1 else ""
            what = "cell slopes of " + slope_of if slope_of else "cell means"
            if self.has_intercept and slope_of is None:
                rows = hd.audit_rows
                assert rows is not None
                diffs = [(int((np.abs(rows[c] - L[k]) > 2 * con.tol + 1e-9).sum()), float(
                    np.linalg.norm(rows[c] - L[k])), c) for c in range(rows.shape[0]) if np.isfinite(rows[c]).all()]
                nd, _, c = min(diffs)
                cell = hd.cell_label(hd.cells[c])
                wrong = [f"{self._brief(j)} has {num_text(L[k, j])} where the cell's row has {num_text(rows[c, j])}"
                         for j in range(L.shape[1]) if abs(rows[c, j] - L[k, j]) > 2 * con.tol + 1e-9]
                rep.add("contrasts", "warning", "not_a_cell_mean",
                        f"{title}{row_note} weights the intercept as a cell mean does (its weights over the "
                        f"{what} sum to {num_text(total)}) but equals no cell's design row; the nearest is "
                        f"{cell}: {'; '.join(wrong[:4])}; to test that cell's mean use its row {row_text(rows[c])}")
            else:
                pos, neg = float(wr[wr > 0].sum()), float(wr[wr < 0].sum())
                rep.add("contrasts", "warning", "weights_not_sum_zero",
                        f"{title}{row_note} compares {what} with weights that do not sum to 0 (positive "
                        f"{num_text(pos)}, negative {num_text(neg)}, sum {num_text(total)}): it tests the difference "
                        "plus "
                        f"{num_text(total)} times a mean, not a pure comparison; scale each side so they balance "
                        "(e.g. 0.5 0.5 -1 instead of 1 1 -1)")
        # A covariate held at 0 far outside its range.
        for c, text in hold.items():
            if " at 0 " in text and c in self.view.covariates:
                vals = self.view.covariates[c][self.view.valid]
                if vals.min() > 0 or vals.max() < 0:
                    rep.add("contrasts", "warning", "effect_at_covariate_zero",
                            f"{title} holds {c} at 0, outside the {c} values of the data ({num_text(vals.min())} to "
                            f"{num_text(vals.max())}), because {c} enters the design uncentred; centre {c} (subtract "
                            f"its mean {num_text(float(vals.mean()))}) or add the slope weights that move it to the "
                            "mean")

    # ----- covariates --------------------------------------------------------------------------


class SpecMixin:
    """The comparison with a spec of :class:`groupmodel.audit._Auditor`."""

    def _compare_spec(self) -> None:
        from ..model.assembly import build

        rep = self.report
        assert self.spec is not None and self.align is not None
        model = build(self.spec)
        self.model = model
        sname = self.spec.name
        spec_rows = {int(r) - 1: i for i, r in enumerate(model.design.observations["row"].tolist())}
        pairs = [(i, spec_rows[t]) for i, t in enumerate(self.align) if t in spec_rows]
        if not pairs:
            rep.add("spec", "warning", "spec_no_rows",
                    f"no design row is a participant {sname} includes, so nothing can be compared; check that "
                    "--participants is the spec's table and the design rows follow it")
            return
        hi = np.array([a for a, _ in pairs])
        si = np.array([b for _, b in pairs])
        xh = self.x_file.values[hi]
        xs = model.design.matrix[si]
        rh, rs = matrix_rank(xh), matrix_rank(xs)
        both = matrix_rank(np.hstack([xh, xs]))
        same = rh == rs == both
        if same:
            rep.add("spec", "note", "spec_same_space",
                    f"the design spans the same column space as the design {sname} builds (rank {rh}; "
                    f"{xh.shape[1]} and {xs.shape[1]} columns): the same fitted values, so contrasts compare")
        else:
            miss_s = _outside(xs, xh)
            miss_h = _outside(xh, xs)
            parts = []
            if miss_s:
                parts.append("it cannot reproduce the spec's " + ", ".join(model.design.column_names[j]
                                                                           for j in miss_s))
            if miss_h:
                parts.append("the spec's design cannot reproduce " + ", ".join(self.labels[j] for j in miss_h))
            rep.add("spec", "warning", "spec_column_space",
                    f"the design does not span the column space of the design {sname} builds: {'; '.join(parts)}; "
                    "the two models differ, and contrasts are compared over cell means only; add the missing "
                    "columns if the models are meant to be the same")
        if not rep.contrasts:
            return
        proj_h = np.linalg.pinv(xh)
        proj_s = np.linalg.pinv(xs)
        hyps = model.hypotheses
        for con in rep.contrasts:
            if not con.estimable:
                continue
            matches = []
            for name, h in hyps.items():
                if not h.estimable:
                    continue
                if same:
                    a, b = con.weights @ proj_h, h.weights @ proj_s
                    tol = 1e-6 + 4 * con.tol * math.sqrt(con.weights.shape[1])
                else:
                    a, b = self._cells_of(con), self._spec_cells(h, model.design)
                    if a is None or b is None:
                        continue
                    tol = 1e-6 + 4 * con.tol
                if _same_rows(a, b, tol):
                    sign = ""
                    if con.test == "t" and h.weights.shape[0] == 1:
                        dot = float((a * b).sum())
                        if dot < 0:
                            sign = " with the sign reversed"
                    matches.append(name + sign)
            con.spec_matches = matches
            title = self._title(con)
            how = "" if same else " over cell means (the models differ)"
            if matches:
                text = f"{title} tests the same hypothesis as {sname}'s " + " and ".join(matches) + how
                rep.add("spec", "note", "spec_match", text)
            names_plain = [m.split(" with ")[0] for m in matches]
            if con.name in hyps and con.name not in names_plain:
                other = f"it matches {', '.join(matches)}" if matches else "no hypothesis of the spec matches it"
                rep.add("spec", "warning", "spec_name_mismatch",
                        f"{title} has the name of {sname}'s hypothesis {con.name} but tests something else "
                        f"({other}); {con.name} is: {hyps[con.name].statement}; fix the weights or the name")
            elif not matches:
                rep.add("spec", "note", "spec_no_match", f"{title}: no hypothesis of {sname} matches")

    def _cells_of(self, con: ContrastReport) -> np.ndarray | None:
        """A hand contrast's weights over the cells of the spec's factors, slopes marked by a tag column."""
        if con.cell_weights is None or self.model is None:
            return None
        d = self.model.design
        hd = self.hd
        assert hd is not None
        if set(hd.factors) - set(d.factors):
            return None
        out = np.zeros((con.cell_weights.shape[0], len(d.cells)))
        names = list(d.factors)
        for i, cell in enumerate(hd.cells):
            levels = dict(zip(hd.factors, cell, strict=True))
            targets = [j for j, c in enumerate(d.cells) if all(c[names.index(f)] == lv for f, lv in levels.items())]
            if not targets:
                return None
            for j in targets:
                out[:, j] += con.cell_weights[:, i] / len(targets)
        tag = 0.0 if con.slope_of is None else float(list(d.covariates).index(con.slope_of) + 1) \
            if con.slope_of in d.covariates else -1.0
        return np.hstack([out, np.full((out.shape[0], 1), tag * np.abs(out).sum(axis=1, keepdims=True).max())])

    def _spec_cells(self, h: Any, d: Design) -> np.ndarray | None:
        if h.cell_weights is None:
            return None
        tag = 0.0 if h.on_slopes is None else float(list(d.covariates).index(h.on_slopes) + 1)
        w = h.cell_weights
        return np.hstack([w, np.full((w.shape[0], 1), tag * np.abs(w).sum(axis=1, keepdims=True).max())])

    # ----- images ------------------------------------------------------------------------------


def dependents_in_words(x: np.ndarray, names: list[str]) -> list[str]:
    """:func:`groupmodel.checks.dependent_columns` for labels that already say 'column'."""
    return [d.replace("column column ", "column ") for d in dependent_columns(x, names)]


def member_brief(m: Any) -> str:
    if m.kind == "indicator":
        return f"{m.factor}={m.level}"
    if m.kind == "effect":
        return f"{m.factor} {m.level} vs {m.reference}"
    if m.kind == "polynomial":
        return f"{m.factor} {('linear', 'quadratic', 'cubic')[min(m.degree or 1, 3) - 1]}"
    return m.factor


def _nonnegative_solution(basis: np.ndarray, row: np.ndarray, tol: float) -> bool:
    """Is ``row`` a combination of the rows of ``basis`` with weights all >= 0 (a linear programme)?"""
    from scipy.optimize import linprog

    keep = np.abs(basis).sum(axis=1) > 0
    if not keep.any():
        return False
    b = basis[keep]
    res = linprog(np.ones(b.shape[0]), A_eq=b.T, b_eq=row, bounds=(0, None), method="highs")
    return bool(res.status == 0 and np.abs(res.x @ b - row).max() <= max(tol, 1e-9 * np.abs(row).max()))


def _same_rows(a: np.ndarray, b: np.ndarray, tol: float) -> bool:
    """Do the rows of ``a`` and ``b`` span the same space (relative residuals at most ``tol``)?"""
    a, b = np.atleast_2d(a), np.atleast_2d(b)
    if a.shape[1] != b.shape[1]:
        return False
    ra, rb = RowSpace.of(a), RowSpace.of(b)
    if ra.rank != rb.rank:
        return False
    return bool((ra.residual(b) <= tol).all() and (rb.residual(a) <= tol).all())


def _outside(a: np.ndarray, b: np.ndarray) -> list[int]:
    """Columns of ``a`` not in the column space of ``b``."""
    coef, *_ = np.linalg.lstsq(b, a, rcond=None)
    resid = np.linalg.norm(a - b @ coef, axis=0)
    norms = np.linalg.norm(a, axis=0)
    return [j for j in range(a.shape[1]) if resid[j] > 1e-8 * max(norms[j], 1e-300)]
