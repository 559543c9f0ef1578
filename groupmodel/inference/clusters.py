"""Clusters of a thresholded statistic map over a neighbourhood graph, and the cluster table.

Clusters are the connected components of the supra-threshold elements in an :class:`Adjacency`
(3-D grid or surface mesh).  For two-sided t maps, positive clusters (``t >= threshold``) and
negative clusters (``t <= -threshold``) are formed separately and never merge.  The cluster-forming
threshold is given as a z value and applied to the statistic with the same upper-tail p
(:func:`stat_threshold`), i.e. to the z of equal p of the statistic.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from ..errors import InputError
from .tfce import Adjacency

if TYPE_CHECKING:
    import pandas as pd

# scipy.stats and pandas are imported where used: worker processes that only label clusters start
# faster without them (about 1 s each).

__all__ = [
    "Clusters",
    "cluster_table",
    "label_clusters",
    "max_cluster_size",
    "stat_threshold",
]


def stat_threshold(z: float, kind: str, df: float, df1: float | None = None) -> float:
    """The t or F value whose upper-tail p equals that of a standard normal z.

    Parameters
    ----------
    z : float
        Cluster-forming threshold as a z value (e.g. 3.1 for p = 0.001 one-sided).
    kind : {"t", "F"}
    df : float
        Residual (denominator) degrees of freedom.
    df1 : float, optional
        Numerator degrees of freedom of an F statistic.

    Returns
    -------
    float
        ``t`` with ``P(T > t) = P(Z > z)`` (applied to ``|t|`` for two-sided maps), or ``f`` with
        ``P(F > f) = P(Z > z)``.
    """
    if not np.isfinite(z):
        raise InputError(f"the cluster-forming z must be finite; got {z!r} (in stat_threshold)")
    from scipy import stats

    log_p = stats.norm.logsf(z)
    if kind == "t":
        value = stats.t.isf(np.exp(log_p), df)
    elif kind == "F":
        if df1 is None:
            raise InputError("an F threshold needs the numerator df (in stat_threshold); pass df1")
        value = stats.f.isf(np.exp(log_p), df1, df)
    else:
        raise InputError(f"kind must be 't' or 'F'; got {kind!r} (in stat_threshold)")
    if not np.isfinite(value):
        raise InputError(
            f"z = {z} is too extreme to convert to a {kind} threshold on {df} df "
            "(in stat_threshold); use a smaller cluster-forming z"
        )
    return float(value)


@dataclass(frozen=True)
class Clusters:
    """Supra-threshold clusters of one map.

    Attributes
    ----------
    labels : ndarray of int32, shape (n,)
        0 outside clusters; clusters are numbered 1..C by decreasing size (ties: the cluster
        holding the lowest element index first).
    sizes : ndarray of int64, shape (C,)
        Number of elements of cluster c at ``sizes[c - 1]``.
    signs : ndarray of int8, shape (C,)
        +1 for clusters of high values, -1 for clusters of low values (two-sided maps).
    """

    labels: np.ndarray
    sizes: np.ndarray
    signs: np.ndarray

    @property
    def count(self) -> int:
        """Number of clusters C."""
        return int(self.sizes.size)


def _supra(x: np.ndarray, threshold: float, two_sided: bool) -> np.ndarray:
    """+1 / -1 / 0 per element: above threshold, below -threshold (two-sided), neither."""
    with np.errstate(invalid="ignore"):
        sign = (x >= threshold).astype(np.int8)
        if two_sided:
            sign -= (x <= -threshold).astype(np.int8)
    return sign


def _component_labels(sign: np.ndarray, adjacency: Adjacency) -> tuple[np.ndarray, np.ndarray, int]:
    """Connected components of the nonzero elements, joining only neighbours of equal sign.

    Returns the active element indices, their component labels (0..C-1) and C.
    """
    active = np.flatnonzero(sign)
    if active.size == 0:
        return active, np.zeros(0, np.int64), 0
    local = np.full(adjacency.n + 1, -1, dtype=np.int64)
    local[active] = np.arange(active.size)
    nb = adjacency.neighbours(active)  # padded with the sentinel n, whose local index is -1
    nb_local = local[nb]
    ext_sign = np.zeros(adjacency.n + 1, dtype=np.int8)
    ext_sign[:-1] = sign
    same = (nb_local >= 0) & (ext_sign[nb] == sign[active][:, None])
    rows, cols = np.nonzero(same)
    graph = sparse.csr_matrix(
        (np.ones(rows.size, dtype=np.int8), (rows, nb_local[rows, cols])), shape=(active.size,) * 2
    )
    count, labels = csgraph.connected_components(graph, directed=False)
    return active, labels, count


def label_clusters(x: np.ndarray, threshold: float, adjacency: Adjacency, two_sided: bool = False) -> Clusters:
    """Label the clusters of ``x >= threshold`` (and of ``x <= -threshold`` if two-sided).

    Parameters
    ----------
    x : ndarray of float, shape (n,)
        Statistic over the elements of ``adjacency``; NaN is never supra-threshold.
    threshold : float
        Cluster-forming threshold in units of ``x`` (see :func:`stat_threshold`).
    adjacency : Adjacency
    two_sided : bool

    Returns
    -------
    Clusters
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.size != adjacency.n:
        raise InputError(
            f"the map has {x.size} values but the adjacency has {adjacency.n} elements "
            "(in label_clusters); pass the in-mask values in adjacency order"
        )
    sign = _supra(x, threshold, two_sided)
    active, comp, count = _component_labels(sign, adjacency)
    labels = np.zeros(x.size, dtype=np.int32)
    if count == 0:
        return Clusters(labels, np.zeros(0, np.int64), np.zeros(0, np.int8))
    sizes = np.bincount(comp, minlength=count)
    first = np.full(count, active.size, dtype=np.int64)
    np.minimum.at(first, comp, np.arange(active.size))
    order = np.lexsort((first, -sizes))  # by size descending, then first element
    rank = np.empty(count, dtype=np.int64)
    rank[order] = np.arange(count)
    labels[active] = rank[comp] + 1
    signs = sign[active[first[order]]]
    return Clusters(labels, sizes[order].astype(np.int64), signs.astype(np.int8))


def max_cluster_size(x: np.ndarray, threshold: float, adjacency: Adjacency, two_sided: bool = False) -> int:
    """Size of the largest cluster (0 when nothing exceeds the threshold)."""
    sign = _supra(np.asarray(x, dtype=np.float64).ravel(), threshold, two_sided)
    _, comp, count = _component_labels(sign, adjacency)
    return int(np.bincount(comp).max()) if count else 0


#: Voxel indices of a cluster's peak (volumes only), and its coordinates and centre of mass in mm.
VOXEL_COLUMNS = ("peak_i", "peak_j", "peak_k")
MM_COLUMNS = ("peak_x_mm", "peak_y_mm", "peak_z_mm", "com_x_mm", "com_y_mm", "com_z_mm")


def _mm(ijk: np.ndarray, affine: np.ndarray) -> np.ndarray:
    affine = np.asarray(affine, dtype=np.float64)
    if affine.shape != (4, 4):
        raise InputError(f"the affine must be 4x4; got shape {affine.shape} (in cluster_table)")
    return np.asarray(ijk, dtype=np.float64) @ affine[:3, :3].T + affine[:3, 3]


def cluster_table(
    stat: np.ndarray,
    clusters: Clusters,
    p_fwe: np.ndarray | None = None,
    *,
    ijk: np.ndarray | None = None,
    affine: np.ndarray | None = None,
    coords: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per cluster: size, peak, centre of mass, FWE p.

    Parameters
    ----------
    stat : ndarray of float, shape (n,)
        The statistic map the clusters were formed on (for the peak).
    clusters : Clusters
    p_fwe : ndarray of float, shape (C,), optional
        Cluster-level FWE p value of each cluster.
    ijk : ndarray of int, shape (n, 3), optional
        Voxel indices of the elements; with ``affine`` (4x4, voxel -> millimetres) gives
        coordinates in mm.
    affine : ndarray, shape (4, 4), optional
    coords : ndarray of float, shape (n, 3), optional
        Coordinates in mm directly (e.g. mesh vertices); used instead of ``ijk``/``affine``.

    Returns
    -------
    pandas.DataFrame
        Columns ``cluster`` (label), ``sign``, ``size`` (elements), ``peak_stat`` (most extreme
        value in the cluster's direction), ``peak_index`` (element index), with ``ijk`` the peak's voxel
        indices ``peak_i/j/k``, then ``peak_x_mm/y_mm/z_mm`` and ``com_x_mm/y_mm/z_mm`` (the centre of
        mass is the unweighted mean of the elements' coordinates), ``p_fwe``.  Coordinates are NaN when
        no geometry is given.
    """
    stat = np.asarray(stat, dtype=np.float64).ravel()
    n = stat.size
    voxels = np.asarray(ijk) if ijk is not None and coords is None else None
    if voxels is not None and voxels.shape != (n, 3):
        raise InputError(f"voxel indices must have shape ({n}, 3); got {voxels.shape} (in cluster_table)")
    if coords is not None:
        xyz = np.asarray(coords, dtype=np.float64)
    elif ijk is not None and affine is not None:
        xyz = _mm(ijk, affine)
    else:
        xyz = np.full((n, 3), np.nan)
    if xyz.shape != (n, 3):
        raise InputError(f"coordinates must have shape ({n}, 3); got {xyz.shape} (in cluster_table)")
    C = clusters.count
    if p_fwe is not None:
        p_fwe = np.asarray(p_fwe, dtype=np.float64)
        if p_fwe.shape != (C,):
            raise InputError(f"p_fwe must have one value per cluster ({C}); got {p_fwe.shape} (in cluster_table)")
    rows = []
    labels = clusters.labels
    members = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[members], np.arange(1, C + 2))
    for c in range(1, C + 1):
        idx = members[bounds[c - 1] : bounds[c]]
        sign = int(clusters.signs[c - 1])
        peak = idx[np.argmax(sign * stat[idx])]
        com = xyz[idx].mean(axis=0)
        row: dict[str, float] = {"cluster": c, "sign": sign, "size": int(idx.size), "peak_stat": float(stat[peak]),
                                 "peak_index": int(peak)}
        if voxels is not None:
            row.update(zip(VOXEL_COLUMNS, (int(v) for v in voxels[peak]), strict=True))
        row.update(zip(MM_COLUMNS, (*xyz[peak], *com), strict=True))
        row["p_fwe"] = float(p_fwe[c - 1]) if p_fwe is not None else np.nan
        rows.append(row)
    columns = ["cluster", "sign", "size", "peak_stat", "peak_index", *(VOXEL_COLUMNS if voxels is not None else ()),
               *MM_COLUMNS, "p_fwe"]
    import pandas as pd

    return pd.DataFrame(rows, columns=columns)
