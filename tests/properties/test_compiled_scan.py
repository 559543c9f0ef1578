"""The compiled element-wise pass of the permutation loop (optional extra "fast") against the numpy reference.

The claim is bit-identity: the compiled pass forms every working statistic, t or F with the same IEEE
operations in the same order as the numpy reference (:func:`groupmodel.inference.kernel._tile`), so the
counts, the maxima, the null maps and the p maps are the same bits on both paths.  Outside reference for
the numbers themselves: ``numpy.linalg.lstsq`` refits of the rearranged residuals (LAPACK), which the
counts of the compiled path must reproduce (t to 1e-10 relative, counts away from ties exactly).
"""

from __future__ import annotations

import numpy as np
import pytest

from groupmodel.inference import fastpath
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.fastpath import ENV_NO_COMPILED
from groupmodel.inference.freedman_lane import plan_contrast, stack_rows
from groupmodel.inference.kernel import chunk_nulls, observed_chunk, tile_width, unit_columns
from groupmodel.inference.rearrangements import permutation_set
from groupmodel.inference.settings import ContrastTest, Execution, Rearrangements


def _design(n: int, rng: np.random.Generator, extra: int) -> np.ndarray:
    group = np.r_[np.zeros(n // 2), np.ones(n - n // 2)]
    cov = rng.standard_normal((n, extra))
    return np.column_stack([np.ones(n), group, cov])


#: (weights over columns [1, group, cov1, cov2, cov3], kind, tail): m = 1 (two groups, intercept only
#: moving nothing), m > 1 with moving nuisance, one-sided both ways, F tests with q = 2 and 3, and with
#: no moving nuisance (m = q).
_CASES = [
    ([[0, 1, 0, 0, 0]], "t", "two-sided"),
    ([[0, 1, 0, 0, 0]], "t", "greater"),
    ([[0, 1, 0, 0, 0]], "t", "less"),
    ([[0, 0, 1, 0, 0]], "t", "less"),
    ([[0, 1, 0, 0, 0], [0, 0, 1, 0, 0]], "F", "two-sided"),
    ([[0, 1, 0, 0, 0], [0, 0, 1, 0, 0], [0, 0, 0, 0, 1]], "F", "two-sided"),
    # every moving column is of interest (m = q = 4): no nuisance row in the stacked product
    ([[0, 1, 0, 0, 0], [0, 0, 1, 0, 0], [0, 0, 0, 1, 0], [0, 0, 0, 0, 1]], "F", "two-sided"),
    # two moving nuisance rows before the last (q = 1, m = 4): the nuisance pairs of the fused pass
    ([[0, 0, 0, 1, 0]], "t", "greater"),
    # three (q = 1, m = 5): a pair and a single row
    ([[0, 1, 0, 0, 0, 0]], "t", "less"),
]


def _data(rng: np.random.Generator, n: int, v: int, missing: bool = True) -> np.ndarray:
    Y = rng.standard_normal((n, v))
    if missing:
        Y[:, 3] = 2.5  # constant: no data (NaN statistic, -inf working statistic)
        Y[:, v - 1] = 0.0
    return Y


@pytest.mark.parametrize(
    "weights,kind,tail,two_groups_only",
    [(*case, False) for case in _CASES] + [(*case, True) for case in _CASES[:3]],
)
@pytest.mark.parametrize("missing", [True, False])
def test_chunk_nulls_identical_bits(fused, monkeypatch, weights, kind, tail, two_groups_only, missing):
    rng = np.random.default_rng(len(weights) * 7 + len(tail) + two_groups_only)
    n, v = 24, 700
    L = np.asarray(weights, float)
    X = _design(n, rng, L.shape[1] - 2)
    if two_groups_only:  # m = 1: the intercept does not move under permutation
        X, L = X[:, :2], L[:, :2]
    plan = plan_contrast(X, L, kind=kind, tail=tail)
    pset = permutation_set(n, 61, plan.method, seed=3, classes=plan.classes)
    chunk = unit_columns(plan, _data(rng, n, v, missing))
    first = stack_rows(plan, *pset.batch(0, 30))
    later = stack_rows(plan, *pset.batch(30, 61))
    tile = tile_width(first.shape[0])
    results, seen = {}, {}
    for path in ("1", "0"):
        monkeypatch.setenv(ENV_NO_COMPILED, path)
        first_maps = np.full((30, v), 7.0)
        seen[path] = observed_chunk(plan, first, chunk, tile), observed_chunk(plan, first, chunk, tile, first_maps)
        seen[path] += (first_maps,)
    for got_seen, ref_seen in zip(seen["0"], seen["1"], strict=True):  # the first batch, identity first
        if isinstance(got_seen, np.ndarray):
            np.testing.assert_array_equal(got_seen.view(np.int64), ref_seen.view(np.int64))
            continue
        for got_part, ref_part in zip(got_seen, ref_seen, strict=True):
            for field in ("stat", "work", "threshold", "counts", "maxima"):
                if hasattr(ref_part, field):
                    got_value, ref_value = getattr(got_part, field), getattr(ref_part, field)
                    assert got_value.dtype == ref_value.dtype
                    np.testing.assert_array_equal(got_value, ref_value)
    observed = seen["1"][0][0]
    for path in ("1", "0"):
        monkeypatch.setenv(ENV_NO_COMPILED, path)
        maps = np.full((31, v), 7.0)
        nulls = chunk_nulls(plan, later, chunk, observed.threshold, tile, maps)
        plain = chunk_nulls(plan, later, chunk, observed.threshold, tile)
        results[path] = (nulls, plain, maps)
    (ref, ref_plain, ref_maps), (got, got_plain, got_maps) = results["1"], results["0"]
    assert got.counts.dtype == ref.counts.dtype
    np.testing.assert_array_equal(got.counts, ref.counts)  # bit-identity is the claim
    np.testing.assert_array_equal(got.maxima, ref.maxima)
    np.testing.assert_array_equal(got_plain.counts, ref.counts)
    np.testing.assert_array_equal(got_plain.maxima, ref_plain.maxima)
    np.testing.assert_array_equal(got_maps.view(np.int64), ref_maps.view(np.int64))
    if missing:
        assert np.isnan(got_maps[:, [3, v - 1]]).all()
        assert np.all(got.counts[[3, v - 1]] == 0)
    else:
        assert not np.isnan(got_maps).any()


def test_compiled_counts_match_lstsq_refits(fused):
    """Outside reference: t of each rearranged residual vector refitted with numpy.linalg.lstsq."""
    rng = np.random.default_rng(11)
    n, v = 20, 60
    X = _design(n, rng, 2)
    L = np.array([[0, 1.0, 0, 0]])
    Y = rng.standard_normal((n, v))
    plan = plan_contrast(X, L)
    pset = permutation_set(n, 40, "permute", seed=5, classes=plan.classes)
    chunk = unit_columns(plan, Y)
    tile = tile_width(plan.m * 40)
    observed, _ = observed_chunk(plan, stack_rows(plan, *pset.batch(0, 1)), chunk, tile)
    maps = np.empty((39, v))
    nulls = chunk_nulls(plan, stack_rows(plan, *pset.batch(1, 40)), chunk, observed.threshold, tile, maps)
    Z = X[:, [0, 2, 3]]
    R = Y - Z @ np.linalg.lstsq(Z, Y, rcond=None)[0]
    c = np.linalg.pinv(X.T @ X)[1, 1]
    df = n - 4
    ref = np.empty((39, v))
    for i, perm in enumerate(pset.perm[1:40]):
        # The engine moves column i of the design side to perm[i]: the rearranged data are R[perm].
        Ys = R[perm]
        beta, res, *_ = np.linalg.lstsq(X, Ys, rcond=None)
        ref[i] = beta[1] / np.sqrt(res / df * c)
    np.testing.assert_allclose(maps, ref, rtol=1e-10, atol=1e-12)
    t_obs = np.abs(observed.stat)
    margin = np.min(np.abs(np.abs(ref) - t_obs) / t_obs)
    assert margin > 1e-9  # no ties near the tolerance in this draw: counts are exact
    np.testing.assert_array_equal(nulls.counts, (np.abs(ref) >= t_obs).sum(axis=0))


def test_p_maps_identical_both_paths(fused, monkeypatch):
    rng = np.random.default_rng(5)
    n, v = 30, 2000
    X = _design(n, rng, 3)
    Y = _data(rng, n, v)
    out = {}
    for path in ("1", "0"):
        monkeypatch.setenv(ENV_NO_COMPILED, path)
        for kind, L in (("t", [[0, 1, 0, 0, 0]]), ("F", [[0, 1, 0, 0, 0], [0, 0, 0, 1, 0]])):
            res = run_permutations(ContrastTest(X, np.asarray(L, float), kind), Y, Rearrangements(n_perm=199, seed=2),
                                   execution=Execution(batch_size=50, chunk_size=700, threads=2))
            out[path, kind] = res
    for kind in ("t", "F"):
        ref, got = out["1", kind], out["0", kind]
        for field in ("stat", "p_perm", "p_fwe", "max_null"):
            np.testing.assert_array_equal(getattr(got, field), getattr(ref, field))


def test_scan_falls_back_when_forced(monkeypatch):
    class _Refuses:
        def __getattr__(self, name: str):
            raise AssertionError(f"the compiled pass {name} was used")

    monkeypatch.setitem(fastpath._LOADED, "scan", _Refuses())
    monkeypatch.setenv(ENV_NO_COMPILED, "1")
    rng = np.random.default_rng(2)
    X = _design(12, rng, 1)
    few = Execution(batch_size=5)  # batches after the first use the compiled pass
    res = run_permutations(ContrastTest(X, np.array([[0, 1.0, 0]])), rng.standard_normal((12, 50)),
                           Rearrangements(n_perm=20, seed=1), execution=few)
    assert res.p_perm.shape == (50,)
    monkeypatch.setenv(ENV_NO_COMPILED, "0")
    with pytest.raises(AssertionError, match="compiled pass"):
        run_permutations(ContrastTest(X, np.array([[0, 1.0, 0]])), rng.standard_normal((12, 50)),
                         Rearrangements(n_perm=20, seed=1), execution=few)
