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
  G is referred to ``F(s, nu)``.  For the one-way layout this is Welch's (1951) test.

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


def welch_statistics(wp: WelchPrepared, a: np.ndarray, effect: np.ndarray, group_var: np.ndarray,
                     kind: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """v (kind ``t``) or G (kind ``F``), its approximate df and ``V`` (t) or ``s Lambda`` (F), per voxel.

    Parameters
    ----------
    a : ndarray, shape (q, r)
        The test in SVD coordinates (``L V_r S_r^-1``).
    effect : ndarray, shape (q, v)
        ``L b``.
    group_var : ndarray, shape (k, v)
        Residual variance of each group; NaN (or 0) marks a voxel without a test.
    """
    q, v = effect.shape
    with np.errstate(divide="ignore", invalid="ignore"):
        w = 1.0 / np.where(group_var > 0, group_var, np.nan)  # (k, v)
    bad = ~np.all(np.isfinite(w), axis=0) | ~np.all(np.isfinite(effect), axis=0)
    w[:, bad] = 1.0  # keeps the solves finite; the results are set to NaN below
    h = np.einsum("kv,kij->vij", w, wp.gram)  # (v, r, r)
    x = np.linalg.solve(h, np.broadcast_to(a.T, (v, *a.T.shape)))  # (v, r, q): H^-1 A'
    cov = np.einsum("qr,vrs->vqs", a, x)  # (v, q, q): A H^-1 A'
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "t":
            var = cov[:, 0, 0]
            stat = effect[0] / np.sqrt(var)
            xa = x[:, :, 0]
            d = np.einsum("vi,kij,vj->kv", xa, wp.gram, xa)  # a'H^-1 K_g H^-1 a
            df = var**2 / np.sum((d * w) ** 2 / wp.resid_df[:, None], axis=0)
            scale = var
        else:
            sol = np.linalg.solve(cov, effect.T[:, :, None])[:, :, 0]  # (v, q)
            wald = np.einsum("vq,qv->v", sol, effect)
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
