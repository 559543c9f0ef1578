"""Properties of the OLS engine that must hold for any design and data.

References are named beside each check: the algebra of least squares (common practice: invariance
of difference contrasts to a constant shift, F = t^2 for one row, equivariance under scaling),
and the engine's own contract (chunk-size invariance, picklability, NaN for zero variance).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from groupmodel.engine.ols import Test, fit_chunk, prepare
from groupmodel.errors import EstimabilityError, InputError, ModelError

SETTINGS = settings(max_examples=40, deadline=None)


@st.composite
def designs_and_data(draw):
    """An intercept + a (possibly unbalanced) 3-level factor + a covariate, and a few voxels."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    sizes = [draw(st.integers(2, 8)) for _ in range(3)]
    codes = np.repeat(np.arange(3), sizes)
    n = codes.size
    cov = rng.normal(draw(st.floats(-50, 50)), draw(st.floats(0.1, 20)), n)
    x = np.column_stack([np.ones(n), codes == 1, codes == 2, cov]).astype(float)
    y = rng.normal(0, 1, (n, 5)) * draw(st.floats(0.01, 100)) + draw(st.floats(-1e3, 1e3))
    return x, y


DIFFERENCE_TESTS = [
    Test("b_vs_a", [0, 1, 0, 0], "t"),
    Test("c_vs_b", [0, -1, 1, 0], "t", "greater"),
    Test("slope", [0, 0, 0, 1], "t", "less"),
    Test("factor", [[0, 1, 0, 0], [0, 0, 1, 0]], "F"),
]


def _close(a, b, rtol=1e-9, atol=0.0) -> bool:
    return bool(np.allclose(a, b, rtol=rtol, atol=atol, equal_nan=True))


@SETTINGS
@given(designs_and_data(), st.floats(-1e4, 1e4))
def test_constant_shift_leaves_difference_contrasts(dx, c) -> None:
    # Reference: common practice (adding c*1 to Y, with 1 in the column space, changes only the
    # intercept; difference contrasts and the residuals are unchanged).
    x, y = dx
    prep = prepare(x, DIFFERENCE_TESTS)
    r0, r1 = fit_chunk(prep, y), fit_chunk(prep, y + c)
    scale = np.abs(y - y.mean(0)).max()
    assert _close(r0.residual_variance, r1.residual_variance, rtol=1e-8)
    for test in DIFFERENCE_TESTS:
        a, b = r0[test.name], r1[test.name]
        # Absolute tolerance: y + c is rounded to float64 before the fit, which moves each value
        # by up to eps * |c|.
        assert _close(a.effect, b.effect, rtol=1e-8, atol=1e-12 * (abs(c) + scale))
        assert _close(a.statistic, b.statistic, rtol=1e-7, atol=1e-9)
    # A mean-type contrast moves by exactly c (common practice: L b1 = 1 for the level-a mean at
    # covariate 0).
    m0 = fit_chunk(prepare(x, [Test("a_mean", [1, 0, 0, 0], "t")]), y)["a_mean"].effect
    m1 = fit_chunk(prepare(x, [Test("a_mean", [1, 0, 0, 0], "t")]), y + c)["a_mean"].effect
    assert _close(m1 - m0, np.full_like(m0, c), rtol=1e-8, atol=1e-10 * (abs(c) + scale))


@SETTINGS
@given(designs_and_data())
def test_one_row_f_equals_t_squared(dx) -> None:
    # Reference: common practice (an F test of one row is the square of its t test, same p two-sided).
    x, y = dx
    row = np.array([0.0, 1.0, -0.5, 0.2])
    res = fit_chunk(prepare(x, [Test("t", row, "t"), Test("F", row[None, :], "F")]), y)
    assert _close(res["F"].statistic, res["t"].statistic ** 2, rtol=1e-10)
    assert _close(res["F"].p, res["t"].p, rtol=1e-10)
    assert _close(res["F"].log_p, res["t"].log_p, rtol=1e-10)


@SETTINGS
@given(designs_and_data(), st.floats(1e-6, 1e6), st.booleans())
def test_scaling_y_scales_effect_and_se_not_t(dx, k, negative) -> None:
    # Reference: common practice (OLS is equivariant: Y -> kY scales b and SE by |k|, t by sign(k)).
    x, y = dx
    k = -k if negative else k
    prep = prepare(x, DIFFERENCE_TESTS)
    r0, r1 = fit_chunk(prep, y), fit_chunk(prep, k * y)
    assert _close(r1.residual_variance, k * k * r0.residual_variance, rtol=1e-9)
    for name in ("b_vs_a", "slope"):
        assert _close(r1[name].effect, k * r0[name].effect, rtol=1e-8, atol=1e-12 * abs(k) * np.abs(y).max())
        assert _close(r1[name].se, abs(k) * r0[name].se, rtol=1e-9)
        assert _close(r1[name].statistic, np.sign(k) * r0[name].statistic, rtol=1e-7, atol=1e-9)
    assert _close(r1["factor"].statistic, r0["factor"].statistic, rtol=1e-7, atol=1e-9)


def test_chunk_size_invariance() -> None:
    # Reference: the engine's contract (no cross-voxel reductions): one chunk or chunks of 1, 7, 100.
    rng = np.random.default_rng(3)
    n, v = 40, 237
    codes = rng.integers(0, 3, n)
    x = np.column_stack([np.ones(n), codes == 1, codes == 2, rng.normal(size=n)]).astype(float)
    y = (rng.normal(size=(n, v)) * 10.0 ** rng.uniform(-2, 2, v) + rng.uniform(-1e3, 1e3, v)).astype(
        np.float32
    )
    prep = prepare(x, DIFFERENCE_TESTS + [Test("mean_a", [1, 0, 0, 0], "t")])
    whole = fit_chunk(prep, y, beta=True)
    for size in (1, 7, 100):
        parts = [fit_chunk(prep, y[:, i : i + size], beta=True) for i in range(0, v, size)]
        cat = np.concatenate
        assert np.allclose(
            cat([p.residual_variance for p in parts]), whole.residual_variance, rtol=1e-12, atol=0
        )
        assert np.allclose(cat([p.beta for p in parts], axis=1), whole.beta, rtol=1e-12, atol=1e-12)
        for name, w in whole.tests.items():
            for attr in ("effect", "statistic", "p", "log_p", "z", "mlog10p"):
                got = cat([getattr(p[name], attr) for p in parts], axis=-1)
                assert np.allclose(got, getattr(w, attr), rtol=1e-12, atol=1e-14), (size, name, attr)


def test_float32_and_float64_inputs_agree() -> None:
    # Reference: the engine's contract (computation in float64 whatever the input dtype).
    rng = np.random.default_rng(4)
    x = np.column_stack([np.ones(20), rng.normal(size=20)])
    y32 = rng.normal(size=(20, 9)).astype(np.float32)
    prep = prepare(x, [Test("slope", [0, 1], "t")])
    a, b = fit_chunk(prep, y32), fit_chunk(prep, y32.astype(np.float64))
    assert a["slope"].statistic.dtype == np.float64
    assert np.array_equal(a["slope"].statistic, b["slope"].statistic)


def test_zero_variance_and_nan_voxels() -> None:
    # Reference: the engine's contract (documented in groupmodel.ols): constant or exactly fitted
    # voxels give NaN statistics without a crash; a NaN voxel gives NaN; neighbours are unaffected.
    rng = np.random.default_rng(6)
    n = 12
    x = np.column_stack([np.ones(n), np.arange(n) % 2]).astype(float)
    y = rng.normal(size=(n, 5))
    y[:, 1] = 7.0  # constant
    y[:, 2] = 3.0 + 2.0 * x[:, 1]  # fitted exactly
    y[:, 3] = 0.0  # all zero (outside a mask)
    y[4, 4] = np.nan
    tests = [Test("diff", [0, 1], "t"), Test("both", np.eye(2), "F")]
    res = fit_chunk(prepare(x, tests), y)
    for name in ("diff", "both"):
        r = res[name]
        for attr in ("statistic", "p", "log_p", "z", "mlog10p"):
            vals = getattr(r, attr)
            assert np.isfinite(vals[0]), (name, attr)
            assert np.all(np.isnan(vals[1:])), (name, attr)
    assert res["diff"].se[1] == 0.0 and res["diff"].se[3] == 0.0
    assert abs(res["diff"].effect[2] - 2.0) < 1e-12 and abs(res["diff"].effect[1]) < 1e-12
    clean = fit_chunk(prepare(x, tests), y[:, :1])
    assert res["diff"].statistic[0] == pytest.approx(clean["diff"].statistic[0], rel=1e-13)


def test_prepared_pickles_and_is_data_free() -> None:
    # Reference: the engine's contract (Prepared is sent to workers; results identical after a round trip).
    rng = np.random.default_rng(9)
    x = np.column_stack([np.ones(15), rng.normal(size=15)])
    prep = prepare(x, [Test("slope", [0, 1], "t", "greater")])
    prep2 = pickle.loads(pickle.dumps(prep))
    y = rng.normal(size=(15, 4))
    assert np.array_equal(fit_chunk(prep, y)["slope"].p, fit_chunk(prep2, y)["slope"].p)
    assert prep.df_resid == 13 and prep.rank == 2 and prep.centred


def test_uncentred_design_without_constant() -> None:
    # Reference: common practice (regression through the origin: b = x'y / x'x, df = n - 1).
    rng = np.random.default_rng(10)
    xcol = rng.uniform(1, 2, 10)
    y = 3.0 * xcol[:, None] + rng.normal(size=(10, 3)) + 100.0
    prep = prepare(xcol[:, None], [Test("b", [1.0], "t")])
    assert not prep.centred
    res = fit_chunk(prep, y)
    b = xcol @ y / (xcol @ xcol)
    s2 = ((y - np.outer(xcol, b)) ** 2).sum(0) / 9
    assert np.allclose(res["b"].effect, b, rtol=1e-12)
    assert np.allclose(res.residual_variance, s2, rtol=1e-10)


def test_bad_tests_and_designs_are_refused() -> None:
    # Reference: groupmodel's error contract (errors.py); estimability per REFERENCES.md.
    x = np.column_stack([np.ones(6), [1, 1, 1, 0, 0, 0], [0, 0, 0, 1, 1, 1]]).astype(float)
    with pytest.raises(EstimabilityError, match="'group1_alone'"):
        prepare(x, [Test("group1_alone", [0, 1, 0], "t")])
    prepare(x, [Test("difference", [0, 1, -1], "t"), Test("mean1", [1, 1, 0], "t")])  # estimable
    with pytest.raises(InputError, match="one row"):
        Test("two_rows", np.eye(2), "t")
    with pytest.raises(InputError, match="tail"):
        Test("f_tail", np.eye(2), "F", "greater")
    with pytest.raises(InputError, match="finite"):
        Test("nan", [np.nan, 1.0], "t")
    with pytest.raises(ModelError, match="3 design columns"):
        prepare(x, [Test("short", [1.0, 0.0], "t")])
    with pytest.raises(ModelError, match="dependent"):
        prepare(x, [Test("dup", [[0, 1, -1], [0, 2, -2]], "F")])
    with pytest.raises(InputError, match="unique"):
        prepare(x, [Test("a", [0, 1, -1], "t"), Test("a", [0, 1, -1], "t")])
    with pytest.raises(ModelError, match="residual degrees of freedom"):
        prepare(np.eye(3), [])
    with pytest.raises(InputError, match="finite"):
        prepare(np.array([[1.0, np.nan], [1.0, 2.0], [1.0, 3.0]]), [])
    with pytest.raises(InputError, match="shape"):
        fit_chunk(prepare(x, []), np.zeros((5, 2)))
