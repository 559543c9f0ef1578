"""The classic mistakes of hand-written contrasts (part of ``groupmodel check``).

(a) a "main effect" read off one factor's columns while an interaction with that factor is in the design (it
tests the factor at the reference level of the other); (b) weights over cell means that are neither a
comparison nor a mean (the intercept weighted as a cell mean does, but the row equals no cell's row); (c)
weights over cells that do not sum to 0; and a covariate held at 0 far outside its range.
"""

from __future__ import annotations

import numpy as np

from .cells import HandDesign
from .context import AuditContext
from .contrasts import ContrastReport, Interpretation
from .read import AuditFinding, num_text, row_text


def _finding(severity: str, code: str, message: str) -> AuditFinding:
    return AuditFinding(severity, code, message, "contrasts")  # type: ignore[arg-type]


def mistakes(ctx: AuditContext, con: ContrastReport, got: Interpretation) -> list[AuditFinding]:
    """The mistakes of one stated contrast, in report order."""
    assert ctx.columns is not None
    out = _main_effect_at_reference(ctx, con, got)
    out += _not_a_comparison(ctx, con, got)
    out += _covariate_at_zero(ctx, con, got)
    return out


def _fixed_partners(hd: HandDesign, f: str, w: np.ndarray, partners: list[str]) -> list[tuple[str, str, int]]:
    """The interaction partners of ``f`` whose weights sit at one level only: (factor, level, axis)."""
    factors = list(hd.factors)
    shape = tuple(hd.factors[g].n_levels for g in factors)
    fixed = []
    for g in partners:
        ax = factors.index(g)
        t = w.reshape((w.shape[0],) + shape)
        mass = np.abs(np.moveaxis(t, ax + 1, -1)).reshape(-1, shape[ax]).sum(axis=0)
        nz = np.flatnonzero(mass > 1e-9 * mass.max())
        if len(nz) == 1:
            fixed.append((g, hd.factors[g].levels[nz[0]], ax))
    return fixed


def _main_effect_at_reference(ctx: AuditContext, con: ContrastReport, got: Interpretation) -> list[AuditFinding]:
    """(a) A "main effect" read off one factor's columns while an interaction with that factor is present."""
    assert ctx.columns is not None
    hd, roles, L, w = ctx.columns.hd, ctx.roles, con.weights, got.w
    factors = list(hd.factors)
    shape = tuple(hd.factors[f].n_levels for f in factors)
    used = [j for j in range(L.shape[1]) if np.abs(L[:, j]).max() > con.tol]
    fs = {roles[j].factors for j in used}
    if not (got.slope_of is None and len(fs) == 1 and all(roles[j].kind == "factor" for j in used)):
        return []
    f = next(iter(fs))[0]
    partners = sorted({g for r in roles if f in r.factors and len(r.factors) >= 2 for g in r.factors
                       if g != f}, key=factors.index)
    fixed = _fixed_partners(hd, f, w, partners)
    if not fixed:
        return []
    # A simple effect is fine when meant, and the contrast's name saying the level is the sign of it: then
    # the finding is a note.
    label = con.name.lower()
    at = ", ".join(f"{g}={lv}" for g, lv, _ in fixed)
    if all(lv.lower() in label for _, lv, _ in fixed):
        return [_finding("note", "simple_effect", f"{con.title} tests {f} at {at} only, as its name says (not the "
                                                  "main effect)")]
    t = w.reshape((w.shape[0],) + shape)
    for g, lv, ax in fixed:
        sl = np.take(t, [hd.factors[g].levels.index(lv)], axis=ax + 1)
        t = np.repeat(sl, shape[ax], axis=ax + 1) / shape[ax]
    fix = t.reshape(w.shape) @ got.basis
    over = " x ".join(g for g, _, _ in fixed)
    cols = ", ".join(str(j + 1) for j in used)
    return [_finding("warning", "main_effect_at_reference",
                     f"{con.title} weights only the columns of {f} (column{'s' * (len(used) > 1)} {cols}) while the "
                     f"design has the interaction of {f} with {over}: it tests {f} at {at} only (the level the "
                     f"coding sets to 0), not the main effect averaged over {over}; for the main effect use "
                     + "; ".join(row_text(r) for r in fix))]


def _not_a_comparison(ctx: AuditContext, con: ContrastReport, got: Interpretation) -> list[AuditFinding]:
    """(b) and (c): weights over cells (or cell slopes) that are neither a comparison nor a mean."""
    assert ctx.columns is not None
    L, basis, slope_of = con.weights, got.basis, got.slope_of
    pinv = np.linalg.pinv(basis)
    out = []
    for k, wr in enumerate(got.w):
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
        if ctx.columns.has_intercept and slope_of is None:
            out.append(_not_a_cell_mean(ctx, con, k, (row_note, what, total)))
        else:
            pos, neg = float(wr[wr > 0].sum()), float(wr[wr < 0].sum())
            out.append(_finding(
                "warning", "weights_not_sum_zero",
                f"{con.title}{row_note} compares {what} with weights that do not sum to 0 (positive "
                f"{num_text(pos)}, negative {num_text(neg)}, sum {num_text(total)}): it tests the difference "
                "plus "
                f"{num_text(total)} times a mean, not a pure comparison; scale each side so they balance "
                "(e.g. 0.5 0.5 -1 instead of 1 1 -1)"))
    return out


def _not_a_cell_mean(ctx: AuditContext, con: ContrastReport, k: int, words: tuple[str, str, float]
                     ) -> AuditFinding:
    """Row ``k`` weights the intercept as a cell mean does but equals no cell's row: name the nearest cell."""
    assert ctx.columns is not None
    row_note, what, total = words
    hd, L = ctx.columns.hd, con.weights
    rows = hd.audit_rows
    assert rows is not None
    tol = 2 * con.tol + 1e-9
    cands = [(hd.cell_label(hd.cells[c]), rows[c], "cell") for c in range(rows.shape[0]) if np.isfinite(rows[c]).all()]
    cands += _marginal_means(ctx.columns.factors, hd.cells, rows)

    def key(i: int) -> tuple[int, int, float, int]:
        label, r, kind = cands[i]
        return (int(((np.abs(r) > tol) != (np.abs(L[k]) > tol)).sum()), int((np.abs(r - L[k]) > tol).sum()),
                float(np.linalg.norm(r - L[k])), kind != "cell")

    label, best, kind = cands[min(range(len(cands)), key=key)]
    noun = "cell's" if kind == "cell" else "marginal mean's"
    wrong = [f"{ctx.brief(j)} has {num_text(L[k, j])} where the {noun} row has {num_text(best[j])}"
             for j in range(L.shape[1]) if abs(best[j] - L[k, j]) > tol]
    off = [j for j in range(L.shape[1]) if abs(best[j] - L[k, j]) > tol]
    doubled = bool(off) and all(abs(L[k, j] - 2 * best[j]) <= tol for j in off)
    why = " (the same columns with the design's codes: its +/-0.5 coding puts 0.5 where a +/-1 coding puts 1)" \
        if kind != "cell" and doubled else ""
    return _finding("warning", "not_a_cell_mean",
                    f"{con.title}{row_note} weights the intercept as a cell mean does (its weights over the "
                    f"{what} sum to {num_text(total)}) but equals no cell's design row; the nearest is "
                    f"{label}{why}: {'; '.join(wrong[:4])}; to test that {'cell' if kind == 'cell' else 'mean'} "
                    f"use its row {row_text(best)}")


def _marginal_means(factors: tuple[str, ...] | list[str], cells: list, rows: np.ndarray
                    ) -> list[tuple[str, np.ndarray, str]]:
    """The row of every level's mean over the cells of the other factors (equal weights), with its words."""
    out: list[tuple[str, np.ndarray, str]] = []
    if len(factors) < 2:
        return out
    for i, f in enumerate(factors):
        others = " x ".join(g for g in factors if g != f)
        for level in dict.fromkeys(c[i] for c in cells):
            sel = [c for c, cell in enumerate(cells) if cell[i] == level]
            if sel and np.isfinite(rows[sel]).all():
                out.append((f"the mean of {f}={level} over the levels of {others}", rows[sel].mean(axis=0),
                            "marginal"))
    return out


def _covariate_at_zero(ctx: AuditContext, con: ContrastReport, got: Interpretation) -> list[AuditFinding]:
    """A covariate held at 0 far outside its range."""
    assert ctx.columns is not None
    view = ctx.columns.view
    out = []
    for c, text in got.hold.items():
        if " at 0 " in text and c in view.covariates:
            vals = view.covariates[c][view.valid]
            if vals.min() > 0 or vals.max() < 0:
                out.append(_finding(
                    "warning", "effect_at_covariate_zero",
                    f"{con.title} holds {c} at 0, outside the {c} values of the data ({num_text(vals.min())} to "
                    f"{num_text(vals.max())}), because {c} enters the design uncentred; centre {c} (subtract "
                    f"its mean {num_text(float(vals.mean()))}) or add the slope weights that move it to the "
                    "mean"))
    return out


def _nonnegative_solution(basis: np.ndarray, row: np.ndarray, tol: float) -> bool:
    """Is ``row`` a combination of the rows of ``basis`` with weights all >= 0 (a linear programme)?"""
    from scipy.optimize import linprog

    keep = np.abs(basis).sum(axis=1) > 0
    if not keep.any():
        return False
    b = basis[keep]
    res = linprog(np.ones(b.shape[0]), A_eq=b.T, b_eq=row, bounds=(0, None), method="highs")
    return bool(res.status == 0 and np.abs(res.x @ b - row).max() <= max(tol, 1e-9 * np.abs(row).max()))
