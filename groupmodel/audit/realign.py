"""Which participant every design row is, found without trusting the rows' order (part of ``groupmodel check``).

A design file without a ``participant_id`` column is read as following the participants table.  When it does
not (rows sorted by group, a block of rows moved), the columns cannot be read in table order.  This module
finds the rows' participants from the rows themselves:

* the factor columns of a correct design carry one coding per cell, so the design rows fall into groups of
  equal coding whose sizes must be the numbers of participants per cell in the table; each group is matched
  to a cell (the matching under which the columns are the simplest codings of the factors, then the one that
  keeps most rows where the table has them, then the conventional codings and level order);
* a covariate column (``a + b x covariate``) carries every participant's own value, whatever the order: where
  the values are distinct it says which participant each row is, also within a cell;
* the reordering is then recognised as one simple permutation where it is one (see
  :mod:`groupmodel.audit.reorder_words`).

Rows of one cell with no covariate column to tell them apart stay interchangeable: within a cell the table
order is assumed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import combinations, permutations, product

import numpy as np

from ..model.coding import make_coding
from .context import Files
from .reorder_words import Family, simplest_family
from .table_view import PreparedTable, TableView

#: At most this many matchings of coding groups to cells are compared (beyond it: the best by agreement only).
MAX_MATCHINGS = 5040
#: A matching that keeps at least this share of rows where the table has them is taken as the rows' own (rows
#: sorted by group keep about half in place by chance, so a weaker agreement says nothing).
STRONG_AGREEMENT = 0.75
#: ... and so is one that keeps at least this share in place *and* more than chance would, by AGREEMENT_SDS
#: standard deviations: rows in a random order agree with the table's cells in about sum(n_c^2) / n rows, with
#: about that variance (a Poisson count), while a shift or a moved block keeps every row outside it.  (The share
#: guards against the best of many matchings of equal-sized cells agreeing beyond chance by selection alone.)
FAIR_AGREEMENT = 0.4
AGREEMENT_SDS = 3.0


@dataclass(frozen=True)
class Matched:
    """The result of matching design rows to participants without trusting their order.

    Attributes
    ----------
    order : ndarray of int, shape (n,)
        For every design row, its position in the expected participant order (0-based).
    row_codes : dict
        Factor -> (n,) level index of every design row (as its coding says).
    factors : tuple of str
        The factors whose cells the factor columns encode.
    covariate : str or None
        The covariate whose column told rows apart (None: the factor columns only).
    family : Family
        The simplest permutation found.
    others : tuple of str
        Other factors (or factor combinations) whose cells the factor columns fit equally well.
    exact : bool
        True when every row's participant is certain (no two interchangeable rows were moved).
    """

    order: np.ndarray
    row_codes: dict[str, np.ndarray]
    factors: tuple[str, ...]
    covariate: str | None
    exact: bool
    family: Family
    others: tuple[str, ...] = ()


@dataclass(frozen=True)
class _Labels:
    """Integer labels of the expected positions and of the design rows (equal labels: indistinguishable)."""

    pos: np.ndarray
    row: np.ndarray
    row_codes: dict[str, np.ndarray]
    factors: tuple[str, ...]
    covariate: str | None
    others: tuple[str, ...] = ()


def discrete_columns(files: Files, n_cells: int) -> list[int]:
    """Columns taking 2 to ``n_cells`` distinct values (up to their typed precision): codings of the factors."""
    x = files.x
    out = []
    for j in range(x.n_columns):
        vals = np.round(x.values[:, j] / (2 * x.tolerance(j)))
        k = len(np.unique(vals))
        if 2 <= k <= max(2, n_cells):
            out.append(j)
    return out


def match_rows(files: Files, table: PreparedTable, expected: np.ndarray) -> Matched | None:
    """Every design row's position in ``expected`` (table rows in the order the design claims), or None.

    None when the rows cannot be matched to the cells (or the covariate values) of the expected participants.
    """
    view = table.view(np.asarray(expected, dtype=int))
    if any((c < 0).any() for c in view.codes.values()):
        return None
    labels = _labels(files, view)
    if labels is None:
        return None
    keys = {f: (labels.row_codes[f], view.codes[f]) for f in labels.factors}
    order, family = simplest_family(labels.row, labels.pos, keys)
    counts = np.bincount(labels.pos)
    moved = order != np.arange(order.size)
    exact = bool((counts[labels.pos[order[moved]]] == 1).all()) if moved.any() else True
    return Matched(order, labels.row_codes, labels.factors, labels.covariate, exact, family, labels.others)


def _labels(files: Files, view: TableView) -> _Labels | None:
    """Cells (and covariate values, where a column carries them) of expected positions and of design rows."""
    names = tuple(view.factors)
    full = view.key(names)
    n_cells = len(np.unique(full))
    discrete = discrete_columns(files, n_cells) if names else []
    cov = _covariate_classes(files, view, discrete)
    if not discrete:
        if cov is None:
            return None
        pos, row, c = cov
        return _Labels(pos, row, {}, (), c)
    x = files.x
    pats = np.array([np.round(x.values[:, j] / (2 * x.tolerance(j))) for j in discrete]).T
    _, pid = np.unique(pats, axis=0, return_inverse=True)
    pid = pid.ravel()
    found_all = []
    for k in range(1, len(names) + 1):
        for s in combinations(names, k):
            found = _match_cells(pid, view, s, (files, discrete, cov))
            if found is not None:
                found_all.append((found[0], s, found[1]))
    if not found_all:
        return None
    key, s, bij = min(found_all, key=lambda b: b[0])
    # Another set of factors whose cells the coding fits as well (the same evidence short of the final tie-breaks).
    others = tuple(" x ".join(o[1]) for o in found_all if o[1] != s and o[0][:4] == key[:4])
    cell_pos = view.key(s)
    cell_row = np.array([bij[int(p)] for p in pid])
    dims = view.dims(s)
    idx = np.unravel_index(cell_row, dims)
    row_codes = {f: np.asarray(idx[a], dtype=int) for a, f in enumerate(s)}
    if cov is not None:
        cpos, crow, c = cov
        base = int(max(cpos.max(), crow.max())) + 1
        pos_l, row_l = cell_pos.astype(np.int64) * base + cpos, cell_row.astype(np.int64) * base + crow
        if sorted(pos_l.tolist()) == sorted(row_l.tolist()):
            return _Labels(*_relabel(pos_l, row_l), row_codes, s, c, others)
    return _Labels(*_relabel(cell_pos, cell_row), row_codes, s, None, others)


def _relabel(pos: np.ndarray, row: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    _, inv = np.unique(np.concatenate([pos, row]), return_inverse=True)
    inv = inv.ravel()
    return inv[: pos.size], inv[pos.size:]


def _covariate_classes(files: Files, view: TableView, discrete: list[int]
                       ) -> tuple[np.ndarray, np.ndarray, str] | None:
    """A column equal to ``a + b x covariate`` in some order: the covariate value of every row.

    Returns value classes of the expected positions and of the design rows (equal values: one class), and the
    covariate, or None when no column carries a covariate of the table.
    """
    x = files.x
    for j in range(x.n_columns):
        if j in discrete:
            continue
        col, tol = x.values[:, j], 2 * x.tolerance(j)
        for c, vals in view.covariates.items():
            if not np.isfinite(vals).all() or np.ptp(vals) == 0 or len(np.unique(vals)) < 3:
                continue
            found = _sorted_fit(col, vals, tol)
            if found is None:
                continue
            a, b = found
            guess = (col - a) / b
            uniq = np.unique(vals)
            near = np.abs(guess[:, None] - uniq[None, :])
            cls_row = near.argmin(axis=1)
            if near[np.arange(col.size), cls_row].max() * abs(b) > tol + 1e-9:
                continue
            cls_pos = np.searchsorted(uniq, vals)
            if sorted(cls_row.tolist()) != sorted(cls_pos.tolist()):
                continue
            return cls_pos, cls_row, c
    return None


def _sorted_fit(col: np.ndarray, vals: np.ndarray, tol: float) -> tuple[float, float] | None:
    """``col`` as a permutation of ``a + b * vals`` (exact up to ``tol``): (a, b), or None."""
    xs = np.sort(col)
    for cs in (np.sort(vals), np.sort(vals)[::-1]):
        design = np.column_stack([np.ones(cs.size), cs])
        coef, *_ = np.linalg.lstsq(design, xs, rcond=None)
        if abs(coef[1]) > 0 and np.abs(design @ coef - xs).max() <= tol:
            return float(coef[0]), float(coef[1])
    return None


def _match_cells(pid: np.ndarray, view: TableView, s: tuple[str, ...],
                 extra: tuple[Files, list[int], tuple[np.ndarray, np.ndarray, str] | None]
                 ) -> tuple[tuple, dict[int, int]] | None:
    """The best matching of coding groups to the cells of ``s`` (equal sizes), with its sort key (lower better)."""
    files, discrete, cov = extra
    cell_pos = view.key(s)
    n = pid.size
    n_pat = int(pid.max()) + 1
    pat_count = np.bincount(pid, minlength=n_pat)
    cells, cell_count = np.unique(cell_pos, return_counts=True)
    if len(cells) != n_pat or sorted(pat_count.tolist()) != sorted(cell_count.tolist()):
        return None
    agree = _agreement(pid, cell_pos, cells, cov)
    groups: dict[int, tuple[list[int], list[int]]] = {}
    for p in range(n_pat):
        groups.setdefault(int(pat_count[p]), ([], []))[0].append(p)
    for ci, k in zip(cells, cell_count, strict=True):
        groups[int(k)][1].append(int(ci))
    total = 1
    for pats, _ in groups.values():
        total *= math.factorial(len(pats))
    means = _pattern_means(files, discrete, pid, n_pat)
    chance = float(np.sum(cell_count.astype(float) ** 2)) / n
    more = (agree, cells, n, cov is not None, pid, chance + AGREEMENT_SDS * math.sqrt(chance))
    if total > MAX_MATCHINGS:
        found = _factorwise(pid, means, view, s, more)
        if found is not None:
            return found
        start = {p: c for pats, cs in groups.values() for p, c in _best_by_agreement(pats, cs, agree, cells).items()}
        return _improve(start, [pats for pats, _ in groups.values()], (means, view, s, more))
    options = [[dict(zip(pats, perm, strict=True)) for perm in permutations(cs)] for pats, cs in groups.values()]
    best = None
    for combo in product(*options):
        bij = {p: c for part in combo for p, c in part.items()}
        key = _matching_key(bij, means, view, s, more)
        if best is None or key < best[0]:
            best = (key, bij)
    return best


def _factorwise(pid: np.ndarray, means: np.ndarray, view: TableView, s: tuple[str, ...], more: tuple
                ) -> tuple[tuple, dict[int, int]] | None:
    """Many cells of equal size: find each factor's levels among the coding groups first.

    A factor's main-effect columns (one to three of them taken together) split the coding groups into as many
    classes as the factor has levels, of the sizes its levels have in the table; one such split per factor,
    jointly telling every coding group apart, gives the cells up to the names of each factor's levels, which
    are then matched as for a small design.
    """
    n_pat = means.shape[0]
    scale = np.abs(means).max() + 1.0
    rounded = np.round(means / (1e-7 * scale)).astype(np.int64)
    splits: list[list[np.ndarray]] = []
    for f in s:
        sizes = sorted(np.bincount(view.codes[f]).tolist())
        sizes = [k for k in sizes if k > 0]
        found: dict[tuple[int, ...], np.ndarray] = {}
        for size in range(1, min(len(sizes) - 1, 3) + 1):
            for cols in combinations(range(means.shape[1]), size):
                _, part = np.unique(rounded[:, list(cols)], axis=0, return_inverse=True)
                part = part.ravel()
                if sorted(np.bincount(part[pid]).tolist()) == sizes:
                    found.setdefault(tuple(part.tolist()), part)
        if not found:
            return None
        splits.append(list(found.values())[:6])
    best = None
    for combo in product(*splits):
        if len({tuple(int(part[p]) for part in combo) for p in range(n_pat)}) != n_pat:
            continue
        for bij in _level_namings(combo, pid, view, s):
            key = _matching_key(bij, means, view, s, more)
            if best is None or key < best[0]:
                best = (key, bij)
    return best


def _level_namings(combo: tuple[np.ndarray, ...], pid: np.ndarray, view: TableView, s: tuple[str, ...]):
    """Every naming of each split's classes by the factor's levels of the same sizes, as a matching of coding
    groups to cells (at most MAX_MATCHINGS of them)."""
    per_factor = []
    for part, f in zip(combo, s, strict=True):
        class_size = np.bincount(part[pid])
        level_size = np.bincount(view.codes[f], minlength=len(view.factors[f]))
        levels = [lv for lv in range(level_size.size) if level_size[lv] > 0]
        options = [perm for perm in permutations(levels)
                   if all(class_size[c] == level_size[lv] for c, lv in enumerate(perm))]
        per_factor.append(options)
    dims = view.dims(s)
    cell_size = np.bincount(view.key(s), minlength=int(np.prod(dims)))
    pat_size = np.bincount(pid)
    for count, naming in enumerate(product(*per_factor)):
        if count >= MAX_MATCHINGS:
            return
        bij = {}
        for p in range(pat_size.size):
            bij[p] = int(np.ravel_multi_index(tuple(naming[a][int(part[p])] for a, part in enumerate(combo)), dims))
        if all(cell_size[c] == pat_size[p] for p, c in bij.items()):
            yield bij


def _improve(bij: dict[int, int], groups: list[list[int]], how: tuple) -> tuple[tuple, dict[int, int]]:
    """Too many matchings to try them all: exchange the cells of two coding groups of equal size while that
    improves the matching (a local search from the matching that keeps most rows in place)."""
    means, view, s, more = how
    key = _matching_key(bij, means, view, s, more)
    for _ in range(50):
        improved = False
        for pats in groups:
            for a, b in combinations(pats, 2):
                trial = dict(bij)
                trial[a], trial[b] = bij[b], bij[a]
                k = _matching_key(trial, means, view, s, more)
                if k < key:
                    bij, key, improved = trial, k, True
        if not improved:
            break
    return key, bij


def _agreement(pid: np.ndarray, cell_pos: np.ndarray, cells: np.ndarray,
               cov: tuple[np.ndarray, np.ndarray, str] | None) -> np.ndarray:
    """(patterns, cells): how many rows of each coding group the claimed order (or the covariate) puts there."""
    n_pat = int(pid.max()) + 1
    index = {int(c): a for a, c in enumerate(cells)}
    agree = np.zeros((n_pat, len(cells)))
    if cov is None:
        for i, p in enumerate(pid):
            agree[p, index[int(cell_pos[i])]] += 1
        return agree
    cls_pos, cls_row, _ = cov
    for i, p in enumerate(pid):
        members = cell_pos[cls_pos == cls_row[i]]
        for c in members:
            agree[p, index[int(c)]] += 1.0 / members.size
    return agree


def _best_by_agreement(pats: list[int], cs: list[int], agree: np.ndarray, cells: np.ndarray) -> dict[int, int]:
    from scipy.optimize import linear_sum_assignment

    index = {int(c): a for a, c in enumerate(cells)}
    w = agree[np.ix_(pats, [index[c] for c in cs])]
    r, c = linear_sum_assignment(-w)
    return {pats[a]: cs[b] for a, b in zip(r, c, strict=True)}


def _pattern_means(files: Files, discrete: list[int], pid: np.ndarray, n_pat: int) -> np.ndarray:
    """(patterns, discrete columns): the column values of every coding group."""
    x = files.x.values[:, discrete]
    out = np.zeros((n_pat, len(discrete)))
    for p in range(n_pat):
        out[p] = x[pid == p].mean(axis=0)
    return out


def _matching_key(bij: dict[int, int], means: np.ndarray, view: TableView, s: tuple[str, ...],
                  more: tuple[np.ndarray, np.ndarray, int, bool, np.ndarray, float]) -> tuple:
    """Sort key of a matching: covariate agreement, simplest codings, rows kept in place (when beyond chance),
    conventions."""
    agree, cells, n, by_cov, pid, beyond_chance = more
    index = {int(c): a for a, c in enumerate(cells)}
    got = float(sum(agree[p, index[c]] for p, c in bij.items()))
    dims = view.dims(s)
    cell_levels = np.array(np.unravel_index(np.array([bij[p] for p in range(len(bij))]), dims)).T
    structure, canon = _structure(means, cell_levels, s, view)
    order = _level_order_score(pid, bij, dims)
    fair = got >= FAIR_AGREEMENT * n and got >= beyond_chance
    strong = got if by_cov or got >= STRONG_AGREEMENT * n or fair else 0.0
    return (-(got if by_cov else 0.0), structure, -strong, -canon, -order, -got)


def _structure(means: np.ndarray, cell_levels: np.ndarray, s: tuple[str, ...], view: TableView
               ) -> tuple[int, int]:
    """Sum over columns of the size of the smallest factor set each is a function of; conventional codings."""
    tol = 1e-9 * (np.abs(means).max() + 1.0)
    subsets = [a for k in range(len(s) + 1) for a in combinations(range(len(s)), k)]
    total = 0
    single: dict[int, list[int]] = {}
    for j in range(means.shape[1]):
        v = means[:, j]
        for a in subsets:
            if _is_function(v, cell_levels[:, list(a)], tol):
                total += len(a)
                if len(a) == 1:
                    single.setdefault(a[0], []).append(j)
                break
    canon = 0
    for ax, cols in single.items():
        f = s[ax]
        k = len(view.factors[f])
        u = np.full((k, len(cols)), np.nan)
        for p in range(means.shape[0]):
            u[cell_levels[p, ax]] = means[p, cols]
        canon += int(_conventional(u, f, view))
    return total, canon


def _is_function(v: np.ndarray, keys: np.ndarray, tol: float) -> bool:
    if keys.shape[1] == 0:
        return bool(np.ptp(v) <= tol)
    seen: dict[tuple[int, ...], float] = {}
    for val, key in zip(v, map(tuple, keys.tolist()), strict=True):
        if key in seen and abs(seen[key] - val) > tol:
            return False
        seen.setdefault(key, float(val))
    return True


def _conventional(u: np.ndarray, f: str, view: TableView) -> bool:
    """Do one factor's columns (values at its levels, in column order) follow a coding's usual layout?"""
    if not np.isfinite(u).all():
        return False
    levels, scores = view.factors[f], view.scores[f]
    for scheme in ("treatment", "effect", "indicator", "polynomial"):
        mat = make_coding(f, levels, scheme, None, scores).matrix  # type: ignore[arg-type]
        if mat.shape[1] < u.shape[1]:
            continue
        for start in range(mat.shape[1] - u.shape[1] + 1):
            ref = mat[:, start:start + u.shape[1]]
            if all(_proportional(u[:, j], ref[:, j]) for j in range(u.shape[1])):
                return True
    return False


def _proportional(a: np.ndarray, b: np.ndarray) -> bool:
    nb = float(b @ b)
    if nb == 0:
        return False
    s = float(a @ b) / nb
    return s > 0 and bool(np.abs(a - s * b).max() <= 1e-6 * (np.abs(a).max() + 1.0))


def _level_order_score(pid: np.ndarray, bij: dict[int, int], dims: tuple[int, ...]) -> int:
    """How many factors come in one block per level down the design, in their declared order (sorted rows)."""
    cells = np.array([bij[int(p)] for p in pid])
    idx = np.unravel_index(cells, dims)
    score = 0
    for codes in idx:
        seq = np.asarray(codes).tolist()
        first = list(dict.fromkeys(seq))
        runs = 1 + int(np.count_nonzero(np.diff(seq)))
        score += int(runs == len(first) and first == sorted(first))  # grouped, levels in their order
    return score
