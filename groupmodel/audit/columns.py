"""What each column of a hand-written design encodes, and the design row of every cell.

Given the table's factor and covariate columns (aligned with the design rows),
each design column is identified as one of

* the intercept (or another constant), or all zero;
* a coding of one factor: indicator / treatment, effect (sum-to-zero) or
  orthogonal polynomial, naming the level and the reference;
* an interaction: a product of codings of several factors (or, failing that, some
  other function of their cells);
* a covariate, centred at its mean, at another value, within the levels of a
  factor, or not at all; possibly multiplied by a coding (a covariate
  interaction);
* "unexplained".

The search is exact up to the precision typed in the file (see
:meth:`groupmodel.audit_read.MatrixFile.tolerance`): a column is a function of a
set of factors when it is constant within their cells, and a covariate column
when ``x = alpha(cell) + beta(cell) * c`` fits with no residual.  The smallest
set of factors that explains a column is taken.

From the identification every cell gets its design row (covariates held at
their mean over the design rows) and every covariate its slope row, which is what
:mod:`groupmodel.hypotheses` needs to state contrasts over cell means.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations, product

import numpy as np

from ..model.coding import degree_name, orthogonal_polynomials
from ..text import number_text

#: A covariate counts as centred at its mean when the centre lies within this many SDs of the mean
#: (hand-typed centres are rounded; a centre from another sample is further off).
CENTRE_SLACK_SD = 0.01


_num = number_text


@dataclass
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
            self.known = self.valid

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


@dataclass
class Member:
    """How one factor enters a column (one factor of an interaction, or the whole column of a main effect).

    ``kind`` is ``indicator``, ``effect``, ``polynomial`` or ``other``.  ``raw`` (k,) are the values the
    member contributes at each level (NaN for a level no row has); ``scale`` is how far ``raw`` is from the
    canonical pattern of its kind (1 for a 0/1 indicator or a +1/-1 effect column).
    """

    factor: str
    kind: str
    raw: np.ndarray
    scale: float = 1.0
    level: str | None = None
    reference: str | None = None
    degree: int | None = None
    poly_degree: int | None = None  # the polynomial degree it also matches, if any
    poly_scale: float = 1.0
    scheme: str = ""  # filled by the factor summary: treatment, indicator, effect, polynomial, other


@dataclass
class ColumnRole:
    """What one design column encodes.

    Attributes
    ----------
    index : int
        0-based column.
    label : str
        ``column 3`` or ``column 3 (training=sprint)``.
    kind : str
        ``zero``, ``intercept``, ``constant``, ``factor``, ``interaction``, ``cell_function``, ``covariate``,
        ``covariate_interaction``, ``covariate_within``, ``covariate_mixed`` or ``unexplained``.
    factors : tuple of str
        The factors the column depends on.
    covariate : str or None
    description : str
        In words, filled in by :func:`describe_roles`.
    centre_kind : str or None
        For covariate columns: ``mean``, ``none``, ``value``, ``within`` or ``mixed``.
    centre : float or None
    cell_values : ndarray, shape (n_cells,)
        The column's value in every cell, covariates at their mean (NaN where it cannot be known).
    slopes : dict
        Covariate -> (n_cells,) derivative of the column with respect to the raw covariate in every cell.
    """

    index: int
    label: str
    kind: str
    factors: tuple[str, ...] = ()
    covariate: str | None = None
    description: str = ""
    members: dict[str, Member] = field(default_factory=dict)
    scale: float = 1.0
    constant: float | None = None
    centre_kind: str | None = None
    centre: float | None = None
    cov_scale: float = 1.0
    separable: bool = True
    table: np.ndarray | None = None  # factor part over its factors' levels when not a product of codings
    fit: tuple | None = None  # covariate columns: (S, A, alpha by A-group, beta by S-group)
    within: str | None = None  # covariate centred within the levels of this factor
    cell_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    slopes: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def is_factor_part(self) -> bool:
        return self.kind in ("intercept", "constant", "factor", "interaction", "cell_function", "zero")

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"column": self.index + 1, "label": self.label, "kind": self.kind,
                                  "factors": list(self.factors), "description": self.description}
        if self.covariate:
            out["covariate"] = self.covariate
            out["centre"] = self.centre_kind
            if self.centre is not None:
                out["centre_value"] = self.centre
        return out


# --------------------------------------------------------------------------------------------------
# Group statistics
# --------------------------------------------------------------------------------------------------
def _group_extent(x: np.ndarray, key: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per group: (min, max, mean), NaN for empty groups."""
    lo = np.full(size, np.inf)
    hi = np.full(size, -np.inf)
    np.minimum.at(lo, key, x)
    np.maximum.at(hi, key, x)
    sums = np.bincount(key, weights=x, minlength=size)
    counts = np.bincount(key, minlength=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    lo[counts == 0] = np.nan
    hi[counts == 0] = np.nan
    return lo, hi, mean


def _subsets(names: list[str]) -> list[tuple[str, ...]]:
    return [s for k in range(len(names) + 1) for s in combinations(names, k)]


# --------------------------------------------------------------------------------------------------
# One factor's vector
# --------------------------------------------------------------------------------------------------
def classify_member(factor: str, levels: tuple[str, ...], scores: tuple[float, ...], u: np.ndarray,
                    tol: float) -> Member:
    """Classify a factor's values at its levels (k,) as indicator, effect, polynomial or other (up to scale).

    Levels no row has are NaN and are not used.
    """
    obs = np.isfinite(u)
    nz = obs & (np.abs(np.nan_to_num(u)) > tol)
    idx = np.flatnonzero(nz)
    m = Member(factor, "other", u.copy())
    k = len(levels)
    if obs.all() and k >= 2:
        poly = orthogonal_polynomials(scores)
        for d in range(poly.shape[1]):
            c = float(u @ poly[:, d])
            if abs(c) > tol and np.abs(u - c * poly[:, d]).max() <= 2 * tol:
                m.poly_degree, m.poly_scale = d + 1, c
                break
    if idx.size == 1:
        c = float(u[idx[0]])
        m.kind, m.level, m.scale = "indicator", levels[idx[0]], c
    elif idx.size == 2 and abs(u[idx[0]] + u[idx[1]]) <= 2 * tol and obs.sum() == k:
        pos, neg = (idx[0], idx[1]) if u[idx[0]] > 0 else (idx[1], idx[0])
        m.kind, m.level, m.reference, m.scale = "effect", levels[pos], levels[neg], float(u[pos])
    elif m.poly_degree is not None:
        m.kind, m.degree, m.scale = "polynomial", m.poly_degree, m.poly_scale
    else:
        m.scale = float(np.nanmax(np.abs(u))) or 1.0
    return m


def _rank_one(tensor: np.ndarray, tol: float) -> list[np.ndarray] | None:
    """Vectors v_f with tensor = outer(v_1, v_2, ...) on the observed (finite) entries, or None.

    Alternating least squares started from the fibres through the largest entry (exact in one step when the
    tensor is fully observed and rank one).
    """
    obs = np.isfinite(tensor)
    t = np.where(obs, tensor, 0.0)
    if not obs.any() or np.abs(t).max() <= tol:
        return None
    at = np.unravel_index(int(np.argmax(np.abs(t))), t.shape)
    vecs = []
    for ax in range(t.ndim):
        sl = list(at)
        sl[ax] = slice(None)
        vecs.append(t[tuple(sl)].astype(float).copy())
    vecs[0] = vecs[0] / t[at] ** (t.ndim - 1) if t.ndim > 1 else vecs[0]
    for _ in range(30):
        for ax in range(t.ndim):
            others = np.ones_like(t)
            for bx in range(t.ndim):
                if bx != ax:
                    shape = [1] * t.ndim
                    shape[bx] = t.shape[bx]
                    others = others * vecs[bx].reshape(shape)
            others = np.where(obs, others, 0.0)
            num = np.moveaxis(t * others, ax, 0).reshape(t.shape[ax], -1).sum(axis=1)
            den = np.moveaxis(others**2, ax, 0).reshape(t.shape[ax], -1).sum(axis=1)
            vecs[ax] = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        fit = vecs[0]
        for v in vecs[1:]:
            fit = np.multiply.outer(fit, v)
        if np.abs(np.where(obs, fit - t, 0.0)).max() <= 2 * tol:
            return vecs
    return None


# --------------------------------------------------------------------------------------------------
# Identification
# --------------------------------------------------------------------------------------------------
def _factor_function(x: np.ndarray, tol: float, view: TableView, names: list[str]
                     ) -> tuple[tuple[str, ...], np.ndarray] | None:
    """Smallest subset S of factors such that x is constant within S's groups, with the group means."""
    v = view.valid
    for subset in _subsets(names):
        size = int(np.prod(view.dims(subset))) if subset else 1
        key = view.key(subset)[v]
        lo, hi, mean = _group_extent(x[v], key, size)
        spread = np.nan_to_num(hi - lo, nan=0.0)
        if spread.max(initial=0.0) <= 2 * tol:
            return subset, mean.reshape(view.dims(subset)) if subset else mean
    return None


def _within_fit(x: np.ndarray, c: np.ndarray, ka: np.ndarray, ks: np.ndarray, tol: float
                ) -> tuple[dict[int, float], dict[int, float]] | None:
    """Exact fit of ``x = alpha(A-group) + beta(S-group) * c`` with every A-group inside one S-group.

    The least-squares solution in closed form (the within-group estimator): centre x and c in each A-group,
    then beta of an S-group is the ratio of the sums of cross-products and squares over its rows.  Returns
    (alpha by A-group, beta by S-group) when every residual is within ``2 * tol``, else None.  Requires some
    spread of c inside every S-group and a residual degree of freedom, so that small groups cannot fit
    anything.
    """
    size_a = int(ka.max()) + 1
    size_s = int(ks.max()) + 1
    na = np.bincount(ka, minlength=size_a)
    mean_c = np.bincount(ka, weights=c, minlength=size_a) / np.maximum(na, 1)
    mean_x = np.bincount(ka, weights=x, minlength=size_a) / np.maximum(na, 1)
    cc = c - mean_c[ka]
    xc = x - mean_x[ka]
    sxx = np.bincount(ks, weights=cc * cc, minlength=size_s)
    sxy = np.bincount(ks, weights=cc * xc, minlength=size_s)
    present_s = np.flatnonzero(np.bincount(ks, minlength=size_s))
    scale = float(np.abs(c).max()) or 1.0
    if np.any(sxx[present_s] <= (1e-12 * scale) ** 2 * na.max()):
        return None
    n_a = int((na > 0).sum())
    if x.size - n_a - present_s.size < 1:
        return None
    beta = np.zeros(size_s)
    beta[present_s] = sxy[present_s] / sxx[present_s]
    if np.abs(np.abs(xc - beta[ks] * cc)).max(initial=0.0) > 2 * tol:
        return None
    s_of_a = np.zeros(size_a, dtype=int)
    s_of_a[ka] = ks
    present_a = np.flatnonzero(na)
    alpha = {int(g): float(mean_x[g] - beta[s_of_a[g]] * mean_c[g]) for g in present_a}
    return alpha, {int(g): float(beta[g]) for g in present_s}


def _covariate_fit(x: np.ndarray, tol: float, view: TableView, names: list[str], cov: str
                   ) -> tuple[tuple[str, ...], tuple[str, ...], dict[int, float], dict[int, float]] | None:
    """Fit ``x = alpha(A) + beta(S) * c`` exactly, smallest S first, A = S or S plus one factor.

    Returns (S, A, alpha by A-group, beta by S-group) or None.
    """
    c = view.covariates[cov]
    v = view.valid & np.isfinite(c)
    if v.sum() < 3 or np.ptp(c[v]) == 0:
        return None
    cv, xv = c[v], x[v]
    for s in _subsets(names):
        ks = view.key(s)[v]
        for w in [()] + [(f,) for f in names if f not in s]:
            a = tuple(f for f in names if f in s or f in w)
            fit = _within_fit(xv, cv, view.key(a)[v], ks, tol)
            if fit is None:
                continue
            alpha, beta = fit
            if max(abs(b) for b in beta.values()) <= tol / max(float(np.abs(cv).max()), 1e-300):
                continue  # no slope: not a covariate column
            return s, a, alpha, beta
    return None


def identify_column(index: int, label: str, x: np.ndarray, tol: float, view: TableView) -> ColumnRole:
    """Identify one design column (see the module docstring)."""
    v = view.valid
    names = list(view.factors)
    if v.sum() == 0:
        return ColumnRole(index, label, "unexplained")
    if np.abs(x[v]).max() <= tol:
        return ColumnRole(index, label, "zero")
    found = _factor_function(x, tol, view, names)
    if found is not None:
        subset, table = found
        if not subset:
            value = float(np.asarray(table).ravel()[0])
            kind = "intercept" if abs(value - 1.0) <= tol else "constant"
            return ColumnRole(index, label, kind, constant=value)
        role = ColumnRole(index, label, "factor" if len(subset) == 1 else "interaction", factors=subset)
        _describe_factor_part(role, subset, np.asarray(table, dtype=float), tol, view)
        return role
    for cov in view.covariates:
        fit = _covariate_fit(x, tol, view, names, cov)
        if fit is None:
            continue
        s, a, alpha, beta = fit
        return _covariate_role(index, label, x, tol, view, cov, s, a, alpha, beta)
    return ColumnRole(index, label, "unexplained")


def _describe_factor_part(role: ColumnRole, subset: tuple[str, ...], table: np.ndarray, tol: float,
                          view: TableView) -> None:
    """Fill role.members / separable / scale from a table over the subset's levels (NaN unobserved).

    For one factor the member's ``raw`` is the table itself and ``role.scale`` is 1.  For several, the table
    is split into a product ``role.scale * outer(raw_1, raw_2, ...)`` with every ``raw`` in its canonical
    pattern (0/1 indicator, +1/-1 effect, orthonormal polynomial) where it has one.
    """
    if len(subset) == 1:
        f = subset[0]
        role.members = {f: classify_member(f, view.factors[f], view.scores[f], table, tol)}
        role.scale = 1.0
        return
    vecs = _rank_one(table, tol)
    if vecs is None:
        if role.kind == "interaction":
            role.kind = "cell_function"
        role.separable = False
        role.members = {}
        role.scale = 1.0
        role.table = table
        return
    scale = 1.0
    members = {}
    for f, vec in zip(subset, vecs, strict=True):
        peak = float(np.abs(vec).max()) or 1.0
        vec = vec / peak
        scale *= peak
        m = classify_member(f, view.factors[f], view.scores[f], vec, 1e-7)
        if m.scale < 0:  # canonical patterns are positive: put the sign into the column's scale
            scale, vec = -scale, -vec
            m = classify_member(f, view.factors[f], view.scores[f], vec, 1e-7)
        scale *= m.scale
        m.raw = vec / m.scale
        m.scale = 1.0
        members[f] = m
    role.members = members
    role.scale = scale


def _covariate_role(index: int, label: str, x: np.ndarray, tol: float, view: TableView, cov: str,
                    s: tuple[str, ...], a: tuple[str, ...], alpha: dict[int, float], beta: dict[int, float]
                    ) -> ColumnRole:
    c = view.covariates[cov]
    v = view.valid & np.isfinite(c)
    k = view.known & np.isfinite(c)
    mean, sd = float(c[k].mean()), float(c[k].std(ddof=1)) if k.sum() > 1 else 0.0
    kind = "covariate" if not s else "covariate_interaction"
    role = ColumnRole(index, label, kind, factors=s, covariate=cov)
    role.fit = (s, a, alpha, beta)
    ctol = 2 * tol
    if a == s:
        bs = np.array([beta[g] for g in alpha])
        al = np.array([alpha[g] for g in alpha])
        den = float((bs**2).sum())
        m = -float((al * bs).sum()) / den if den > 0 else 0.0
        if np.abs(al + m * bs).max(initial=0.0) <= ctol:
            role.centre = m
            slack = CENTRE_SLACK_SD * sd if sd > 0 else tol
            if abs(m - mean) <= slack:
                role.centre_kind = "mean"
            elif abs(m) <= max(slack, tol):
                role.centre_kind = "none"
            else:
                role.centre_kind = "value"
        else:
            role.centre_kind = "mixed"
            role.kind = "covariate_mixed"
    else:
        within = next(f for f in a if f not in s)
        role.centre_kind = "within"
        role.kind = "covariate_within"
        role.within = within
        # alpha(W-level) must equal -beta * (mean of c within the level) for within-centring.
        key = view.key((within,))[v]
        b0 = next(iter(beta.values()))
        ok = not s
        for g, al in alpha.items():
            lv_mean = float(c[v][key == g].mean())
            if abs(al + b0 * lv_mean) > ctol + abs(b0) * CENTRE_SLACK_SD * sd:
                ok = False
        if not ok:
            role.centre_kind = "mixed"
            role.kind = "covariate_mixed"
    if s:
        dims = view.dims(s)
        table = np.full(int(np.prod(dims)), np.nan)
        for g, b in beta.items():
            table[g] = b
        _describe_factor_part(role, s, table.reshape(dims), tol / max(np.abs(c[v]).max(), 1.0), view)
        role.cov_scale = 1.0
    else:
        role.cov_scale = float(next(iter(beta.values())))
    return role


# --------------------------------------------------------------------------------------------------
# Cell rows
# --------------------------------------------------------------------------------------------------
def fill_cells(roles: list[ColumnRole], x: np.ndarray, view: TableView, factors: list[str],
               covariates: list[str], pseudo: dict[int, str]) -> tuple[list[tuple[str, ...]], np.ndarray,
                                                                     dict[str, np.ndarray]]:
    """Every cell's design row (covariates at their mean) and every covariate's slope rows.

    Parameters
    ----------
    roles : list of ColumnRole
    x : ndarray, shape (n, p)
        The hand design.
    view : TableView
    factors : list of str
        The factors that span the cells (first slowest).
    covariates : list of str
        The table covariates the design uses.
    pseudo : dict
        Column index -> name, for unexplained columns treated as covariates of their own (held at their mean).

    Returns
    -------
    cells : list of tuple of str
    rows : ndarray, shape (n_cells, p)
        NaN where the identification does not give the value (a cell no row has, of a non-separable column).
    slopes : dict
        Covariate (or pseudo name) -> (n_cells, p).
    """
    levels = [view.factors[f] for f in factors]
    cell_index = list(product(*[range(len(lv)) for lv in levels]))
    cells = [tuple(lv[i] for lv, i in zip(levels, idx, strict=True)) for idx in cell_index]
    k, p = len(cells), x.shape[1]
    rows = np.full((k, p), np.nan)
    slopes = {c: np.zeros((k, p)) for c in list(covariates) + list(pseudo.values())}
    means = {c: float(np.nanmean(view.covariates[c][view.known])) for c in covariates}

    def sub_index(subset: tuple[str, ...], idx: tuple[int, ...]) -> tuple[int, ...]:
        return tuple(idx[factors.index(f)] for f in subset)

    for role in roles:
        j = role.index
        if role.kind in ("zero",):
            rows[:, j] = 0.0
        elif role.kind in ("intercept", "constant"):
            rows[:, j] = role.constant if role.constant is not None else 1.0
        elif role.kind in ("factor", "interaction", "cell_function"):
            for ci, idx in enumerate(cell_index):
                rows[ci, j] = _factor_value(role, sub_index(role.factors, idx), view)
        elif role.covariate is not None:
            cov = role.covariate
            assert role.fit is not None
            s, a, alpha, beta = role.fit
            for ci, idx in enumerate(cell_index):
                if s:
                    b = _factor_value(role, sub_index(s, idx), view)
                else:
                    b = role.cov_scale
                sa = sub_index(a, idx)
                ga = int(np.ravel_multi_index(sa, view.dims(a))) if a else 0
                if role.centre_kind == "mean":
                    # Centred at its mean up to the rounding of the typed centre: hold the covariate at that
                    # centre, so the column is exactly 0 in every cell as its author meant.
                    rows[ci, j] = 0.0
                    slopes[cov][ci, j] = b
                    continue
                if role.centre_kind in ("none", "value") and role.centre is not None:
                    al = -b * role.centre
                elif ga in alpha:
                    al = alpha[ga]
                else:
                    al = np.nan
                rows[ci, j] = al + b * means[cov]
                slopes[cov][ci, j] = b
        else:  # unexplained: a covariate of its own, held at its mean
            rows[:, j] = float(np.mean(x[view.valid, j])) if view.valid.any() else np.nan
            slopes[pseudo[j]][:, j] = 1.0
    return cells, rows, slopes


def _factor_value(role: ColumnRole, sub: tuple[int, ...], view: TableView) -> float:
    """The factor part of a column at one combination of its factors' levels (NaN if unknown)."""
    if role.separable and role.members:
        val = role.scale
        for f, i in zip(role.factors, sub, strict=True):
            val *= role.members[f].raw[i]
        return float(val)
    if role.table is None:
        return np.nan
    return float(role.table[sub])


# --------------------------------------------------------------------------------------------------
# Words
# --------------------------------------------------------------------------------------------------
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

    def matching_main(m: Member) -> ColumnRole | None:
        for r in main_of.get(m.factor, []):
            a, b = r.members[m.factor].raw, m.raw
            ok = np.isfinite(a) & np.isfinite(b)
            if not ok.any():
                continue
            na, nb = a[ok] / (np.abs(a[ok]).max() or 1.0), b[ok] / (np.abs(b[ok]).max() or 1.0)
            if np.allclose(na, nb, atol=1e-6) or np.allclose(na, -nb, atol=1e-6):
                return r
        return None

    # Orient each factor of an interaction as that factor's own column (the product's sign goes to the scale),
    # so "diet vegan vs mixed" is not written "diet mixed vs vegan" inside the interaction.
    for r in roles:
        if len(r.factors) >= 2 and r.separable and r.members:
            for f in r.factors:
                m = r.members[f]
                main = matching_main(m)
                if main is None:
                    continue
                ref = main.members[f].raw
                ok = np.isfinite(ref) & np.isfinite(m.raw)
                if float((ref[ok] * m.raw[ok]).sum()) < 0:
                    m.raw = -m.raw
                    r.scale = -r.scale
                    if m.kind == "effect":
                        m.level, m.reference = m.reference, m.level

    def single(m: Member) -> str:
        f = m.factor
        text = _member_text(m, view.factors[f], view.scores[f])
        if m.kind == "polynomial":
            typed = _poly_typed(m)
            return text + (typed or _scale_text(m.scale))
        if m.kind == "other":
            return text
        return text + _scale_text(m.scale)

    def factor_part(r: ColumnRole) -> str:
        if not r.separable:
            return f"a function of the {' x '.join(r.factors)} cells that is not a product of codings"
        if len(r.factors) == 1:
            return single(r.members[r.factors[0]])
        ms = [r.members[f] for f in r.factors]
        cell = ""
        if all(m.kind == "indicator" for m in ms):
            cell = "indicator of the cell " + ", ".join(f"{m.factor}={m.level}" for m in ms)
        mains = [matching_main(m) for m in ms]
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

    for r in roles:
        if r.kind == "zero":
            r.description = "all zero"
        elif r.kind == "intercept":
            r.description = "intercept (1 in every row)"
        elif r.kind == "constant":
            r.description = f"a constant ({_num(r.constant or 0.0)} in every row; acts as the intercept)"
        elif r.kind in ("factor", "interaction", "cell_function"):
            r.description = factor_part(r)
        elif r.covariate is not None:
            c = r.covariate
            mean, sd = means.get(c, np.nan), sds.get(c, np.nan)
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
            if not r.factors:
                a = r.cov_scale
                if sd > 0 and abs(abs(a) * sd - 1) <= 0.01:
                    scale = ", divided by its SD" + (" (sign reversed)" if a < 0 else "")
                else:
                    scale = _scale_text(a)
                r.description = f"covariate {c} ({centre}){scale}"
            else:
                r.description = f"covariate {c} ({centre}) times {factor_part(r)}"
        else:
            r.description = "unexplained: not a coding of the given factors nor a covariate of the table"


def _poly_typed(m: Member) -> str:
    vals = m.raw
    if np.all(np.abs(vals - np.round(vals)) < 1e-6) and abs(abs(m.poly_scale) - 1.0) > 1e-6:
        return " = " + ", ".join(_num(v) for v in vals)
    return ""
