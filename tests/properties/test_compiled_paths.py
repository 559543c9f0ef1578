"""The compiled TFCE and cluster kernels (optional extra "fast") against the numpy implementation.

Outside reference: the numpy implementation, itself checked against per-threshold labelling with
scipy.ndimage.label in tests/reference/test_tfce_reference.py (which runs on both paths).  Same
definition (E, H, dh, the step rule, 6/18/26 neighbours, one- and two-sided), so the maps agree to
rounding (1e-9 relative to the map's largest |TFCE|) and clusters and p values exactly.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
from scipy import ndimage

from groupmodel.inference import fastpath
from groupmodel.inference.clusters import label_clusters, max_cluster_size
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.fastpath import ENV_NO_COMPILED, compiled_kernels
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.results import ClusterResult, TfceResult
from groupmodel.inference.settings import ContrastTest, Execution, MapSettings, Rearrangements
from groupmodel.inference.tfce import TfceParams, tfce


def _both(monkeypatch: pytest.MonkeyPatch, fn, *args, **kw):
    """fn on the numpy path, then on the compiled path."""
    monkeypatch.setenv(ENV_NO_COMPILED, "1")
    ref = fn(*args, **kw)
    monkeypatch.setenv(ENV_NO_COMPILED, "0")
    return ref, fn(*args, **kw)


def _grids(rng: np.random.Generator):
    """Masks: full box, random holes, a thin slab, a mask touching every face, scattered voxels."""
    yield np.ones((6, 7, 5), bool)
    yield rng.uniform(size=(11, 9, 10)) > 0.2
    slab = np.zeros((12, 10, 9), bool)
    slab[:, 4, :] = True
    yield slab
    yield ndimage.binary_dilation(rng.uniform(size=(14, 13, 12)) > 0.97, iterations=2)
    yield rng.uniform(size=(8, 8, 8)) > 0.7


@pytest.mark.parametrize("conn", [6, 18, 26])
@pytest.mark.parametrize("rule", ["right", "midpoint"])
@pytest.mark.parametrize("two_sided", [False, True])
def test_tfce_compiled_equals_numpy(kernels, monkeypatch, conn, rule, two_sided):
    rng = np.random.default_rng(conn * 4 + (rule == "midpoint") * 2 + two_sided)
    for m, mask in enumerate(_grids(rng)):
        adj = grid_adjacency(mask, conn)
        for sigma, dh, (E, H) in ((0.0, 0.3, (0.5, 2.0)), (1.0, 0.1, (0.66, 1.5)), (2.0, 0.02, (1.0, 1.0))):
            img = ndimage.gaussian_filter(rng.standard_normal(mask.shape), sigma)
            x = img[mask] / max(img[mask].std(), 1e-12) * 2.5
            x[:: 7 + m] = np.round(x[:: 7 + m] / dh) * dh  # values exactly on thresholds
            ref, fast = _both(monkeypatch, tfce, x, adj, dh, E, H, rule, two_sided)
            scale = max(np.abs(ref).max(), 1e-300)
            np.testing.assert_allclose(fast, ref, rtol=1e-9, atol=1e-9 * scale)
            assert np.array_equal(np.sign(fast), np.sign(ref))


def test_tfce_compiled_edge_cases(kernels, monkeypatch):
    mask = np.ones((5, 4, 3), bool)
    adj = grid_adjacency(mask)
    n = adj.n
    for x in (np.zeros(n), np.full(n, -1.0), np.full(n, 3.0), np.where(np.arange(n) % 2, np.nan, 2.0),
              np.linspace(-4, 4, n)):
        ref, fast = _both(monkeypatch, tfce, x, adj, 0.1, two_sided=True)
        np.testing.assert_allclose(fast, ref, rtol=1e-9, atol=1e-12)
    empty = grid_adjacency(np.zeros((3, 3, 3), bool))
    ref, fast = _both(monkeypatch, tfce, np.zeros(0), empty, 0.1)
    assert fast.shape == ref.shape == (0,)


@pytest.mark.parametrize("conn", [6, 18, 26])
def test_clusters_compiled_equal_numpy(kernels, monkeypatch, conn):
    rng = np.random.default_rng(40 + conn)
    for mask in _grids(rng):
        adj = grid_adjacency(mask, conn)
        img = ndimage.gaussian_filter(rng.standard_normal(mask.shape), 1.0)
        x = img[mask] / max(img[mask].std(), 1e-12)
        for thr, two in ((0.5, True), (1.0, False), (9.0, True)):
            ref, fast = _both(monkeypatch, label_clusters, x, thr, adj, two_sided=two)
            np.testing.assert_array_equal(fast.labels, ref.labels)
            np.testing.assert_array_equal(fast.sizes, ref.sizes)
            np.testing.assert_array_equal(fast.signs, ref.signs)
            a, b = _both(monkeypatch, max_cluster_size, x, thr, adj, two_sided=two)
            assert a == b


def test_engine_p_maps_identical_on_both_paths(kernels, monkeypatch):
    rng = np.random.default_rng(5)
    shape = (9, 8, 7)
    mask = ndimage.binary_erosion(np.ones(shape, bool)) | (rng.uniform(size=shape) > 0.6)
    V, n = int(mask.sum()), 14
    X = np.column_stack([np.ones(n), np.r_[np.zeros(7), np.ones(7)], rng.standard_normal(n)])
    Y = np.stack([ndimage.gaussian_filter(rng.standard_normal(shape), 1.2)[mask] for _ in range(n)])
    Y = Y / Y.std() + 0.9 * X[:, [1]] * (np.arange(V) < V // 4)
    adj = grid_adjacency(mask)

    def run():
        res = run_permutations(ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=80, seed=2),
                               MapSettings(adjacency=adj, tfce=TfceParams(), cluster_z=2.0), Execution(n_jobs=1))
        return res.whole_map(TfceResult), res.whole_map(ClusterResult)

    (t0, c0), (t1, c1) = _both(monkeypatch, run)
    np.testing.assert_allclose(t1.map, t0.map, rtol=1e-9, atol=1e-9 * np.nanmax(np.abs(t0.map)))
    np.testing.assert_allclose(t1.max_null, t0.max_null, rtol=1e-9)
    np.testing.assert_array_equal(t1.p_fwe, t0.p_fwe)  # counts: bit for bit
    np.testing.assert_array_equal(c1.p_fwe, c0.p_fwe)
    np.testing.assert_array_equal(c1.max_null, c0.max_null)
    assert t0.params == t1.params


class _Refuses:
    """Stands in for the compiled kernels: any use fails the test."""

    def __getattr__(self, name: str):
        raise AssertionError(f"the compiled kernel {name} was used")


def test_fallback_is_used_when_forced(monkeypatch):
    monkeypatch.setitem(fastpath._LOADED, "kernels", _Refuses())
    monkeypatch.setenv(ENV_NO_COMPILED, "1")
    assert compiled_kernels() is None
    mask = np.ones((4, 4, 4), bool)
    adj = grid_adjacency(mask)
    x = np.linspace(-3, 3, adj.n)
    forced = tfce(x, adj, 0.1, two_sided=True)
    label_clusters(x, 1.0, adj, two_sided=True)
    monkeypatch.setenv(ENV_NO_COMPILED, "0")  # "0" and "" do not force it
    with pytest.raises(AssertionError, match="compiled kernel"):
        tfce(x, adj, 0.1, two_sided=True)
    assert forced.shape == (adj.n,)


def test_fallback_when_numba_is_missing(monkeypatch):
    monkeypatch.delenv(ENV_NO_COMPILED, raising=False)
    monkeypatch.delitem(fastpath._LOADED, "kernels", raising=False)
    monkeypatch.delitem(sys.modules, "groupmodel.inference.compiled", raising=False)
    monkeypatch.delattr(sys.modules["groupmodel.inference"], "compiled", raising=False)
    monkeypatch.setitem(sys.modules, "numba", None)  # import numba raises ImportError
    assert compiled_kernels() is None
    adj = grid_adjacency(np.ones((3, 4, 5), bool))
    x = np.linspace(0, 3, adj.n)
    out = tfce(x, adj, 0.1)
    assert out.shape == (adj.n,) and out[-1] > 0
    fastpath._LOADED.pop("kernels", None)  # the next caller looks again
