"""Welch's v and G (``groupmodel.engine.welch``) against outside references.

* two groups: ``scipy.stats.ttest_ind(equal_var=False)`` (statistic, p) and the Welch-Satterthwaite df
  written out here (Welch 1947; Satterthwaite 1946);
* k groups: Welch's (1951) one-way ANOVA written out here from the paper's formulas, and
  ``scipy.stats.f_oneway(equal_var=False)`` (scipy >= 1.15);
* a simulation: the pooled t's false positives with a variance ratio of 4 (SD ratio 2) in the group of 10
  against 40, and v's rate inside the binomial 99% interval (``scipy.stats.binom.interval``).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from groupmodel.engine.ols import Test, fit_chunk, prepare
from groupmodel.engine.welch import fit_chunk_welch, prepare_welch


def _cell_design(sizes: list[int], coding: str = "intercept") -> tuple[np.ndarray, np.ndarray]:
    """A one-way design (intercept + treatment columns, or cell means) and its group labels."""
    labels = np.repeat(np.arange(len(sizes)), sizes)
    onehot = np.eye(len(sizes))[labels]
    if coding == "cells":
        return onehot, labels
    return np.column_stack([np.ones(labels.size), onehot[:, 1:]]), labels


def _welch_1951(samples: list[np.ndarray]) -> tuple[float, float, float]:
    """Welch's (1951, Biometrika 38:330) statistic, df2 and p, written out from the paper's formulas."""
    k = len(samples)
    n = np.array([s.size for s in samples], float)
    m = np.array([s.mean() for s in samples])
    var = np.array([s.var(ddof=1) for s in samples])
    w = n / var
    mw = np.sum(w * m) / w.sum()
    a = np.sum(w * (m - mw) ** 2) / (k - 1)
    lam = np.sum((1 - w / w.sum()) ** 2 / (n - 1))
    f = a / (1 + 2 * (k - 2) / (k * k - 1) * lam)
    df2 = (k * k - 1) / (3 * lam)
    return f, df2, stats.f.sf(f, k - 1, df2)


@pytest.mark.parametrize("sizes, sds", [([10, 40], [2.0, 1.0]), ([7, 12], [0.5, 3.0]), ([25, 25], [1.0, 1.0])])
@pytest.mark.parametrize("coding", ["intercept", "cells"])
def test_two_groups_match_scipy_ttest_ind_unequal(sizes, sds, coding) -> None:
    rng = np.random.default_rng(sum(sizes))
    x, labels = _cell_design(sizes, coding)
    y = np.concatenate([rng.normal(1.0 * g, sd, (s, 5)) for g, (s, sd) in enumerate(zip(sizes, sds, strict=True))])
    weights = [0, -1] if coding == "intercept" else [1, -1]  # group 0 minus group 1
    tests = [Test("d", weights, "t"), Test("d_greater", weights, "t", "greater"), Test("d_F", weights, "F")]
    res = fit_chunk_welch(prepare_welch(prepare(x, tests), labels, ("a", "b")), y)
    a, b = y[labels == 0], y[labels == 1]
    ref = stats.ttest_ind(a, b, equal_var=False)  # scipy: Welch's t test
    va, vb = a.var(axis=0, ddof=1) / sizes[0], b.var(axis=0, ddof=1) / sizes[1]
    df_ws = (va + vb) ** 2 / (va**2 / (sizes[0] - 1) + vb**2 / (sizes[1] - 1))  # Welch-Satterthwaite
    np.testing.assert_allclose(res["d"].statistic, ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(res["d"].p, ref.pvalue, rtol=1e-9)
    np.testing.assert_allclose(res["d"].df2, df_ws, rtol=1e-10)
    np.testing.assert_allclose(res["d"].se, np.sqrt(va + vb), rtol=1e-10)
    np.testing.assert_allclose(res["d"].effect, a.mean(axis=0) - b.mean(axis=0), rtol=1e-10)
    greater = stats.ttest_ind(a, b, equal_var=False, alternative="greater")
    np.testing.assert_allclose(res["d_greater"].p, greater.pvalue, rtol=1e-9)
    # one row: G is v squared on (1, the same df), the same p as the two-sided v
    np.testing.assert_allclose(res["d_F"].statistic, ref.statistic**2, rtol=1e-10)
    np.testing.assert_allclose(res["d_F"].df2, df_ws, rtol=1e-10)
    np.testing.assert_allclose(res["d_F"].p, ref.pvalue, rtol=1e-8)


@pytest.mark.parametrize("sizes, sds", [([6, 10, 15], [1.0, 2.0, 4.0]), ([5, 8, 9, 20], [3.0, 1.0, 0.5, 2.0])])
def test_k_groups_match_welch_1951_and_scipy_f_oneway(sizes, sds) -> None:
    rng = np.random.default_rng(len(sizes))
    x, labels = _cell_design(sizes)
    k = len(sizes)
    y = np.concatenate([rng.normal(0.3 * g, sd, (s, 4)) for g, (s, sd) in enumerate(zip(sizes, sds, strict=True))])
    main = np.column_stack([np.zeros(k - 1), np.eye(k - 1)])  # all treatment columns: equal means
    res = fit_chunk_welch(prepare_welch(prepare(x, [Test("main", main, "F")]), labels, tuple("abcd"[:k])), y)
    for j in range(y.shape[1]):
        samples = [y[labels == g, j] for g in range(k)]
        f, df2, p = _welch_1951(samples)
        np.testing.assert_allclose(res["main"].statistic[j], f, rtol=1e-10)
        np.testing.assert_allclose(res["main"].df2[j], df2, rtol=1e-10)
        np.testing.assert_allclose(res["main"].p[j], p, rtol=1e-8)
        ref = stats.f_oneway(*samples, equal_var=False)  # scipy's Welch ANOVA (scipy >= 1.15)
        np.testing.assert_allclose(res["main"].statistic[j], ref.statistic, rtol=1e-10)
        np.testing.assert_allclose(res["main"].p[j], ref.pvalue, rtol=1e-8)


def test_equal_variances_give_nearly_the_pooled_t() -> None:
    """Balanced groups: v equals the pooled t exactly (the same SE), only the df differ."""
    x, labels = _cell_design([12, 12])
    y = np.random.default_rng(3).normal(size=(24, 6))
    tests = [Test("d", [0, 1], "t")]
    p = prepare(x, tests)
    welch, ols = fit_chunk_welch(prepare_welch(p, labels, ("a", "b")), y), fit_chunk(p, y)
    np.testing.assert_allclose(welch["d"].statistic, ols["d"].statistic, rtol=1e-10)
    assert np.all(welch["d"].df2 <= ols["d"].df2 + 1e-9)


def test_results_do_not_depend_on_the_chunk() -> None:
    x, labels = _cell_design([8, 13, 9])
    x = np.column_stack([x, np.random.default_rng(1).normal(size=30)])
    y = np.random.default_rng(2).normal(size=(30, 50)) * np.repeat([1.0, 3.0, 0.5], [8, 13, 9])[:, None]
    wp = prepare_welch(prepare(x, [Test("g", [[0, 1, 0, 0], [0, 0, 1, 0]], "F"), Test("c", [0, 0, 0, 1], "t")]),
                       labels, ("a", "b", "c"))
    whole = fit_chunk_welch(wp, y)
    parts = [fit_chunk_welch(wp, y[:, s]) for s in (slice(0, 17), slice(17, 50))]
    for name in ("g", "c"):
        # per voxel, up to the last bit or two a BLAS may change with the shape of a product (as engine.ols)
        np.testing.assert_allclose(np.concatenate([p[name].statistic for p in parts]), whole[name].statistic,
                                   rtol=1e-13)


def test_simulation_pooled_t_inflates_and_v_keeps_its_level() -> None:
    """10 participants with variance 4 (SD 2) against 40 with variance 1 (SD 1), no true difference: the pooled
    t rejects far more than 5% at alpha 0.05; v's rate lies in the binomial 99% interval around 0.05."""
    n_sim = 20000
    rng = np.random.default_rng(20141)
    x, labels = _cell_design([10, 40])
    y = rng.normal(size=(50, n_sim)) * np.where(labels == 0, 2.0, 1.0)[:, None]
    p = prepare(x, [Test("d", [0, 1], "t")])
    pooled = np.mean(fit_chunk(p, y)["d"].p < 0.05)
    welch = np.mean(fit_chunk_welch(prepare_welch(p, labels, ("small", "large")), y)["d"].p < 0.05)
    lo, hi = stats.binom.interval(0.99, n_sim, 0.05)
    assert pooled > hi / n_sim + 0.05, pooled  # about 0.18 here: more than three times the level
    assert lo / n_sim <= welch <= hi / n_sim, welch


def test_one_row_f_is_v_squared_on_v_df() -> None:
    """Three groups, one row (group 0 against the mean of groups 1 and 2): G = v^2 on v's Welch-Satterthwaite df,
    which here is the textbook (sum c_g^2 s_g^2 / n_g)^2 / sum (c_g^2 s_g^2 / n_g)^2 / (n_g - 1) written out."""
    sizes = [7, 15, 11]
    x, labels = _cell_design(sizes, "cells")
    rng = np.random.default_rng(8)
    y = rng.normal(size=(33, 6)) * np.repeat([3.0, 1.0, 0.5], sizes)[:, None]
    c = np.array([1.0, -0.5, -0.5])
    res = fit_chunk_welch(prepare_welch(prepare(x, [Test("v", c, "t"), Test("G", c, "F")]), labels, ("a", "b", "c")), y)
    terms = np.array([c[g] ** 2 * y[labels == g].var(axis=0, ddof=1) / sizes[g] for g in range(3)])
    df = terms.sum(axis=0) ** 2 / np.sum(terms**2 / (np.array(sizes)[:, None] - 1), axis=0)
    means = np.array([y[labels == g].mean(axis=0) for g in range(3)])
    np.testing.assert_allclose(res["v"].statistic, c @ means / np.sqrt(terms.sum(axis=0)), rtol=1e-10)
    np.testing.assert_allclose(res["v"].df2, df, rtol=1e-10)
    np.testing.assert_allclose(res["G"].statistic, res["v"].statistic ** 2, rtol=1e-10)
    np.testing.assert_allclose(res["G"].df2, df, rtol=1e-10)
    np.testing.assert_allclose(res["G"].p, res["v"].p, rtol=1e-9)
