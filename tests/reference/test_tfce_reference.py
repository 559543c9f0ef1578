"""TFCE and clusters against outside references.

References named beside each check: the closed form of TFCE for a flat plateau (Smith and Nichols
2009, NeuroImage 44(1):83-98: TFCE = integral of e^E h^H dh), the Riemann sums printed in
/work/shared/REFERENCES.md, brute-force per-threshold labelling with scipy.ndimage.label (grids)
and scipy.sparse.csgraph.connected_components (meshes), scipy.ndimage.center_of_mass, and
scipy.stats for thresholds.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage, sparse, stats
from scipy.sparse import csgraph

from groupmodel.inference.clusters import cluster_table, label_clusters, stat_threshold
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.freedman_lane import plan_contrast
from groupmodel.inference.graph import Adjacency, grid_adjacency, mesh_adjacency
from groupmodel.inference.kernel import chunk_statistics
from groupmodel.inference.rearrangements import permutation_set
from groupmodel.inference.results import ClusterResult, TfceResult
from groupmodel.inference.settings import ContrastTest, MapSettings, Rearrangements
from groupmodel.inference.tfce import TfceParams, tfce

STRUCT = {c: ndimage.generate_binary_structure(3, r) for c, r in ((6, 1), (18, 2), (26, 3))}


def brute_tfce_grid(img, mask, dh, E=0.5, H=2.0, rule="right", conn=26):
    """TFCE by relabelling at every threshold with scipy.ndimage.label (same discretisation)."""
    shift = 0.5 if rule == "midpoint" else 0.0
    x = np.where(mask, img, -np.inf)
    out = np.zeros(img.shape)
    top = np.max(img[mask])
    k = 1
    while top > 0 and (k - shift) * dh <= top + 1e-9 * dh:
        h = (k - shift) * dh
        lab, _ = ndimage.label(x >= h - 1e-9 * dh, structure=STRUCT[conn])
        sizes = np.bincount(lab.ravel()).astype(float)
        sizes[0] = 0.0
        out += sizes[lab] ** E * h**H * dh * (lab > 0)
        k += 1
    return out[mask]


def brute_tfce_graph(x, adj: Adjacency, dh, E=0.5, H=2.0):
    """TFCE by relabelling at every threshold with scipy.sparse.csgraph.connected_components."""
    out = np.zeros(adj.n)
    k = 1
    while k * dh <= np.max(x) + 1e-9 * dh:
        h = k * dh
        on = x >= h - 1e-9 * dh
        keep = on[adj.u] & on[adj.v]
        g = sparse.csr_matrix((np.ones(keep.sum()), (adj.u[keep], adj.v[keep])), shape=(adj.n, adj.n))
        _, lab = csgraph.connected_components(g, directed=False)
        sizes = np.bincount(lab[on], minlength=adj.n).astype(float)
        out[on] += sizes[lab[on]] ** E * h**H * dh
        k += 1
    return out


def _plateau():
    mask = np.zeros((4, 4, 4), bool)
    mask[1:3, 1:3, 1:3] = True  # 8 voxels
    return grid_adjacency(mask)


def test_plateau_riemann_sums_and_limit():
    adj = _plateau()
    x = np.full(8, 3.0)
    limit = 8**0.5 * 3**3 / 3  # Smith and Nichols (2009): e^E s^(H+1)/(H+1), e=8, s=3
    assert limit == pytest.approx(25.45584412, abs=1e-8)  # REFERENCES.md
    # REFERENCES.md [computed]: right-hand sums 26.743 (dh 0.1), 25.583 (dh 0.01); midpoint 25.449.
    assert tfce(x, adj, 0.1)[0] == pytest.approx(26.743, abs=5e-4)
    assert tfce(x, adj, 0.01)[0] == pytest.approx(25.583, abs=5e-4)
    assert tfce(x, adj, 0.1, rule="midpoint")[0] == pytest.approx(25.449, abs=5e-4)
    # Convergence as dh shrinks: first order for the right-hand rule, second order for midpoints.
    prev_r = prev_m = None
    for dh in (0.3, 0.1, 0.03, 0.01, 0.003, 0.001):
        err_r = abs(tfce(x, adj, dh)[0] - limit)
        err_m = abs(tfce(x, adj, dh, rule="midpoint")[0] - limit)
        if prev_r is not None:
            assert err_r < prev_r and err_m < prev_m
        prev_r, prev_m = err_r, err_m
    assert prev_r < 0.02 and prev_m < 1e-5
    assert np.all(tfce(x, adj, 0.1) == tfce(x, adj, 0.1)[0])  # a plateau is flat


@pytest.mark.parametrize("conn", [6, 18, 26])
@pytest.mark.parametrize("rule", ["right", "midpoint"])
def test_tfce_equals_per_threshold_labelling(conn, rule):
    rng = np.random.default_rng(conn + (rule == "midpoint"))
    for trial in range(8):
        shape = (7, 6, 5)
        mask = rng.uniform(size=shape) > 0.15
        img = ndimage.gaussian_filter(rng.standard_normal(shape), trial % 3) * 3
        dh = [0.1, 0.07, 0.25][trial % 3]
        adj = grid_adjacency(mask, conn)
        E, H = (0.5, 2.0) if trial % 2 else (0.66, 1.5)
        fast = tfce(img[mask], adj, dh, E, H, rule)
        slow = brute_tfce_grid(img, mask, dh, E, H, rule, conn)  # scipy.ndimage.label per threshold
        np.testing.assert_allclose(fast, slow, rtol=1e-10, atol=1e-12)
        # Two-sided: positive and negative parts enhanced separately, sign kept.
        both = tfce(img[mask], adj, dh, E, H, rule, two_sided=True)
        neg = brute_tfce_grid(-img, mask, dh, E, H, rule, conn)
        np.testing.assert_allclose(both, slow - neg, rtol=1e-10, atol=1e-12)


def _grid_mesh(nx=9, ny=8):
    """A triangulated square grid (two triangles per cell)."""
    idx = np.arange(nx * ny).reshape(ny, nx)
    a, b, c, d = idx[:-1, :-1].ravel(), idx[:-1, 1:].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel()
    return np.concatenate([np.column_stack([a, b, d]), np.column_stack([a, d, c])])


def test_tfce_on_mesh_equals_per_threshold_components():
    rng = np.random.default_rng(7)
    faces = _grid_mesh()
    adj = mesh_adjacency(faces)
    for _ in range(5):
        x = ndimage.gaussian_filter(rng.standard_normal((8, 9)), 1).ravel() * 4
        np.testing.assert_allclose(
            tfce(x, adj, 0.05), brute_tfce_graph(x, adj, 0.05), rtol=1e-10, atol=1e-12
        )  # scipy.sparse.csgraph.connected_components per threshold
    # A vertex mask drops vertices and their edges.
    mask = rng.uniform(size=72) > 0.2
    sub = mesh_adjacency(faces, 72, mask)
    assert sub.n == mask.sum()
    x = rng.standard_normal(sub.n) * 2
    np.testing.assert_allclose(tfce(x, sub, 0.1), brute_tfce_graph(x, sub, 0.1), rtol=1e-10, atol=1e-12)


def test_grid_adjacency_degrees():
    mask = np.ones((3, 3, 3), bool)
    for conn in (6, 18, 26):
        adj = grid_adjacency(mask, conn)
        assert adj.degree()[13] == conn  # the centre voxel (common practice: 6/18/26 neighbours)
        assert np.all(adj.u < adj.v)


def test_clusters_equal_ndimage_label():
    rng = np.random.default_rng(2)
    shape = (9, 8, 7)
    mask = rng.uniform(size=shape) > 0.1
    img = ndimage.gaussian_filter(rng.standard_normal(shape), 1.2)
    img /= img[mask].std()
    adj = grid_adjacency(mask, 26)
    thr = 1.0
    cl = label_clusters(img[mask], thr, adj, two_sided=True)
    # scipy.ndimage.label on the positive and the negative parts separately.
    for sign in (1, -1):
        lab, n = ndimage.label(mask & (sign * img >= thr), structure=STRUCT[26])
        ref_sizes = sorted(np.bincount(lab.ravel())[1:].tolist(), reverse=True)
        ours = cl.sizes[cl.signs == sign].tolist()
        assert ours == ref_sizes
        # Same partition: each ndimage cluster maps to exactly one of ours and vice versa.
        pairs = {(a, b) for a, b in zip(lab[mask], cl.labels, strict=True) if a > 0}
        assert len(pairs) == n == len({b for _, b in pairs})
    assert np.all(np.diff(cl.sizes) <= 0)


def test_cluster_table_geometry():
    shape = (10, 9, 8)
    mask = np.ones(shape, bool)
    img = np.zeros(shape)
    img[2:5, 3:5, 1:3] = 2.0
    img[3, 4, 2] = 3.5  # peak
    img[7:9, 1:3, 5:7] = -2.5
    affine = np.array([[2.0, 0, 0, -90], [0, 2.0, 0, -126], [0, 0, 2.0, -72], [0, 0, 0, 1]])
    adj = grid_adjacency(mask)
    ijk = np.argwhere(mask)
    cl = label_clusters(img[mask], 1.0, adj, two_sided=True)
    table = cluster_table(img[mask], cl, np.array([0.01, 0.2]), ijk=ijk, affine=affine)
    assert table["size"].tolist() == [12, 8] and table["sign"].tolist() == [1, -1]
    # scipy.ndimage.center_of_mass of the binary cluster, mapped through the affine.
    com_vox = ndimage.center_of_mass(img > 1.0)
    com_mm = affine[:3, :3] @ np.array(com_vox) + affine[:3, 3]
    np.testing.assert_allclose(table.loc[0, ["com_x_mm", "com_y_mm", "com_z_mm"]].to_numpy(float), com_mm)
    peak_mm = affine[:3, :3] @ np.array([3, 4, 2]) + affine[:3, 3]
    np.testing.assert_allclose(table.loc[0, ["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float), peak_mm)
    # the peak's voxel indices, as numpy indexes the image (img[3, 4, 2] is the peak)
    assert table.loc[0, ["peak_i", "peak_j", "peak_k"]].tolist() == [3, 4, 2]
    assert img[tuple(table.loc[1, ["peak_i", "peak_j", "peak_k"]])] == -2.5
    assert table.columns[:8].tolist() == ["cluster", "sign", "size", "peak_stat", "peak_index", "peak_i", "peak_j",
                                          "peak_k"]
    assert table.loc[0, "peak_stat"] == 3.5 and table.loc[1, "peak_stat"] == -2.5
    assert table["p_fwe"].tolist() == [0.01, 0.2]


def test_stat_threshold_has_equal_p():
    for z in (2.3, 3.1, 4.5):
        # scipy.stats: P(T > t_thr) = P(Z > z), and likewise for F.
        assert stats.t.sf(stat_threshold(z, "t", 17), 17) == pytest.approx(stats.norm.sf(z), rel=1e-9)
        assert stats.f.sf(stat_threshold(z, "F", 30, 3), 3, 30) == pytest.approx(stats.norm.sf(z), rel=1e-9)


def test_engine_tfce_and_cluster_p_against_brute_force():
    rng = np.random.default_rng(8)
    shape = (6, 5, 4)
    mask = np.ones(shape, bool)
    mask[0, 0, :] = False
    V = int(mask.sum())
    n = 12
    X = np.column_stack([np.ones(n), np.r_[np.zeros(6), np.ones(6)], rng.standard_normal(n)])
    smooth = np.stack([ndimage.gaussian_filter(rng.standard_normal(shape), 1)[mask] for _ in range(n)])
    Y = smooth / smooth.std() + 0.8 * X[:, [1]] * (np.arange(V) < 25)
    adj = grid_adjacency(mask)
    res = run_permutations(
        ContrastTest(X, [0, 1, 0]), Y, Rearrangements(n_perm=60, seed=3),
        MapSettings(adjacency=adj, tfce=TfceParams(dh=0.1), cluster_z=1.5),
    )
    tf, cl = res.whole_map(TfceResult), res.whole_map(ClusterResult)
    plan = plan_contrast(X, [0, 1, 0])
    pset = permutation_set(n, 60, "permute", seed=3, classes=plan.classes)
    maps = chunk_statistics(plan, pset.perm, pset.flips, Y)
    img = np.zeros(shape)
    # TFCE null by per-threshold scipy.ndimage.label on every rearranged map (two-sided, |TFCE|).
    tmax = []
    cmax = []
    thr = stat_threshold(1.5, "t", plan.df)
    for j in range(maps.shape[0]):
        img[mask] = maps[j]
        both = brute_tfce_grid(img, mask, 0.1) + brute_tfce_grid(-img, mask, 0.1)
        tmax.append(np.max(np.abs(both)))
        sizes = [np.bincount(ndimage.label(mask & (s * img >= thr), structure=STRUCT[26])[0].ravel())[1:]
                 for s in (1, -1)]
        cmax.append(max([0] + [int(z.max()) for z in sizes if z.size]))
    np.testing.assert_allclose(tf.max_null, tmax, rtol=1e-10)
    np.testing.assert_array_equal(cl.max_null, cmax)
    img[mask] = maps[0]
    obs = brute_tfce_grid(img, mask, 0.1) - brute_tfce_grid(-img, mask, 0.1)
    np.testing.assert_allclose(tf.map, obs, rtol=1e-10, atol=1e-12)
    expected = (np.array(tmax)[:, None] >= np.abs(obs)[None, :] * (1 - 1e-12)).mean(axis=0)
    np.testing.assert_array_equal(tf.p_fwe, expected)
    # Cluster FWE p: fraction of null maxima at least the observed cluster size.
    for c, size in enumerate(cl.clusters.sizes, start=1):
        p = np.mean(np.array(cmax) >= size)
        assert cl.cluster_p_fwe[c - 1] == p
        assert np.all(cl.p_fwe[cl.clusters.labels == c] == p)
    assert np.all(cl.p_fwe[cl.clusters.labels == 0] == 1.0)
    assert tf.params.dh == 0.1 and tf.params.E == 0.5 and tf.params.H == 2.0
