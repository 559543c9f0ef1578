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
:meth:`groupmodel.audit.read.MatrixFile.tolerance`): a column is a function of a
set of factors when it is constant within their cells, and a covariate column
when ``x = alpha(cell) + beta(cell) * c`` fits with no residual.  The smallest
set of factors that explains a column is taken.

From the identification every cell gets its design row (covariates held at
their mean over the design rows) and every covariate its slope row, which is what
:mod:`groupmodel.hypotheses` needs to state contrasts over cell means (see
:mod:`groupmodel.audit.cells`; the words are in :mod:`groupmodel.audit.words`).
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from itertools import combinations
from typing import TYPE_CHECKING, Any

import numpy as np

from ..model.coding import orthogonal_polynomials
from .table_view import PreparedTable, TableView

if TYPE_CHECKING:
    from .context import Files

#: A covariate counts as centred at its mean when the centre lies within this many SDs of the mean
#: (hand-typed centres are rounded; a centre from another sample is further off).
CENTRE_SLACK_SD = 0.01



@dataclass(frozen=True)
class CovariateFit:
    """An exact fit ``x = alpha(A-group) + beta(S-group) * covariate`` of a design column.

    Unpacks as ``(S, A, alpha by A-group, beta by S-group)``.
    """

    s: tuple[str, ...]
    a: tuple[str, ...]
    alpha: dict[int, float]
    beta: dict[int, float]
    covariate: str

    def __iter__(self) -> Iterator[Any]:
        return iter((self.s, self.a, self.alpha, self.beta))


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
                # Orthonormal codes typed with few decimals (-0.67 for -0.6708) are those codes, rounded.
                if tol > 0 and np.abs(u - math.copysign(1.0, c) * poly[:, d]).max() <= tol * (1 + 1e-6):
                    c = math.copysign(1.0, c)
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


def _covariate_fit(x: np.ndarray, tol: float, view: TableView, names: list[str], cov: str) -> CovariateFit | None:
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
            return CovariateFit(s, a, alpha, beta, cov)
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
        return _covariate_role(index, label, x, tol, view, fit)
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


def _covariate_role(index: int, label: str, x: np.ndarray, tol: float, view: TableView, fit: CovariateFit
                    ) -> ColumnRole:
    """A covariate column from its exact fit: where it is centred, and the factor part of its slope."""
    s, a, alpha, beta = fit
    c = view.covariates[fit.covariate]
    v = view.valid & np.isfinite(c)
    k = view.known & np.isfinite(c)
    mean, sd = float(c[k].mean()), float(c[k].std(ddof=1)) if k.sum() > 1 else 0.0
    kind = "covariate" if not s else "covariate_interaction"
    role = ColumnRole(index, label, kind, factors=s, covariate=fit.covariate)
    role.fit = (s, a, alpha, beta)
    if a == s:
        _centre_at_value(role, alpha, beta, tol, mean, sd)
    else:
        _centre_within(role, fit, view, 2 * tol, sd)
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


def _centre_at_value(role: ColumnRole, alpha: dict[int, float], beta: dict[int, float], tol: float, mean: float,
                     sd: float) -> None:
    """Offsets ``alpha = -beta * m`` for one value m: centred at the mean, at 0 (none) or at another value."""
    bs = np.array([beta[g] for g in alpha])
    al = np.array([alpha[g] for g in alpha])
    den = float((bs**2).sum())
    m = -float((al * bs).sum()) / den if den > 0 else 0.0
    if np.abs(al + m * bs).max(initial=0.0) <= 2 * tol:
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


def _centre_within(role: ColumnRole, fit: CovariateFit, view: TableView, ctol: float, sd: float) -> None:
    """Offsets by the levels of one more factor: centred within its levels, or mixed."""
    s, a, alpha, beta = fit
    c = view.covariates[fit.covariate]
    v = view.valid & np.isfinite(c)
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


def columns_explained(files: Files, table: PreparedTable, align: np.ndarray) -> int:
    """How many columns a quick identification (factor codings and plain covariates) explains with the rows
    read as the table rows ``align``."""
    view = table.view(align)
    x = files.x
    count = 0
    names = list(view.factors)
    for j in range(x.n_columns):
        col, tol = x.values[:, j], x.tolerance(j)
        if _factor_function(col, tol, view, names) is not None:
            count += 1
            continue
        if any(_covariate_fit(col, tol, view, [], c) is not None for c in view.covariates):
            count += 1
    return count
