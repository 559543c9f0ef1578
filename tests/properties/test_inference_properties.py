"""Properties of the permutation engine, TFCE and the FDR correction (hypothesis and fixed cases).

Outside references: the definitions of exchangeability blocks (Winkler et al. 2014, NeuroImage
92:381-397: within-block permutations keep rows in their blocks, whole-block permutations keep
blocks intact), scipy.stats.false_discovery_control, and common practice for reproducibility
(same seed, same rearrangements; results independent of chunking and of worker count).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage, stats

from groupmodel.errors import InputError
from groupmodel.inference.driver import run_permutations, run_tests
from groupmodel.inference.freedman_lane import plan_contrast
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.kernel import tile_width
from groupmodel.inference.multiple import fdr_bh
from groupmodel.inference.rearrangements import count_rearrangements, permutation_set
from groupmodel.inference.results import ClusterResult, TfceResult
from groupmodel.inference.settings import ContrastTest, Execution, MapSettings, Rearrangements, whole_map_batch
from groupmodel.inference.tfce import TfceParams, default_step, tfce
from groupmodel.inference.whole_maps import MapWorkers, observe_maps

SETTINGS = settings(max_examples=40, deadline=None)


@st.composite
def block_layouts(draw, equal: bool = False):
    n_blocks = draw(st.integers(1, 5))
    if equal:
        size = draw(st.integers(1, 4))
        sizes = [size] * n_blocks
    else:
        sizes = draw(st.lists(st.integers(1, 5), min_size=n_blocks, max_size=n_blocks))
    labels = np.repeat(np.arange(n_blocks) * 3 + 1, sizes)  # non-contiguous label values
    order = draw(st.permutations(list(range(labels.size))))
    return labels[np.array(order)]  # blocks interleaved in row order


@SETTINGS
@given(blocks=block_layouts(), J=st.integers(2, 60), seed=st.integers(0, 2**31 - 1),
       method=st.sampled_from(["permute", "both"]))
def test_within_block_permutations_stay_in_blocks(blocks, J, seed, method):
    n = blocks.size
    ps = permutation_set(n, J, method, blocks=blocks, seed=seed)
    assert np.array_equal(ps.perm[0], np.arange(n))  # identity first
    assert np.all(np.sort(ps.perm, axis=1) == np.arange(n))  # each row a permutation
    assert np.all(blocks[ps.perm] == blocks[None, :])  # Winkler et al. 2014: never across blocks
    if method == "both":
        assert np.all(ps.flips[0] == 1) and set(np.unique(ps.flips)) <= {-1, 1}
    again = permutation_set(n, J, method, blocks=blocks, seed=seed)
    assert np.array_equal(again.perm, ps.perm)  # same seed, same set


@SETTINGS
@given(blocks=block_layouts(equal=True), J=st.integers(2, 60), seed=st.integers(0, 2**31 - 1),
       method=st.sampled_from(["permute", "flip", "both"]))
def test_whole_block_rearrangements_keep_blocks_intact(blocks, J, seed, method):
    n = blocks.size
    ps = permutation_set(n, J, method, blocks=blocks, whole_blocks=True, seed=seed)
    labels = np.unique(blocks)
    rows = {b: np.flatnonzero(blocks == b) for b in labels}
    for j in range(ps.size):
        for b in labels:
            if ps.perm is not None:
                taken = ps.perm[j, rows[b]]
                # The rows of one whole block, in their order (Winkler et al. 2014).
                assert any(np.array_equal(taken, rows[c]) for c in labels)
            if ps.flips is not None:
                assert np.unique(ps.flips[j, rows[b]]).size == 1  # one sign per block


@SETTINGS
@given(n=st.integers(2, 9), n_classes=st.integers(1, 3), method=st.sampled_from(["permute", "flip", "both"]),
       seed=st.integers(0, 1000))
def test_exhaustive_enumeration_is_complete_and_distinct(n, n_classes, method, seed):
    rng = np.random.default_rng(seed)
    classes = rng.integers(0, n_classes, n)
    total = count_rearrangements(n, method, classes=classes)
    if total > 3000:
        return
    ps = permutation_set(n, 3000, method, classes=classes, seed=seed)
    assert ps.exhaustive and ps.size == total and ps.seed is None
    # Distinct as arrangements: the class landing on each data row (and the signs).
    keys = set()
    for j in range(ps.size):
        arr = np.empty(n, dtype=np.int64)
        if ps.perm is not None:
            arr[ps.perm[j]] = classes
        else:
            arr[:] = classes
        sig = tuple(ps.flips[j]) if ps.flips is not None else ()
        keys.add((tuple(arr), sig))
    assert len(keys) == total


def test_seed_changes_the_set():
    a = permutation_set(30, 100, "permute", seed=1)
    b = permutation_set(30, 100, "permute", seed=2)
    assert not np.array_equal(a.perm, b.perm)
    assert np.array_equal(a.perm[0], b.perm[0])  # both start with the identity
    c = permutation_set(30, 100, "flip", seed=1)
    d = permutation_set(30, 100, "flip", seed=2)
    assert not np.array_equal(c.flips, d.flips)


def _grid_study(seed=0, n=10):
    rng = np.random.default_rng(seed)
    shape = (6, 7, 5)
    mask = np.ones(shape, bool)
    mask[:2, :2, :] = False
    V = int(mask.sum())
    X = np.column_stack([np.ones(n), np.r_[np.zeros(n // 2), np.ones(n - n // 2)], rng.standard_normal(n)])
    Y = np.stack([ndimage.gaussian_filter(rng.standard_normal(shape), 1)[mask] for _ in range(n)]) * 3
    Y[:, :40] += 1.5 * X[:, [1]]
    return X, Y, grid_adjacency(mask), V


def _get(r, name):
    """A field of a result by its name, the whole-map parts as tfce, p_tfce_fwe, tfce_max_null, tfce_params,
    p_cluster_fwe, cluster_max_null."""
    whole = {
        "tfce": (TfceResult, "map"), "p_tfce_fwe": (TfceResult, "p_fwe"), "tfce_max_null": (TfceResult, "max_null"),
        "tfce_params": (TfceResult, "params"), "p_cluster_fwe": (ClusterResult, "p_fwe"),
        "cluster_max_null": (ClusterResult, "max_null"),
    }
    if name in whole:
        kind, field = whole[name]
        return getattr(r.whole_map(kind), field)
    return getattr(r, name)


def test_results_do_not_depend_on_chunk_size_or_memmap(tmp_path):
    X, Y, adj, V = _grid_study()
    test, perms = ContrastTest(X, [0, 1, 0]), Rearrangements(n_perm=120, seed=5)
    maps = MapSettings(adjacency=adj, tfce=TfceParams(), cluster_z=2.0)
    results = [run_permutations(test, Y, perms, maps, Execution(chunk_size=c, batch_size=50)) for c in (1, 37, None)]
    path = tmp_path / "data.dat"
    mm = np.memmap(path, dtype=np.float32, mode="w+", shape=Y.shape)
    mm[:] = Y
    mm.flush()
    mm = np.memmap(path, dtype=np.float32, mode="r", shape=Y.shape)
    results.append(run_permutations(test, mm, perms, maps, Execution(chunk_size=50, batch_size=50)))
    ref = results[0]
    for i, r in enumerate(results[1:]):
        data_ref = ref if i < 2 else run_permutations(test, Y.astype(np.float32), perms, maps, Execution(batch_size=50))
        # Exact where exactness is the claim: p values and cluster sizes are counts (with a tie tolerance of
        # 100 ulp), and the recorded TFCE step is rounded to 6 significant digits (default_step).
        for name in ("p_perm", "p_fwe", "p_tfce_fwe", "p_cluster_fwe", "cluster_max_null"):
            np.testing.assert_array_equal(_get(r, name), _get(data_ref, name), err_msg=name)
        assert _get(r, "tfce_params") == _get(data_ref, "tfce_params")
        # Float statistics to a tolerance: the last bits of a BLAS product depend on its shape.
        for name in ("stat", "max_null", "tfce", "tfce_max_null"):
            np.testing.assert_allclose(_get(r, name), _get(data_ref, name), rtol=1e-12, err_msg=name)


def test_tfce_step_does_not_depend_on_the_last_bits_of_the_maximum():
    # The case: maxima 10.543769596335156 and 10.543769596335176 (a few ulp apart, from two chunk
    # sizes) gave steps that differed in the last bits; rounded to 6 significant digits they are one step.
    X, Y, adj, V = _grid_study()
    plan = plan_contrast(X, np.array([[0.0, 1.0, 0.0]]))
    stat = np.linspace(-3.0, 3.0, V)
    top = 10.543769596335156
    steps = []
    for ulps in (0, 1, 9, -1):
        other = stat.copy()
        other[V // 2] = top + ulps * np.spacing(top)
        steps.append(observe_maps(other, plan, MapSettings(adjacency=adj, tfce=TfceParams())).spec.tfce.dh)
    assert steps == [0.105438] * 4
    assert default_step(0.0) == default_step(float("nan")) == 0.1  # no positive value: a fixed step


def test_results_do_not_depend_on_thread_count():
    # Enough voxels that every thread gets several tiles of its own: tiles of tile_width(m B) voxels.
    rng = np.random.default_rng(11)
    n, V = 24, 20_000
    X = np.column_stack([np.ones(n), np.r_[np.zeros(12), np.ones(12)], rng.standard_normal((n, 2))])
    Y = rng.standard_normal((n, V))
    Y[:, :300] += 0.8 * X[:, [1]]
    test, perms = ContrastTest(X, [0, 1, 0, 0]), Rearrangements(n_perm=90, seed=4)
    ref = run_permutations(test, Y, perms, execution=Execution(threads=1, batch_size=40))
    assert V > 4 * tile_width(3 * 40)  # m = 3 rows per rearrangement (interest + two covariates)
    for threads, chunk in ((2, None), (3, None), (4, 1000), (2, 333)):
        r = run_permutations(test, Y, perms, execution=Execution(threads=threads, chunk_size=chunk, batch_size=40))
        for name in ("p_perm", "p_fwe"):
            np.testing.assert_array_equal(getattr(r, name), getattr(ref, name), err_msg=f"{name} {threads}")
        for name in ("stat", "max_null"):
            np.testing.assert_allclose(getattr(r, name), getattr(ref, name), rtol=1e-12, err_msg=f"{name} {threads}")


def test_results_do_not_depend_on_batch_size():
    # The batch size follows the memory budget for whole maps (whole_map_batch); the rearrangements do not.
    X, Y, adj, V = _grid_study(seed=4)
    test, perms = ContrastTest(X, [0, 1, 0]), Rearrangements(n_perm=75, seed=6)
    maps = MapSettings(adjacency=adj, tfce=TfceParams(dh=0.05), cluster_z=2.0)
    ref = run_permutations(test, Y, perms, maps, Execution(batch_size=100))
    for batch in (1, 8, 33):
        r = run_permutations(test, Y, perms, maps, Execution(batch_size=batch))
        for name in ("p_perm", "p_fwe", "p_tfce_fwe", "p_cluster_fwe", "cluster_max_null"):
            np.testing.assert_array_equal(_get(r, name), _get(ref, name), err_msg=f"{name} batch {batch}")
        for name in ("max_null", "tfce_max_null"):
            np.testing.assert_allclose(_get(r, name), _get(ref, name), rtol=1e-12, err_msg=f"{name} {batch}")


def test_whole_map_batch_follows_the_budget():
    V = 200_000
    assert whole_map_batch(V, 2 * 1024**3, 1) == 100  # capped
    assert whole_map_batch(V, 400 * 10**6, 2) == 400 * 10**6 // (5 * V * 8)  # five copies with workers
    assert whole_map_batch(V, 400 * 10**6, 1) == 100
    assert whole_map_batch(V, 10**6, 2) == 8  # floor


def test_zero_threads_is_refused():
    X, Y, _, _ = _grid_study(seed=3)
    with pytest.raises(InputError, match="threads must be >= 1"):
        run_permutations(ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=10), execution=Execution(threads=0))


@pytest.mark.slow  # starts worker processes
def test_results_do_not_depend_on_worker_count():
    X, Y, adj, V = _grid_study(seed=1)
    test, perms = ContrastTest(X, [0, 1, 0]), Rearrangements(n_perm=80, seed=2)
    maps = MapSettings(adjacency=adj, tfce=TfceParams(), cluster_z=2.3)
    one = run_permutations(test, Y, perms, maps, Execution(n_jobs=1, batch_size=30))
    two = run_permutations(test, Y, perms, maps, Execution(n_jobs=2, batch_size=30))
    for name in ("tfce_max_null", "cluster_max_null", "p_tfce_fwe"):
        np.testing.assert_array_equal(_get(one, name), _get(two, name))
    # One set of workers shared by several tests (t two-sided, t "less", F) gives the same as inline.
    tests = [
        SimpleNamespace(name="group", weights=np.array([0, 1, 0.0]), kind="t", tail="two-sided"),
        SimpleNamespace(name="group_less", weights=np.array([0, 1, 0.0]), kind="t", tail="less"),
        SimpleNamespace(name="both", weights=np.array([[0, 1, 0], [0, 0, 1.0]]), kind="F", tail="two-sided"),
    ]
    inline = run_tests(X, tests, Y, perms, maps, Execution(n_jobs=1, batch_size=30))
    shared = run_tests(X, tests, Y, perms, maps, Execution(n_jobs=2, batch_size=30))
    for a, b in zip(inline, shared, strict=True):
        for name in ("tfce_max_null", "cluster_max_null", "p_tfce_fwe", "p_cluster_fwe"):
            np.testing.assert_array_equal(_get(a, name), _get(b, name), err_msg=f"{a.name} {name}")
    other = MapWorkers(2, grid_adjacency(np.ones((3, 3, 3), bool)))
    try:
        with pytest.raises(InputError, match="another adjacency"):
            run_permutations(test, Y, perms, maps, Execution(workers=other, batch_size=30))
    finally:
        other.close()


def test_different_seed_gives_different_null():
    X, Y, _, _ = _grid_study(seed=2)
    a = run_permutations(ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=60, seed=1))
    b = run_permutations(ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=60, seed=2))
    assert not np.array_equal(a.max_null, b.max_null)
    assert a.max_null[0] == b.max_null[0]  # the identity is the same


@SETTINGS
@given(seed=st.integers(0, 10_000), scale=st.floats(0.5, 4.0), bump=st.floats(0.0, 2.0))
def test_tfce_monotone_and_antisymmetric(seed, scale, bump):
    rng = np.random.default_rng(seed)
    shape = (5, 4, 4)
    mask = rng.uniform(size=shape) > 0.2
    adj = grid_adjacency(mask)
    x = ndimage.gaussian_filter(rng.standard_normal(shape), 0.8)[mask] * scale
    y = x + bump * rng.uniform(size=x.size)  # y >= x everywhere
    tx, ty = tfce(x, adj, 0.1), tfce(y, adj, 0.1)
    # Raising values can only grow clusters and heights (Smith and Nichols 2009 definition).
    assert np.all(ty >= tx - 1e-12)
    assert np.all(tx >= 0) and np.all(tx[x < 0.1 - 1e-9] == 0)
    both = tfce(x, adj, 0.1, two_sided=True)
    np.testing.assert_allclose(tfce(-x, adj, 0.1, two_sided=True), -both, rtol=1e-12, atol=1e-12)


@SETTINGS
@given(p=st.lists(st.floats(0, 1), min_size=1, max_size=60))
def test_bh_properties(p):
    p = np.array(p)
    adj = fdr_bh(p)
    np.testing.assert_array_equal(adj, stats.false_discovery_control(p, method="bh"))  # scipy
    assert np.all(adj >= p) and np.all(adj <= 1)
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(adj[order]) >= 0)  # monotone in p


def test_two_sided_tfce_p_uses_absolute_values():
    X, Y, adj, V = _grid_study(seed=3)
    Y = Y.copy()
    Y[:, 40:80] -= 3.0 * X[:, [1]]  # a strong negative effect as well
    res = run_permutations(
        ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=60, seed=1), MapSettings(adj, TfceParams(dh=0.1))
    )
    r = res.whole_map(TfceResult)
    assert r.map.min() < 0 < r.map.max()  # sign kept
    assert np.all(r.max_null >= 0)
    neg = r.map[40:80]
    assert np.all(neg <= 0)
    # FWE p of a negative element compares |TFCE| with the null of max |TFCE| (common practice).
    expected = (r.max_null[:, None] >= np.abs(neg)[None, :] * (1 - 1e-12)).mean(axis=0)
    np.testing.assert_array_equal(r.p_fwe[40:80], expected)
    assert np.min(r.p_fwe[40:80]) <= 0.1


def test_run_tests_accepts_ols_tests():
    from groupmodel.engine.ols import Test

    X, Y, _, _ = _grid_study(seed=4)
    tests = [Test("group", [0, 1, 0], "t", "greater"), Test("both", [[0, 1, 0], [0, 0, 1]], "F")]
    results = run_tests(X, tests, Y, Rearrangements(n_perm=40, seed=3))
    assert [r.name for r in results] == ["group", "both"]
    one = run_permutations(ContrastTest(X, [0, 1, 0], tail="greater"), Y, Rearrangements(n_perm=40, seed=3))
    np.testing.assert_array_equal(results[0].p_perm, one.p_perm)
    assert results[1].kind == "F" and results[1].q == 2
