"""Welch's statistics for groups with unequal residual variances: a pure function of (prepared design, chunk).

The OLS fit is unchanged (effects ``L b`` as in :mod:`groupmodel.engine.ols`); what changes is the variance of
the effects.  Each variance group ``g`` (the levels of one factor) gets its own residual variance

    sigma2_g = RSS_g / rho_g,    RSS_g = sum of squared OLS residuals of its rows,
    rho_g = sum over its rows of R_nn,   R = I - X X^+ (the residual-forming matrix),

so ``rho_g = n_g - 1`` for a group that is one cell of the design.  With ``W`` the diagonal matrix holding
``1 / sigma2_g`` on the rows of group ``g``, the variance of ``L b`` is taken as ``V = L (X'WX)^+ L'``
(Winkler et al. 2014, NeuroImage 92:381-397, section "Statistics", the v and G statistics).  In the SVD
coordinates of :mod:`groupmodel.engine.ols` (``X = U S V'``, ``A = L V_r S_r^-1``) this is
``V = A H^-1 A'`` with ``H = U'WU = sum_g K_g / sigma2_g`` and ``K_g = U_g'U_g`` (``U_g``: the rows of group g).

* t tests: the Aspin-Welch v statistic ``v = L b / sqrt(V)``.  Its degrees of freedom are the
  Welch-Satterthwaite approximation ``nu = V^2 / sum_g (d_g / sigma2_g)^2 / rho_g`` with
  ``d_g = a'H^-1 K_g H^-1 a`` (``dV / d sigma2_g = d_g / sigma2_g^2``, and ``Var(sigma2_g) = 2 sigma2_g^2 / rho_g``);
  when the contrast is over cell means of a cell-means design this is the textbook
  ``(sum c_g^2 s_g^2 / n_g)^2 / sum (c_g^2 s_g^2 / n_g)^2 / (n_g - 1)`` (two groups: ``scipy.stats.ttest_ind``
  with ``equal_var=False``).
* F tests: Welch's (1951) G statistic as generalised by Winkler et al. (2014):
  ``G = (L b)' V^-1 (L b) / (s Lambda)``, ``s = rank(L)``,
  ``Lambda = 1 + 2 (s - 1) / (s (s + 2)) * S``, ``nu = s (s + 2) / (3 S)``,
  ``S = sum_g (1 - w_g / sum_h w_h)^2 / rho_g`` with ``w_g = n_g / sigma2_g`` (the sum of W over group g);
  G is referred to ``F(s, nu)``.  For the one-way layout this is Welch's (1951) test.  For one row (s = 1)
  ``Lambda = 1`` and ``G = v^2``; its df are then v's Welch-Satterthwaite df (specific to the contrast), so that a
  one-row F test and the two-sided v test agree.  (Winkler et al.'s ``nu = 1 / S`` is the same for two variance
  groups, but for more it ignores which groups the contrast involves.)

Voxels where some group has (numerically) zero residual variance get NaN statistics, df, p and z.
Everything is per voxel: results do not depend on the chunking.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..errors import InputError, ModelError
from . import tails
from .ols import ZERO_VARIANCE_FACTOR, Prepared

__all__ = [
    "GROUP_DF_MIN",
    "WelchChunk",
    "WelchPrepared",
    "WelchResult",
    "fit_chunk_welch",
    "group_residual_df",
    "prepare_welch",
    "welch_statistics",
]

_EPS = float(np.finfo(np.float64).eps)
#: A variance group needs at least this much residual df (rho_g, the sum of its R_nn) for a variance.
GROUP_DF_MIN = 0.5
#: Voxels per block when forming residuals (keeps the (n, block) temporaries small).
_BLOCK_ELEMENTS = 2**18


def group_residual_df(u: np.ndarray, labels: np.ndarray, k: int) -> np.ndarray:
    """``rho_g``: the sum of the diagonal of ``R = I - U U'`` over the rows of each group (k,)."""
    r_diag = 1.0 - np.einsum("ij,ij->i", u, u)
    return np.bincount(labels, weights=r_diag, minlength=k)


@dataclass(frozen=True, eq=False)
class WelchPrepared:
    """An OLS :class:`~groupmodel.engine.ols.Prepared` with its variance groups; holds no data and pickles.

    Attributes
    ----------
    base : Prepared
    labels : ndarray of int, shape (n,)
        Variance group (0 .. k-1) of every design row.
    names : tuple of str
        The groups' names, in label order.
    sizes : ndarray, shape (k,)
        Rows per group.
    resid_df : ndarray, shape (k,)
        ``rho_g`` (see the module notes).
    gram : ndarray, shape (k, r, r)
        ``K_g = U_g' U_g``.
    """

    base: Prepared
    labels: np.ndarray
    names: tuple[str, ...]
    sizes: np.ndarray
    resid_df: np.ndarray
    gram: np.ndarray

    @property
    def k(self) -> int:
        return len(self.names)


def prepare_welch(prepared: Prepared, labels: np.ndarray, names: tuple[str, ...]) -> WelchPrepared:
    """Attach variance groups to a prepared design.

    Raises
    ------
    InputError
        Labels not one integer in ``0 .. len(names) - 1`` per design row.
    ModelError
        A group with fewer than 2 rows or less than :data:`GROUP_DF_MIN` residual df (its residuals are fitted
        away by the design, so it has no variance of its own).
    """
    labels = np.asarray(labels)
    k = len(names)
    if labels.shape != (prepared.n_obs,) or not np.issubdtype(labels.dtype, np.integer) or (
            labels.size and (labels.min() < 0 or labels.max() >= k)):
        raise InputError(f"expected one variance-group label in 0..{k - 1} per design row ({prepared.n_obs}), "
                         f"got {labels.shape} labels of dtype {labels.dtype}; label every row")
    sizes = np.bincount(labels, minlength=k)
    rho = group_residual_df(prepared.u, labels, k)
    for g in range(k):
        if sizes[g] < 2 or rho[g] < GROUP_DF_MIN:
            raise ModelError(
                f"expected every variance group to keep residual degrees of freedom, got group {names[g]!r} with "
                f"{int(sizes[g])} rows and {rho[g]:.3g} residual df; merge it with another group or add observations"
            )
    gram = np.stack([prepared.u[labels == g].T @ prepared.u[labels == g] for g in range(k)])
    labels = labels.astype(np.int64)
    for a in (labels, sizes, rho, gram):
        a.setflags(write=False)
    return WelchPrepared(prepared, labels, tuple(names), sizes.astype(float), rho, gram)


@dataclass(frozen=True, eq=False)
class WelchResult:
    """One test on one chunk (arrays (v,); ``effect`` (q, v) for F).

    ``statistic`` is v (t tests) or G (F tests); ``df2`` is its approximate denominator df per voxel;
    ``se`` is ``sqrt(V)`` for t tests (None for F).
    """

    name: str
    kind: str
    tail: str
    statistic_name: str
    effect: np.ndarray
    se: np.ndarray | None
    statistic: np.ndarray
    df1: int
    df2: np.ndarray
    p: np.ndarray
    log_p: np.ndarray
    z: np.ndarray
    mlog10p: np.ndarray


@dataclass(frozen=True, eq=False)
class WelchChunk:
    """Results of :func:`fit_chunk_welch`: the pooled residual variance (v,), each group's (k, v), and the tests."""

    residual_variance: np.ndarray
    group_variance: np.ndarray
    tests: Mapping[str, WelchResult]

    def __getitem__(self, name: str) -> WelchResult:
        return self.tests[name]


def _cholesky(m: np.ndarray) -> np.ndarray:
    """Lower Cholesky factors of a stack of small symmetric positive definite matrices laid out (r, r, v).

    Written out over the r x r entries so that each step is one operation over all voxels (np.linalg on
    (v, r, r) stacks spends most of its time per matrix).  A matrix that is not positive definite gives NaN.
    """
    r = m.shape[0]
    low = np.zeros_like(m)
    with np.errstate(invalid="ignore", divide="ignore"):
        for j in range(r):
            d = m[j, j] - np.sum(low[j, :j] ** 2, axis=0)
            low[j, j] = np.sqrt(np.where(d > 0, d, np.nan))
            for i in range(j + 1, r):
                low[i, j] = (m[i, j] - np.sum(low[i, :j] * low[j, :j], axis=0)) / low[j, j]
    return low


def _forward(low: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``L^-1 b`` for stacks laid out (r, r, v) and (r, q, v)."""
    z = np.empty_like(b)
    for i in range(low.shape[0]):
        z[i] = (b[i] - np.einsum("kv,kqv->qv", low[i, :i], z[:i])) / low[i, i]
    return z


def _backward(low: np.ndarray, z: np.ndarray) -> np.ndarray:
    """``L'^-1 z`` for stacks laid out (r, r, v) and (r, v)."""
    r = low.shape[0]
    x = np.empty_like(z)
    for i in range(r - 1, -1, -1):
        x[i] = (z[i] - np.sum(low[i + 1:, i] * x[i + 1:], axis=0)) / low[i, i]
    return x


def welch_statistics(wp: WelchPrepared, a: np.ndarray, effect: np.ndarray, group_var: np.ndarray,
                     kind: str, with_df: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """v (kind ``t``) or G (kind ``F``), its approximate df and ``V`` (t) or ``s Lambda`` (F), per voxel.

    Parameters
    ----------
    a : ndarray, shape (q, r)
        The test in SVD coordinates (``L V_r S_r^-1``).
    effect : ndarray, shape (q, v)
        ``L b``.
    group_var : ndarray, shape (k, v)
        Residual variance of each group; NaN (or 0) marks a voxel without a test.
    with_df : bool
        Also compute the df (the permutation loop does not need them: the df returned are then NaN).
    """
    q, v = effect.shape
    with np.errstate(divide="ignore", invalid="ignore"):
        w = 1.0 / np.where(group_var > 0, group_var, np.nan)  # (k, v)
    bad = ~np.all(np.isfinite(w), axis=0) | ~np.all(np.isfinite(effect), axis=0)
    w[:, bad] = 1.0  # keeps the factorisations finite; the results are set to NaN below
    r = a.shape[1]
    h = (wp.gram.reshape(wp.k, r * r).T @ w).reshape(r, r, v)  # H = sum_g w_g K_g, laid out (r, r, v)
    low = _cholesky(h)
    z = _forward(low, np.broadcast_to(a.T[:, :, None], (r, q, v)))  # (r, q, v): L^-1 A'
    df = np.full(v, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "t" or q == 1:  # one row: v, or G = v^2 (Lambda = 1) on v's Welch-Satterthwaite df
            var = np.sum(z[:, 0] ** 2, axis=0)  # a'H^-1 a
            stat = effect[0] / np.sqrt(var)
            if with_df or kind == "F":
                x = _backward(low, z[:, 0])  # H^-1 a, (r, v)
                d = np.einsum("iv,kij,jv->kv", x, wp.gram, x, optimize=True)  # a'H^-1 K_g H^-1 a
                df = var**2 / np.sum((d * w) ** 2 / wp.resid_df[:, None], axis=0)
            scale = var
            if kind == "F":
                stat, scale = stat**2, np.ones(v)
        else:
            cov = np.einsum("rpv,rqv->pqv", z, z)  # A H^-1 A', (q, q, v)
            white = _forward(_cholesky(cov), effect[:, None, :])[:, 0]  # (q, v)
            wald = np.sum(white**2, axis=0)
            wsum = wp.sizes[:, None] * w
            s_term = np.sum((1.0 - wsum / wsum.sum(axis=0)) ** 2 / wp.resid_df[:, None], axis=0)
            lam = 1.0 + 2.0 * (q - 1) / (q * (q + 2)) * s_term
            stat = wald / (q * lam)
            df = q * (q + 2) / (3.0 * s_term)
            scale = q * lam
    for arr in (stat, df, scale):
        arr[bad] = np.nan
    return stat, df, scale


def _group_projection(wp: WelchPrepared, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``U' Yc`` (r, v), each group's residual sum of squares (k, v), voxel means and max|Yc| (v,)."""
    base = wp.base
    n, v = y.shape
    uy = np.empty((base.rank, v))
    rss = np.empty((wp.k, v))
    mean = np.zeros(v)
    scale = np.empty(v)
    onehot = np.zeros((wp.k, n))
    onehot[wp.labels, np.arange(n)] = 1.0
    step = max(64, _BLOCK_ELEMENTS // max(n, 1))
    with np.errstate(invalid="ignore", over="ignore"):
        for lo in range(0, v, step):
            hi = min(lo + step, v)
            blk = np.array(y[:, lo:hi], dtype=np.float64, order="C")
            if base.centred:
                m = blk.mean(axis=0)
                blk -= m
                mean[lo:hi] = m
            scale[lo:hi] = np.maximum(blk.max(axis=0), -blk.min(axis=0))
            z = base.u.T @ blk
            uy[:, lo:hi] = z
            blk -= base.u @ z
            rss[:, lo:hi] = onehot @ (blk * blk)
    return uy, rss, mean, scale


def fit_chunk_welch(wp: WelchPrepared, data: np.ndarray) -> WelchChunk:
    """Fit the prepared model to one ``(n, v)`` chunk with a residual variance per group (see module notes)."""
    base = wp.base
    y = np.asarray(data)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2 or y.shape[0] != base.n_obs:
        raise InputError(f"expected data of shape ({base.n_obs}, v), one row per design row, got shape {y.shape}; "
                         "check that the images match the rows of the design")
    uy, rss, mean, scale = _group_projection(wp, y)
    group_var = rss / wp.resid_df[:, None]
    tiny = (ZERO_VARIANCE_FACTOR * base.n_obs * _EPS * scale) ** 2
    usable = np.where(group_var <= tiny, np.nan, group_var)
    results = {}
    for pt in base._prepared_tests:
        test = pt.test
        eff = pt.a @ uy + pt.lb1[:, None] * mean[None, :]
        stat, df, scale_v = welch_statistics(wp, pt.a, eff, usable, test.kind)
        if test.kind == "t":
            p, log_p, z = tails.t_tests(stat, df, test.tail)
            se, effect, name, df1 = np.sqrt(scale_v), eff[0], "v", 1
        else:
            p, log_p, z = tails.f_tests(stat, eff.shape[0], df)
            se, effect, name, df1 = None, eff, "G", eff.shape[0]
        results[test.name] = WelchResult(test.name, test.kind, test.tail, name, effect, se, stat, df1, df, p,
                                         log_p, z, tails.mlog10p(log_p))
    return WelchChunk(rss.sum(axis=0) / base.df_resid, group_var, results)
