"""Permutation inference, FDR and Bonferroni against outside references.

References named beside each check: scipy.stats.permutation_test (exact enumeration), direct
enumeration with itertools, statsmodels OLS t_test / f_test, a brute-force Freedman-Lane loop with
numpy.linalg.lstsq (Freedman and Lane 1983; Winkler et al. 2014), scipy.stats.false_discovery_control,
the Benjamini and Hochberg (1995) example, and the printed values in /work/shared/REFERENCES.md.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import linalg, stats

from groupmodel.errors import EstimabilityError, InputError, ModelError
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.freedman_lane import plan_contrast
from groupmodel.inference.kernel import chunk_statistics
from groupmodel.inference.multiple import bonferroni, fdr_bh, reject
from groupmodel.inference.rearrangements import count_rearrangements, permutation_set
from groupmodel.inference.settings import ContrastTest, MapSettings, Rearrangements

A = [12.1, 14.3, 13.8, 15.2, 16.0]
B = [10.2, 11.5, 12.9, 11.1, 10.8, 12.0]
D = [0.8, 1.9, -0.4, 1.2, 2.3, 0.6, 1.1, -0.2]


def _two_group_design(na: int, nb: int) -> np.ndarray:
    return np.column_stack([np.ones(na + nb), np.r_[np.ones(na), np.zeros(nb)]])


# ------------------------------------------------------------------------------------------
# Exact permutation p values
# ------------------------------------------------------------------------------------------


def test_two_sample_exact_enumeration_matches_scipy():
    y = np.array(A + B)[:, None]
    test = ContrastTest(_two_group_design(5, 6), [0, 1], tail="greater")
    res = run_permutations(test, y, Rearrangements(n_perm=5000))
    # scipy.stats.permutation_test, exact (all 462 partitions), recomputed here.
    ref = stats.permutation_test(
        (A, B),
        lambda x, z: stats.ttest_ind(x, z).statistic,
        permutation_type="independent",
        alternative="greater",
        n_resamples=np.inf,
    )
    assert res.exhaustive and res.n_perm == 462 and res.n_possible == math.comb(11, 5)
    assert res.method == "permute"
    assert res.stat[0] == pytest.approx(ref.statistic, rel=1e-12)
    assert res.stat[0] == pytest.approx(3.890375321, abs=1e-9)  # REFERENCES.md [computed]
    assert res.p_perm[0] == pytest.approx(ref.pvalue, rel=1e-12)
    assert res.p_perm[0] * 462 == pytest.approx(2.0, abs=1e-9)  # REFERENCES.md: 2/462 exactly


def test_two_sample_enumeration_by_itertools():
    # Direct enumeration (itertools.combinations) of all group assignments, Welch-free pooled t.
    y = np.array(A + B)
    t_obs = stats.ttest_ind(A, B).statistic
    ts = []
    for idx in itertools.combinations(range(11), 5):
        mask = np.zeros(11, bool)
        mask[list(idx)] = True
        ts.append(stats.ttest_ind(y[mask], y[~mask]).statistic)
    ts = np.array(ts)
    res = run_permutations(
        ContrastTest(_two_group_design(5, 6), [0, 1], tail="two-sided"), y[:, None], Rearrangements(n_perm=1000)
    )
    expected = np.mean(np.abs(ts) >= abs(t_obs) * (1 - 1e-12))
    assert res.p_perm[0] == pytest.approx(expected, rel=1e-12)
    # Sorted null of |t| equals the enumeration's (the identity is one of the 462).
    assert np.allclose(np.sort(res.max_null), np.sort(np.abs(ts)), rtol=1e-10)


def test_sign_flip_exact_matches_scipy():
    d = np.array(D)
    res = run_permutations(ContrastTest(np.ones((8, 1)), [1], tail="greater"), d[:, None], Rearrangements(n_perm=5000))
    # scipy.stats.permutation_test with permutation_type="samples" on one sample = sign flips.
    ref = stats.permutation_test(
        (d,),
        lambda x: stats.ttest_1samp(x, 0).statistic,
        permutation_type="samples",
        alternative="greater",
        n_resamples=np.inf,
    )
    assert res.method == "flip" and res.exhaustive and res.n_perm == 256
    assert res.stat[0] == pytest.approx(2.767341878, abs=1e-9)  # REFERENCES.md [computed]
    assert res.p_perm[0] == pytest.approx(ref.pvalue, rel=1e-12)
    assert res.p_perm[0] * 256 == pytest.approx(5.0, abs=1e-9)  # REFERENCES.md: 5/256


def test_random_draws_when_too_many_and_p_floor():
    rng = np.random.default_rng(3)
    n = 30
    X = _two_group_design(15, 15)
    y = rng.standard_normal((n, 4))
    y[:15, 0] += 10.0  # a huge effect: only the identity reaches it
    res = run_permutations(ContrastTest(X, [0, 1]), y, Rearrangements(n_perm=200, seed=11))
    assert not res.exhaustive and res.n_perm == 200 and res.seed == 11
    assert res.n_possible == math.comb(30, 15)
    # p = count / J with the identity counted, so never below 1/J (Winkler et al. 2014).
    assert res.p_perm[0] == pytest.approx(1 / 200)
    assert res.p_fwe[0] == pytest.approx(1 / 200)
    assert np.all(res.p_perm >= 1 / 200)


# ------------------------------------------------------------------------------------------
# Freedman-Lane
# ------------------------------------------------------------------------------------------


def _study(seed: int, n: int = 14, v: int = 5):
    rng = np.random.default_rng(seed)
    group = np.r_[np.zeros(n // 2), np.ones(n - n // 2)]
    age = rng.normal(40, 10, n) + 8 * group  # nuisance correlated with the effect of interest
    iq = rng.normal(100, 15, n)
    X = np.column_stack([np.ones(n), group, age - age.mean(), iq - iq.mean()])
    Y = 3 + 0.05 * age[:, None] + rng.standard_normal((n, v)) * rng.uniform(0.5, 2, v)
    return X, Y


@pytest.mark.parametrize("tail", ["two-sided", "greater", "less"])
def test_identity_reproduces_statsmodels_t(tail):
    X, Y = _study(1)
    L = np.array([[0, 1, 0, 0.0]])
    res = run_permutations(ContrastTest(X, L, tail=tail), Y, Rearrangements(n_perm=50, seed=2))
    for j in range(Y.shape[1]):
        # statsmodels OLS t_test
        t_ref = sm.OLS(Y[:, j], X).fit().t_test(L).tvalue.item()
        assert res.stat[j] == pytest.approx(t_ref, rel=1e-10)


def test_identity_reproduces_statsmodels_f():
    X, Y = _study(2)
    L = np.array([[0, 1, 0, 0.0], [0, 0, 0, 1.0]])
    res = run_permutations(ContrastTest(X, L, kind="F"), Y, Rearrangements(n_perm=50, seed=2))
    for j in range(Y.shape[1]):
        f_ref = float(np.squeeze(sm.OLS(Y[:, j], X).fit().f_test(L).fvalue))  # statsmodels OLS f_test
        assert res.stat[j] == pytest.approx(f_ref, rel=1e-10)
    assert res.q == 2 and res.df == X.shape[0] - 4


def _brute_force_fl(X, L, Y, pset, kind):
    """Freedman-Lane by hand: residualise on Z = X N (N = null space of L), rearrange, refit with
    numpy.linalg.lstsq, and form t or F from the full-model fit (Winkler et al. 2014, Table 2)."""
    n, p = X.shape
    Z = X @ linalg.null_space(L)
    beta_z = np.linalg.lstsq(Z, Y, rcond=None)[0]
    R = Y - Z @ beta_z
    XtX_pinv = np.linalg.pinv(X.T @ X)
    rank = np.linalg.matrix_rank(X)
    df = n - rank
    out = np.empty((pset.size, Y.shape[1]))
    for j in range(pset.size):
        Ys = R.copy()
        if pset.perm is not None:
            Ys = Ys[pset.perm[j]]
        if pset.flips is not None:
            Ys = Ys * pset.flips[j][:, None]
        beta = np.linalg.lstsq(X, Ys, rcond=None)[0]
        s2 = ((Ys - X @ beta) ** 2).sum(axis=0) / df
        lb = L @ beta
        cov = L @ XtX_pinv @ L.T
        if kind == "t":
            out[j] = lb[0] / np.sqrt(s2 * cov[0, 0])
        else:
            q = L.shape[0]
            out[j] = np.einsum("iv,ij,jv->v", lb, np.linalg.inv(cov), lb) / q / s2
    return out


@pytest.mark.parametrize(
    "method, kind, blocks, whole",
    [
        ("permute", "t", None, False),
        ("flip", "t", None, False),
        ("both", "t", None, False),
        ("permute", "F", None, False),
        ("permute", "t", "within", False),
        ("permute", "t", "whole", True),
        ("flip", "F", "whole", True),
    ],
)
def test_freedman_lane_equals_brute_force(method, kind, blocks, whole):
    X, Y = _study(5, n=12, v=4)
    L = np.array([[0, 1, 0, 0.0]]) if kind == "t" else np.array([[0, 1, 0, 0.0], [0, 0, 1, 0.0]])
    labels = None
    if blocks == "within":
        labels = np.repeat([0, 1, 2], 4)
    elif blocks == "whole":
        labels = np.tile([0, 1, 2, 3, 4, 5], 2)  # 6 blocks of 2 rows
    plan = plan_contrast(X, L, kind=kind, method=method, blocks=labels, whole_blocks=whole)
    pset = permutation_set(12, 300, method, blocks=labels, whole_blocks=whole, seed=4, classes=plan.classes)
    engine = chunk_statistics(plan, pset.perm, pset.flips, Y)
    brute = _brute_force_fl(X, L, Y, pset, kind)
    np.testing.assert_allclose(engine, brute, rtol=1e-10, atol=1e-10)


def test_freedman_lane_p_values_from_brute_force_distribution():
    X, Y = _study(7, n=16, v=6)
    L = np.array([[0, 1, 0, 0.0]])
    res = run_permutations(ContrastTest(X, L, tail="two-sided"), Y, Rearrangements(n_perm=400, seed=9))
    plan = plan_contrast(X, L)
    pset = permutation_set(16, 400, "permute", seed=9, classes=plan.classes)
    null = np.abs(_brute_force_fl(X, L, Y, pset, "t"))
    obs = null[0]
    expected_p = (null >= obs * (1 - 1e-12)).mean(axis=0)
    np.testing.assert_array_equal(res.p_perm, expected_p)
    # Maximum statistic FWE (Nichols and Holmes 2002): max over voxels per rearrangement.
    maxima = null.max(axis=1)
    np.testing.assert_allclose(res.max_null, maxima, rtol=1e-10)
    expected_fwe = (maxima[:, None] >= obs[None, :] * (1 - 1e-12)).mean(axis=0)
    np.testing.assert_array_equal(res.p_fwe, expected_fwe)


def test_nuisance_rows_dropped_only_when_invariant():
    X, _ = _study(3)
    # Intercept is invariant under permutation (dropped), not under sign flips (kept).
    L = np.array([[0, 1, 0, 0.0]])
    assert plan_contrast(X, L, method="permute").m == 3
    assert plan_contrast(X, L, method="flip").m == 4
    # Two groups with an intercept: one row per rearrangement.
    assert plan_contrast(_two_group_design(5, 6), [0, 1], method="permute").m == 1


def test_auto_method():
    assert plan_contrast(np.ones((8, 1)), [1]).method == "flip"
    assert plan_contrast(_two_group_design(4, 4), [0, 1]).method == "permute"


def test_errors():
    X = _two_group_design(4, 4)
    with pytest.raises(EstimabilityError):
        plan_contrast(np.column_stack([X, X[:, 1]]), [0, 1, 0])  # one of two identical columns
    with pytest.raises(ModelError):
        plan_contrast(X, [[0, 1], [1, 0]], kind="t")
    with pytest.raises(ModelError):
        plan_contrast(np.eye(3), [1, 0, 0])  # no residual df
    with pytest.raises(InputError):
        run_permutations(ContrastTest(X, [0, 1]), np.zeros((7, 3)))
    with pytest.raises(InputError):
        run_permutations(ContrastTest(X, [0, 1]), np.zeros((8, 3)), maps=MapSettings(tfce=None, cluster_z=3.1))


def test_constant_voxel_gives_nan():
    X = _two_group_design(4, 4)
    Y = np.random.default_rng(0).standard_normal((8, 3))
    Y[:, 1] = 5.0
    res = run_permutations(ContrastTest(X, [0, 1]), Y, Rearrangements(n_perm=30, seed=1))
    assert np.isnan(res.stat[1]) and np.isnan(res.p_perm[1]) and np.isnan(res.p_fwe[1])
    assert np.all(np.isfinite(res.p_perm[[0, 2]]))


# ------------------------------------------------------------------------------------------
# Counting rearrangements
# ------------------------------------------------------------------------------------------


def test_counts():
    classes = np.r_[np.zeros(5), np.ones(6)].astype(int)
    assert count_rearrangements(11, "permute", classes=classes) == 462  # 11!/(5!6!)
    assert count_rearrangements(8, "flip") == 256  # 2^8
    assert count_rearrangements(11, "both", classes=classes) == 462 * 2**11
    blocks = np.repeat([0, 1], [5, 6])
    within = np.r_[0, 0, 1, 1, 1, 0, 0, 0, 1, 1, 1]
    # Within blocks: C(5,2) * C(6,3) (math.comb).
    assert count_rearrangements(11, "permute", blocks=blocks, classes=within) == math.comb(5, 2) * math.comb(6, 3)
    wb = np.repeat([0, 1, 2, 3], 2)
    wclasses = np.array([0, 1, 0, 1, 1, 0, 0, 1])  # block types (0,1), (0,1), (1,0), (0,1)
    assert count_rearrangements(8, "permute", blocks=wb, whole_blocks=True, classes=wclasses) == 4
    assert count_rearrangements(8, "flip", blocks=wb, whole_blocks=True) == 16


# ------------------------------------------------------------------------------------------
# Benjamini-Hochberg and Bonferroni
# ------------------------------------------------------------------------------------------

BH_EXAMPLE = np.array(
    [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
     0.6528, 0.7590, 1.0]
)  # Benjamini and Hochberg (1995), from memory (REFERENCES.md)


def test_bh_example():
    adj = fdr_bh(BH_EXAMPLE)
    # scipy.stats.false_discovery_control(method="bh"), recomputed here.
    ref = stats.false_discovery_control(BH_EXAMPLE, method="bh")
    np.testing.assert_array_equal(adj, ref)
    assert reject(adj, 0.05).sum() == 4  # Benjamini and Hochberg (1995): 4 rejections at q = 0.05
    assert reject(bonferroni(BH_EXAMPLE), 0.05).sum() == 3  # Bonferroni: 3 (REFERENCES.md)
    # Printed adjusted values (REFERENCES.md [computed]).
    np.testing.assert_allclose(
        adj[:9], [0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.063857, 0.063857, 0.0645, 0.0765], atol=5e-7
    )


def test_bh_and_bonferroni_nan_and_mask_aware():
    rng = np.random.default_rng(4)
    p = rng.uniform(size=(6, 7)) ** 3
    p[0, 0] = np.nan
    mask = rng.uniform(size=p.shape) > 0.3
    adj = fdr_bh(p, mask)
    family = mask & np.isfinite(p)
    # scipy.stats.false_discovery_control on the in-mask finite values only.
    np.testing.assert_array_equal(adj[family], stats.false_discovery_control(p[family], method="bh"))
    assert np.all(np.isnan(adj[~family]))
    bon = bonferroni(p, mask)
    np.testing.assert_array_equal(bon[family], np.minimum(1, p[family] * family.sum()))
    assert np.all(np.isnan(bon[~family]))
    with pytest.raises(InputError):
        fdr_bh(np.array([0.5, 1.5]))
