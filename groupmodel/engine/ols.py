"""The OLS engine: a pure function of (design, tests, a chunk of data) -> effects, t, F, p, z.

It knows nothing about files.  :func:`prepare` does everything that depends only on the design and
the tests, once; :func:`fit_chunk` applies it to an ``(n, v)`` block of data (``n`` observations,
``v`` voxels or vertices).  A :class:`Prepared` holds no data and pickles, so chunks can be sent to
worker processes or a cluster.

Numerics (the engine runs at every voxel and on the NIST StRD test data, so it is careful):

* The design ``X`` (n, p) is factorised once by an economy SVD ``X = U S V'``; singular values
  above the rank tolerance (default ``S.max() * max(n, p) * eps``, as ``numpy.linalg.matrix_rank``)
  give the rank ``r`` and ``df_resid = n - r``.  ``X'X`` is never formed or inverted.
* Rank-deficient designs are allowed; every test row ``L`` must be estimable, i.e. lie in the row
  space of ``X``: ``||L - L V_r V_r'|| <= ESTIMABILITY_TOL * ||L||`` (:mod:`groupmodel.engine.linalg`), otherwise
  :class:`~groupmodel.errors.EstimabilityError`.  Effects are then unique, whatever generalised
  inverse is used; the engine uses the pseudo-inverse.
* If the constant vector lies in the column space of ``X``, each voxel's mean is subtracted before
  the fit and added back to every contrast estimate as ``mean * (L b1)`` with ``b1 = X^+ 1``.  This
  is exact algebra (``X^+`` is linear) and it removes the large common offset before any rounding
  happens: data such as NIST SmLs09 (values 1e12 + 0.4 with within-group SD 0.1) keep the digits
  that the inputs still carry.  ``L b1`` is set to exactly 0 when it is at rounding level, so that
  difference contrasts do not pick up ``mean * 1e-16``.
* Residuals are formed explicitly, ``R = Yc - U (U' Yc)``, and the residual variance is
  ``sum(R**2) / df_resid`` (never ``||Y||^2 - ||U'Y||^2``, which cancels catastrophically).
* A contrast estimate is ``L b = A (U' Yc)`` (+ the mean term) with ``A = L V_r S_r^-1`` (q, r);
  ``Var(L b) = sigma^2 A A'``.  For a t test ``t = L b / sqrt(sigma^2 ||A||^2)``; for an F test
  ``A = W D Z'`` (its SVD) whitens: ``F = ||D^-1 W' L b||^2 / (q sigma^2)``.
* p, log p and z come from :mod:`groupmodel.tails`, which stays exact where p underflows.

Invariance: every reduction runs over observations only, never across voxels, so the results for a
voxel do not depend on which other voxels share its chunk (up to the last bit or two that a BLAS
may change with the shape of a product).

Memory: :func:`fit_chunk` converts, centres and projects the chunk in blocks of about 2 MiB of
float64, so beyond the input it holds only ``(r, v)`` projections and a few ``(v,)`` vectors per
test; it never makes an ``(n, v)`` float64 copy, whatever the input dtype.

Voxels with (numerically) zero residual variance -- constant data, or data fitted exactly up to
rounding -- have ``se = 0`` and NaN for the statistic, p, log p, z and ``-log10 p``; their effects
and residual variance are still reported.  The rule is per voxel: ``sigma^2`` at or below
``(ZERO_VARIANCE_FACTOR * n * eps * max|Yc|)^2`` with ``Yc`` the (centred) data.  Voxels with any
non-finite value give NaN throughout.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from ..errors import EstimabilityError, InputError, ModelError
from . import tails
from .linalg import RowSpace, rank_tolerance, rows_dependent

__all__ = [
    "ChunkResult",
    "Prepared",
    "Test",
    "TestResult",
    "fit_chunk",
    "prepare",
]

_EPS = float(np.finfo(np.float64).eps)
#: The constant vector counts as in the column space of X when ``||1 - U U' 1|| <= this * sqrt(n)``;
#: otherwise the data are fitted uncentred (correct, only without the protection against offsets).
CONSTANT_RTOL = 1e-9
#: Residual variance at or below ``(this * n * eps * max|Yc|)^2`` is treated as zero (see module doc).
ZERO_VARIANCE_FACTOR = 16.0
#: fit_chunk works through blocks of about this many float64 values (n x block), 2 MiB.
_BLOCK_ELEMENTS = 2**18


@dataclass(frozen=True, eq=False)
class Test:
    """One hypothesis test on the design columns.

    Parameters
    ----------
    name : str
        Unique name within a model; keys the results.
    weights : ndarray, shape (q, p)
        ``q`` linearly independent, estimable rows over the ``p`` design columns.  A 1-D array is
        taken as one row.  Stored as a read-only float64 array.
    kind : {"t", "F"}
        ``"t"`` requires ``q == 1``.
    tail : {"two-sided", "greater", "less"}
        Alternative hypothesis of a t test; an F test is always upper-tailed and takes only the
        default.
    """

    __test__ = False  # tells pytest this is not a test class despite its name

    name: str
    weights: np.ndarray
    kind: Literal["t", "F"]
    tail: Literal["two-sided", "greater", "less"] = "two-sided"

    def __post_init__(self) -> None:
        w = np.array(self.weights, dtype=np.float64)
        if w.ndim == 1:
            w = w[None, :]
        where = f"test {self.name!r}"
        if w.ndim != 2 or w.shape[0] < 1 or w.shape[1] < 1:
            raise InputError(
                f"expected weights of shape (q, p) with q, p >= 1, got shape {np.shape(self.weights)} "
                f"in {where}; give one row per hypothesis row"
            )
        if not np.all(np.isfinite(w)):
            raise InputError(f"expected finite weights, got NaN or inf in {where}; fix the weights")
        if self.kind not in ("t", "F"):
            raise InputError(f"expected kind 't' or 'F', got {self.kind!r} in {where}; use 't' or 'F'")
        if self.kind == "t" and w.shape[0] != 1:
            raise InputError(
                f"expected one row for a t test, got {w.shape[0]} rows in {where}; use kind 'F' for "
                "several rows"
            )
        if self.tail not in ("two-sided", "greater", "less"):
            raise InputError(
                f"expected tail 'two-sided', 'greater' or 'less', got {self.tail!r} in {where}; "
                "pick one of those"
            )
        if self.kind == "F" and self.tail != "two-sided":
            raise InputError(
                f"expected no tail for an F test, got tail {self.tail!r} in {where}; one-sided tests "
                "need a single row and kind 't'"
            )
        w.setflags(write=False)
        object.__setattr__(self, "weights", w)


@dataclass(frozen=True, eq=False)
class _PreparedTest:
    """What :func:`fit_chunk` needs for one test (internal)."""

    test: Test
    a: np.ndarray  # (q, r): L V_r S_r^-1, maps U'Yc to L b
    lb1: np.ndarray  # (q,): L X^+ 1, the effect of a unit mean (0 if not centring)
    a_norm2: float  # ||A||^2 for a t test (Var(L b) = sigma^2 ||A||^2)
    whiten: np.ndarray | None  # (q, q): D^-1 W' for an F test


@dataclass(frozen=True, eq=False)
class Prepared:
    """Everything derived once from (design, tests); holds no data and pickles.

    Attributes
    ----------
    n_obs, n_cols : int
        Shape of the design.
    rank : int
        Numerical rank ``r`` of the design at ``rank_tol``.
    df_resid : int
        ``n_obs - rank``.
    rank_tol : float
        Singular values at or below this are treated as 0.
    singular_values : ndarray, shape (min(n, p),)
        All singular values of the design, largest first.
    centred : bool
        Whether the constant vector lies in the column space, so that data are centred per voxel.
    u : ndarray, shape (n, r)
        Orthonormal basis of the column space.
    pinv_rows : ndarray, shape (p, r)
        ``V_r S_r^-1``; the minimum-norm coefficients are ``pinv_rows @ (U' Y)``.
    b1 : ndarray, shape (p,)
        ``X^+ 1`` (zeros when not centring).
    tests : tuple of Test
        In the order given.
    """

    n_obs: int
    n_cols: int
    rank: int
    df_resid: int
    rank_tol: float
    singular_values: np.ndarray
    centred: bool
    u: np.ndarray
    pinv_rows: np.ndarray
    b1: np.ndarray
    tests: tuple[Test, ...]
    _prepared_tests: tuple[_PreparedTest, ...] = field(repr=False)


@dataclass(frozen=True, eq=False)
class TestResult:
    """Results of one test on one chunk; arrays have one entry per voxel (v).

    Attributes
    ----------
    name, kind, tail : str
        From the :class:`Test`.
    effect : ndarray, shape (v,) for t, (q, v) for F
        The contrast estimate ``L b`` in data units.
    se : ndarray, shape (v,), or None
        Standard error of the t contrast; None for F.
    statistic : ndarray, shape (v,)
        t or F.
    df1, df2 : int
        Numerator (1 for t, q for F) and denominator (``df_resid``) degrees of freedom.
    p, log_p, z, mlog10p : ndarray, shape (v,)
        p value for the test's tail, its natural log (finite where p underflows), the z of equal
        probability (signed like t; see :func:`groupmodel.tails.t_tests`) and ``-log10 p``.
    """

    __test__ = False  # not a pytest test class

    name: str
    kind: str
    tail: str
    effect: np.ndarray
    se: np.ndarray | None
    statistic: np.ndarray
    df1: int
    df2: int
    p: np.ndarray
    log_p: np.ndarray
    z: np.ndarray
    mlog10p: np.ndarray


@dataclass(frozen=True, eq=False)
class ChunkResult:
    """Results of :func:`fit_chunk` for one chunk of ``v`` voxels.

    Attributes
    ----------
    residual_variance : ndarray, shape (v,)
        ``sum(R**2) / df_resid`` in squared data units.
    df_resid : int
        Residual degrees of freedom.
    tests : Mapping[str, TestResult]
        One entry per test, in the order given to :func:`prepare`.
    beta : ndarray, shape (p, v), or None
        Minimum-norm coefficients (unique only for a full-rank design), when asked for.
    """

    residual_variance: np.ndarray
    df_resid: int
    tests: Mapping[str, TestResult]
    beta: np.ndarray | None = None

    def __getitem__(self, name: str) -> TestResult:
        return self.tests[name]


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a, dtype=np.float64)
    a.setflags(write=False)
    return a


def design_matrix(design: np.ndarray, where: str = "") -> np.ndarray:
    """The design as a finite float64 (n, p) array, or an InputError naming the first bad entry.

    ``where`` (e.g. ``" (in permutation inference)"``) says which step refused it.
    """
    x = np.array(design, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 1:
        raise InputError(
            f"expected a design matrix of shape (n, p), got shape {np.shape(design)}{where}; "
            "pass one row per observation"
        )
    if not np.all(np.isfinite(x)):
        bad = np.argwhere(~np.isfinite(x))[0]
        raise InputError(
            f"expected a finite design matrix, got {x[bad[0], bad[1]]} at row {bad[0]}, column {bad[1]}{where}; "
            "remove or fill the missing values before building the design"
        )
    return x


def prepare(design: np.ndarray, tests: Sequence[Test], rank_tol: float | None = None) -> Prepared:
    """Factorise the design and check the tests, once per model.

    Parameters
    ----------
    design : ndarray, shape (n, p)
        Design matrix; rows are observations, columns regressors.  Must be finite.
    tests : sequence of Test
        Tests over the ``p`` columns, with unique names.
    rank_tol : float, optional
        Singular values at or below this count as zero.  Default ``S.max() * max(n, p) * eps``.

    Returns
    -------
    Prepared

    Raises
    ------
    InputError
        Design not a finite 2-D array, or duplicate test names.
    ModelError
        No residual degrees of freedom, an all-zero design, a test whose width is not ``p``, or
        a test whose rows are linearly dependent.
    EstimabilityError
        A test row outside the row space of the design (names the test and the row).
    """
    x = design_matrix(design)
    n, p = x.shape
    names = [t.name for t in tests]
    dupes = sorted({nm for nm in names if names.count(nm) > 1})
    if dupes:
        raise InputError(f"expected unique test names, got duplicates {dupes}; rename the tests")

    u, s, vt = np.linalg.svd(x, full_matrices=False)
    tol = rank_tolerance(x, s) if rank_tol is None else float(rank_tol)
    r = int(np.sum(s > tol))
    if r == 0:
        raise ModelError(
            "expected a design with at least one non-zero column, got all zeros; check the design"
        )
    df_resid = n - r
    if df_resid < 1:
        raise ModelError(
            f"expected more observations than the design rank, got {n} observations and rank {r} "
            "(no residual degrees of freedom); drop columns or add observations"
        )
    u_r = u[:, :r]
    v_r = vt[:r].T  # (p, r)
    pinv_rows = v_r / s[:r]  # (p, r): X^+ = V_r S_r^-1 U_r'
    row_space = RowSpace(vt[:r], r, tol)

    centred, b1 = _centring(x, u_r, pinv_rows)
    # Rounding level of L b1 relative to ||L|| ||b1||, for snapping difference contrasts to 0 below.
    cond_r = float(s[0] / s[r - 1])
    lb1_rtol = min(64 * _EPS * np.sqrt(max(n, p)) * cond_r, 1e-8)
    basis = _Basis(row_space, pinv_rows, b1, centred, lb1_rtol)
    prepared_tests = [_prepare_test(test, basis) for test in tests]

    return Prepared(
        n_obs=n,
        n_cols=p,
        rank=r,
        df_resid=df_resid,
        rank_tol=tol,
        singular_values=_readonly(s),
        centred=centred,
        u=_readonly(u_r),
        pinv_rows=_readonly(pinv_rows),
        b1=_readonly(b1),
        tests=tuple(tests),
        _prepared_tests=tuple(prepared_tests),
    )


@dataclass(frozen=True, eq=False)
class _Basis:
    """What every test is prepared against (internal to :func:`prepare`)."""

    row_space: RowSpace
    pinv_rows: np.ndarray  # (p, r)
    b1: np.ndarray  # (p,)
    centred: bool
    lb1_rtol: float

    @property
    def n_cols(self) -> int:
        return self.pinv_rows.shape[0]


def _centring(x: np.ndarray, u_r: np.ndarray, pinv_rows: np.ndarray) -> tuple[bool, np.ndarray]:
    """Whether the constant vector lies in the column space of X, and ``b1 = X^+ 1`` (zeros if not)."""
    n, p = x.shape
    ones = np.ones(n)
    u1 = u_r.T @ ones
    centred = bool(np.linalg.norm(ones - u_r @ u1) <= CONSTANT_RTOL * np.sqrt(n))
    if centred:
        b1 = pinv_rows @ u1
        # One step of iterative refinement: L b1 multiplies each voxel's mean (1e12 in NIST SmLs09),
        # so b1 is wanted to full accuracy, not just to the eps * n * cond of one solve.
        b1 = b1 + pinv_rows @ (u_r.T @ (ones - x @ b1))
    else:
        b1 = np.zeros(p)
    return centred, b1


def _prepare_test(test: Test, basis: _Basis) -> _PreparedTest:
    """Check one test against the design (width, estimability, independent rows) and prepare its products."""
    w = test.weights
    where = f"test {test.name!r}"
    if w.shape[1] != basis.n_cols:
        raise ModelError(
            f"expected weights over the {basis.n_cols} design columns, got {w.shape[1]} columns in {where}; "
            "rebuild the test from this design"
        )
    off, row_norm = basis.row_space.distance(w)
    bad = np.flatnonzero(~basis.row_space.contains(w))
    if bad.size:
        i = int(bad[0])
        raise EstimabilityError(
            f"expected estimable rows (in the row space of the rank-{basis.row_space.rank} design), got row {i} "
            f"of {where} with a part of relative size {off[i] / max(row_norm[i], 1e-300):.3g} outside it; "
            "test only differences the design can estimate, or add the missing cells/columns"
        )
    q = w.shape[0]
    if rows_dependent(w):
        raise ModelError(
            f"expected {q} linearly independent rows, got dependent rows in {where}; "
            "drop the redundant rows"
        )
    a = w @ basis.pinv_rows  # (q, r)
    lb1 = w @ basis.b1
    if basis.centred:
        # L b1 is exactly 0 for a difference contrast; computed, it is ~1e-16, and the mean
        # (1e12 in NIST SmLs09) would multiply that rounding into the effect.
        lb1 = np.where(np.abs(lb1) <= basis.lb1_rtol * row_norm * np.linalg.norm(basis.b1), 0.0, lb1)
    if test.kind == "t":
        return _PreparedTest(test, _readonly(a), _readonly(lb1), float(np.sum(a * a)), None)
    wa, da, _ = np.linalg.svd(a, full_matrices=False)
    whiten = wa.T / da[:, None]  # D^-1 W'
    return _PreparedTest(test, _readonly(a), _readonly(lb1), 0.0, _readonly(whiten))


def fit_chunk(prepared: Prepared, data: np.ndarray, *, beta: bool = False) -> ChunkResult:
    """Fit the prepared model to one chunk of data.

    Parameters
    ----------
    prepared : Prepared
        From :func:`prepare`.
    data : ndarray, shape (n, v)
        Responses, one column per voxel, any float dtype (computed in float64).  A 1-D array is
        one voxel.
    beta : bool
        Also return the minimum-norm coefficients (p, v).

    Returns
    -------
    ChunkResult
    """
    y = np.asarray(data)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2 or y.shape[0] != prepared.n_obs:
        raise InputError(
            f"expected data of shape ({prepared.n_obs}, v), one row per design row, got shape {y.shape}; "
            "check that the images match the rows of the design"
        )
    n = y.shape[0]
    uy, rss, mean, scale = _project(prepared, y)
    df = prepared.df_resid
    sigma2 = rss / df
    zero_var = sigma2 <= (ZERO_VARIANCE_FACTOR * n * _EPS * scale) ** 2
    variance = _Variance(sigma2, np.where(zero_var, np.nan, sigma2), zero_var, df)
    results = {pt.test.name: _test_result(pt, uy, mean, variance) for pt in prepared._prepared_tests}
    b = None
    if beta:
        b = prepared.pinv_rows @ uy + prepared.b1[:, None] * mean[None, :]
    return ChunkResult(residual_variance=sigma2, df_resid=df, tests=results, beta=b)


def _project(prepared: Prepared, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``U' Yc`` (r, v), residual sums of squares, voxel means (0 when not centring) and max|Yc|, each (v,)."""
    n, v = y.shape
    r = prepared.rank
    u = prepared.u
    uy = np.empty((r, v))  # U' Yc, all that the effects need
    rss = np.empty(v)
    mean = np.zeros(v)
    scale = np.empty(v)
    # Work through blocks of voxels small enough to stay in cache: each block is converted to
    # float64, centred, projected and turned into residuals in place, so the only (n, .)
    # temporaries are two blocks, never an (n, v) float64 copy of the chunk.  Every operation is
    # per column, so the blocking does not change any voxel's result.
    step = max(64, _BLOCK_ELEMENTS // max(n, 1))
    with np.errstate(invalid="ignore", over="ignore"):  # inf in a voxel makes that voxel NaN, quietly
        for lo in range(0, v, step):
            hi = min(lo + step, v)
            blk = np.array(y[:, lo:hi], dtype=np.float64, order="C")
            if prepared.centred:
                m = blk.mean(axis=0)
                blk -= m
                mean[lo:hi] = m
            # max|Yc| per voxel, for the zero-variance rule.
            scale[lo:hi] = np.maximum(blk.max(axis=0), -blk.min(axis=0))
            z = u.T @ blk
            uy[:, lo:hi] = z
            blk -= u @ z  # residuals R = Yc - U (U' Yc), formed explicitly
            rss[lo:hi] = np.einsum("ij,ij->j", blk, blk)
    return uy, rss, mean, scale


@dataclass(frozen=True, eq=False)
class _Variance:
    """A chunk's residual variance (v,), the same with NaN where it is (numerically) zero, and its df."""

    sigma2: np.ndarray
    sigma2_pos: np.ndarray
    zero_var: np.ndarray
    df: int


def _test_result(pt: _PreparedTest, uy: np.ndarray, mean: np.ndarray, variance: _Variance) -> TestResult:
    """One test's effects, statistics, p, log p and z over a chunk."""
    sigma2, sigma2_pos, zero_var, df = variance.sigma2, variance.sigma2_pos, variance.zero_var, variance.df
    test = pt.test
    eff = pt.a @ uy + pt.lb1[:, None] * mean[None, :]  # (q, v)
    if test.kind == "t":
        eff = eff[0]
        se = np.where(zero_var, 0.0, np.sqrt(sigma2 * pt.a_norm2))
        with np.errstate(invalid="ignore", divide="ignore"):
            stat = eff / np.sqrt(sigma2_pos * pt.a_norm2)
        p, log_p, z = tails.t_tests(stat, df, test.tail)
        df1 = 1
    else:
        q = eff.shape[0]
        white = pt.whiten @ eff
        with np.errstate(invalid="ignore", divide="ignore"):
            stat = np.einsum("ij,ij->j", white, white) / (q * sigma2_pos)
        p, log_p, z = tails.f_tests(stat, q, df)
        se = None
        df1 = q
    return TestResult(
        name=test.name,
        kind=test.kind,
        tail=test.tail,
        effect=eff,
        se=se,
        statistic=stat,
        df1=df1,
        df2=df,
        p=p,
        log_p=log_p,
        z=z,
        mlog10p=tails.mlog10p(log_p),
    )
