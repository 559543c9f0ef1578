"""What each column of a hand-written design encodes, in words: the coding scheme of every factor and a
description of every column (see :mod:`groupmodel.audit.columns` for the identification itself).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..model.coding import degree_name
from ..text import number_text
from .columns import ColumnRole, Member
from .table_view import TableView

_num = number_text


def summarise_factors(roles: list[ColumnRole], view: TableView, intercept: bool) -> dict[str, str]:
    """Per factor with main-effect columns: the coding scheme in words; sets each member's ``scheme``."""
    out: dict[str, str] = {}
    for f, levels in view.factors.items():
        main = [r for r in roles if r.kind == "factor" and r.factors == (f,)]
        if not main:
            continue
        ms = [r.members[f] for r in main]
        k = len(levels)
        cols = ", ".join(str(r.index + 1) for r in main)
        where = f"column{'s' if len(main) > 1 else ''} {cols}"
        if all(m.kind == "indicator" for m in ms) and len({m.level for m in ms}) == len(ms):
            have = [m.level for m in ms]
            missing = [lv for lv in levels if lv not in have]
            if not missing:
                scheme, text = "indicator", f"{f}: indicator coding, one column per level ({where})"
            elif len(missing) == 1:
                scheme = "treatment"
                for m in ms:
                    m.reference = missing[0]
                text = f"{f}: treatment coding, reference {missing[0]} ({where})"
                if not intercept:
                    text += "; no intercept column, so the reference level's mean is fixed at 0 unless another " \
                            "factor's indicator columns stand in for it"
            else:
                scheme = "treatment"
                text = f"{f}: indicator columns for {have} only; levels {missing} share the reference ({where})"
        elif all(m.kind == "effect" for m in ms) and len({m.reference for m in ms}) == 1 \
                and len({m.level for m in ms}) == len(ms):
            ref = ms[0].reference
            scheme = "effect"
            text = f"{f}: effect (sum-to-zero) coding, reference {ref} ({where})"
            if len(ms) < k - 1:
                text += f"; only {len(ms)} of the {k - 1} columns a full coding needs"
        elif all(m.poly_degree is not None for m in ms) and len({m.poly_degree for m in ms}) == len(ms) and (
            any(m.kind == "polynomial" for m in ms) or k == 2
        ) and not (k == 2 and all(m.kind == "effect" for m in ms)):
            scheme = "polynomial"
            degs = sorted(m.poly_degree or 0 for m in ms)
            scored = ", ".join(f"{lv} {_num(sc)}" for lv, sc in zip(levels, view.scores[f], strict=True))
            text = (f"{f}: orthogonal polynomial coding ({', '.join(degree_name(d) for d in degs)}; "
                    f"level scores {scored}) ({where})")
        else:
            scheme = "other"
            text = f"{f}: a coding that is not indicator, treatment, effect or polynomial ({where})"
        for m in ms:
            m.scheme = scheme
            if scheme == "polynomial":
                m.kind, m.degree, m.scale = "polynomial", m.poly_degree, m.poly_scale
        out[f] = text
    return out


def _member_text(m: Member, levels: tuple[str, ...], scores: tuple[float, ...], short: bool = False) -> str:
    f = m.factor
    if m.kind == "indicator":
        if short:
            return f"1 at {f}={m.level}, 0 elsewhere"
        if m.scheme == "treatment" and m.reference:
            return f"treatment coding of {f}: 1 at {m.level}, 0 elsewhere (reference {m.reference})"
        return f"indicator of {f}={m.level}"
    if m.kind == "effect":
        if short:
            return f"+1 at {f}={m.level}, -1 at {f}={m.reference}"
        return f"effect coding of {f}: +1 at {m.level}, -1 at the reference {m.reference}, 0 elsewhere"
    if m.kind == "polynomial":
        text = f"{degree_name(m.degree or 1)} polynomial of {f}"
        return text if short else text + f" (scores {', '.join(_num(s) for s in scores)})"
    vals = ", ".join(f"{lv} {_num(v)}" for lv, v in zip(levels, m.raw, strict=True) if np.isfinite(v))
    return f"{f} values {vals}"


def _scale_text(scale: float, canonical: float = 1.0) -> str:
    if abs(scale - canonical) <= 1e-6 * max(1.0, abs(canonical)):
        return ""
    return f" (times {_num(scale / canonical)})"


def describe_roles(roles: list[ColumnRole], view: TableView, means: dict[str, float], sds: dict[str, float]
                   ) -> None:
    """Write each role's description (call after :func:`summarise_factors`)."""
    main_of: dict[str, list[ColumnRole]] = {}
    for r in roles:
        if r.kind == "factor":
            main_of.setdefault(r.factors[0], []).append(r)
    _orient_interactions(roles, main_of)
    for r in roles:
        if r.kind == "zero":
            r.description = "all zero"
        elif r.kind == "intercept":
            r.description = "intercept (1 in every row)"
        elif r.kind == "constant":
            r.description = f"a constant ({_num(r.constant or 0.0)} in every row; acts as the intercept)"
        elif r.kind in ("factor", "interaction", "cell_function"):
            r.description = _factor_part(r, view, main_of)
        elif r.covariate is not None:
            r.description = _covariate_text(r, view, main_of, means.get(r.covariate, np.nan),
                                             sds.get(r.covariate, np.nan))
        else:
            r.description = "unexplained: not a coding of the given factors nor a covariate of the table"


def _matching_main(m: Member, main_of: dict[str, list[ColumnRole]]) -> ColumnRole | None:
    """The main-effect column of ``m``'s factor with the same pattern (up to scale and sign), if any."""
    for r in main_of.get(m.factor, []):
        a, b = r.members[m.factor].raw, m.raw
        ok = np.isfinite(a) & np.isfinite(b)
        if not ok.any():
            continue
        na, nb = a[ok] / (np.abs(a[ok]).max() or 1.0), b[ok] / (np.abs(b[ok]).max() or 1.0)
        if np.allclose(na, nb, atol=1e-6) or np.allclose(na, -nb, atol=1e-6):
            return r
    return None


def _orient_interactions(roles: list[ColumnRole], main_of: dict[str, list[ColumnRole]]) -> None:
    """Orient each factor of an interaction as that factor's own column (the product's sign goes to the scale),
    so "diet vegan vs mixed" is not written "diet mixed vs vegan" inside the interaction."""
    for r in roles:
        if len(r.factors) >= 2 and r.separable and r.members:
            for f in r.factors:
                m = r.members[f]
                main = _matching_main(m, main_of)
                if main is None:
                    continue
                ref = main.members[f].raw
                ok = np.isfinite(ref) & np.isfinite(m.raw)
                if float((ref[ok] * m.raw[ok]).sum()) < 0:
                    m.raw = -m.raw
                    r.scale = -r.scale
                    if m.kind == "effect":
                        m.level, m.reference = m.reference, m.level


def _single(m: Member, view: TableView) -> str:
    f = m.factor
    text = _member_text(m, view.factors[f], view.scores[f])
    if m.kind == "polynomial":
        typed = _poly_typed(m)
        return text + (typed or _scale_text(m.scale))
    if m.kind == "other":
        return text
    return text + _scale_text(m.scale)


def _factor_part(r: ColumnRole, view: TableView, main_of: dict[str, list[ColumnRole]]) -> str:
    """The factor part of a column in words: one coding, or an interaction of codings."""
    if not r.separable:
        return f"a function of the {' x '.join(r.factors)} cells that is not a product of codings"
    if len(r.factors) == 1:
        return _single(r.members[r.factors[0]], view)
    ms = [r.members[f] for f in r.factors]
    cell = ""
    if all(m.kind == "indicator" for m in ms):
        cell = "indicator of the cell " + ", ".join(f"{m.factor}={m.level}" for m in ms)
    mains = [_matching_main(m, main_of) for m in ms]
    if cell and not all(mm is not None for mm in mains):
        return cell + _scale_text(r.scale)
    if all(mm is not None for mm in mains):
        own = np.ones(())
        prod = np.ones(())
        for m, mm in zip(ms, mains, strict=True):
            assert mm is not None
            own = np.multiply.outer(own, np.nan_to_num(m.raw))
            prod = np.multiply.outer(prod, np.nan_to_num(mm.members[mm.factors[0]].raw))
        ratio = r.scale * float((own * prod).sum() / max(float((prod**2).sum()), 1e-300))
        names = " and ".join(mm.label for mm in mains if mm is not None)
        text = f"interaction {' x '.join(r.factors)}: product of {names}" + _scale_text(ratio)
        return text + (f" (the {cell})" if cell else "")
    parts = " x ".join(f"({_member_text(m, view.factors[m.factor], view.scores[m.factor], short=True)})"
                       for m in ms)
    return f"interaction {' x '.join(r.factors)}: {parts}" + _scale_text(r.scale)


def _covariate_text(r: ColumnRole, view: TableView, main_of: dict[str, list[ColumnRole]], mean: float,
                    sd: float) -> str:
    """A covariate column in words: where it is centred, its scale, and the factor part it is multiplied by."""
    c = r.covariate
    if r.centre_kind == "mean":
        centre = f"centred at its mean {_num(mean)}"
    elif r.centre_kind == "none":
        centre = f"not centred; its mean is {_num(mean)}"
    elif r.centre_kind == "value":
        centre = f"centred at {_num(r.centre or 0.0)}, not at its mean {_num(mean)}"
    elif r.centre_kind == "within":
        centre = f"centred within each level of {r.within}"
    else:
        centre = "plus offsets that differ between cells, not a centring"
    if r.factors:
        return f"covariate {c} ({centre}) times {_factor_part(r, view, main_of)}"
    a = r.cov_scale
    if sd > 0 and abs(abs(a) * sd - 1) <= 0.01:
        scale = ", divided by its SD" + (" (sign reversed)" if a < 0 else "")
    else:
        scale = _scale_text(a)
    return f"covariate {c} ({centre}){scale}"


def _poly_typed(m: Member) -> str:
    vals = m.raw
    if np.all(np.abs(vals - np.round(vals)) < 1e-6) and abs(abs(m.poly_scale) - 1.0) > 1e-6:
        return " = " + ", ".join(_num(v) for v in vals)
    return ""


def member_brief(m: Any) -> str:
    if m.kind == "indicator":
        return f"{m.factor}={m.level}"
    if m.kind == "effect":
        return f"{m.factor} {m.level} vs {m.reference}"
    if m.kind == "polynomial":
        return f"{m.factor} {degree_name(m.degree or 1)}"
    return m.factor
