"""The null statistic of TFCE, max |TFCE| of a map (:func:`groupmodel.inference.tfce.tfce_max`).

On 3-D grids with the compiled kernels the levels are formed and the maximum taken inside the kernel; the
claim is that this gives the same bits as ``abs(tfce(...)).max()`` on both paths (the levels are the same
integers, the union-find the same).  Outside reference for the value: TFCE by relabelling at every
threshold with ``scipy.ndimage.label`` (the brute force of tests/reference/test_tfce_reference.py), to 1e-9.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage

from groupmodel.inference.graph import grid_adjacency, mesh_adjacency
from groupmodel.inference.map_tasks import MapSpec, map_nulls
from groupmodel.inference.tfce import TfceParams, tfce, tfce_max

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "reference"))
from test_tfce_reference import brute_tfce_grid  # noqa: E402


def _map(rng: np.random.Generator, mask: np.ndarray, scale: float) -> np.ndarray:
    return ndimage.gaussian_filter(rng.standard_normal(mask.shape), 1.2)[mask] * scale


@pytest.mark.parametrize("rule", ["right", "midpoint"])
@pytest.mark.parametrize("two_sided", [False, True])
def test_tfce_max_equals_max_of_map(tfce_path, rule, two_sided):
    rng = np.random.default_rng(7 + two_sided + 2 * (rule == "midpoint"))
    mask = rng.uniform(size=(14, 12, 11)) > 0.15
    adj = grid_adjacency(mask)
    for _ in range(6):
        x = _map(rng, mask, 9.0)
        x[::41] = np.nan  # no data
        dh = float(np.nanmax(np.abs(x)) / 100)
        whole = tfce(x, adj, dh, rule=rule, two_sided=two_sided)
        assert tfce_max(x, adj, dh, rule=rule, two_sided=two_sided) == float(np.abs(whole).max())
    assert tfce_max(np.full(adj.n, -1.0), adj, 0.1) == 0.0  # nothing reaches a threshold


def test_tfce_max_against_relabelling(tfce_path):
    """scipy.ndimage.label at every threshold (26 neighbours), one-sided: the largest value to 1e-9."""
    rng = np.random.default_rng(3)
    mask = np.ones((12, 13, 10), bool)
    mask[:, :3, :] = False
    adj = grid_adjacency(mask)
    img = np.zeros(mask.shape)
    img[mask] = _map(rng, mask, 10.0)
    dh = float(img.max() / 50)
    ref = brute_tfce_grid(img, mask, dh)
    np.testing.assert_allclose(tfce_max(img[mask], adj, dh), ref.max(), rtol=1e-9)


def test_map_nulls_same_on_both_paths(monkeypatch):
    from groupmodel.inference.fastpath import ENV_NO_COMPILED, compiled_kernels

    if compiled_kernels() is None:
        pytest.skip("numba is not installed (optional extra fast)")
    rng = np.random.default_rng(9)
    mask = rng.uniform(size=(10, 11, 12)) > 0.1
    adj = grid_adjacency(mask)
    maps = np.stack([_map(rng, mask, 6.0) for _ in range(5)])
    spec = MapSpec("t", "two-sided", TfceParams().with_dh(0.05), 2.3)
    monkeypatch.setenv(ENV_NO_COMPILED, "1")
    ref = map_nulls(maps, spec, adj)
    monkeypatch.setenv(ENV_NO_COMPILED, "0")
    got = map_nulls(maps, spec, adj)
    for a, b in zip(ref, got, strict=True):
        np.testing.assert_array_equal(a, b)


def test_tfce_max_on_a_mesh_is_the_numpy_maximum():
    faces = np.array([[0, 1, 2], [1, 2, 3], [2, 3, 4]])
    adj = mesh_adjacency(faces, 5)
    x = np.array([3.0, 2.0, 1.0, 2.5, 0.2])
    assert tfce_max(x, adj, 0.1) == float(np.abs(tfce(x, adj, 0.1)).max())

