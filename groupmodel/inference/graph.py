"""The neighbourhood graph over in-mask elements that TFCE and clusters both use.

An :class:`Adjacency` is an undirected graph over the in-mask elements (voxels in C order, or mesh
vertices), stored as its edge list with cached derived tables (CSR matrix, padded neighbour table,
neighbour chains).  :func:`grid_adjacency` builds it for a 3-D mask with 6, 18 or 26 neighbours (and
attaches a :class:`_GridLayout` that finds neighbours by index arithmetic on a padded grid);
:func:`mesh_adjacency` builds it for a triangle mesh.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse

from ..errors import InputError

__all__ = ["Adjacency", "grid_adjacency", "mesh_adjacency"]


@dataclass(frozen=True, eq=False)
class Adjacency:
    """Undirected neighbourhood graph over ``n`` in-mask elements (voxels or vertices).

    Built as ``Adjacency(n, u, v)`` from an edge list (see :meth:`from_edges`), or by :func:`grid_adjacency`,
    which stores the grid layout only and lists the edges when first asked for (TFCE and clusters on grids
    find neighbours by index arithmetic and never need the list).

    Attributes
    ----------
    n : int
        Number of elements; element ``i`` is the i-th in-mask voxel (C order) or vertex.
    u, v : ndarray of int32, shape (n_edges,)
        Each undirected edge once, with ``u < v``, sorted by ``u`` then ``v``.
    """

    n: int
    _u: np.ndarray | None = field(default=None, repr=False)
    _v: np.ndarray | None = field(default=None, repr=False)
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def u(self) -> np.ndarray:
        """First endpoint of each edge."""
        return self._edges()[0]

    @property
    def v(self) -> np.ndarray:
        """Second endpoint of each edge."""
        return self._edges()[1]

    def _edges(self) -> tuple[np.ndarray, np.ndarray]:
        if self._u is not None and self._v is not None:
            return self._u, self._v
        if "edges" not in self._cache:
            self._cache["edges"] = self._cache["grid"].edges(self.n)
        return self._cache["edges"]

    @classmethod
    def from_edges(cls, n: int, u: np.ndarray, v: np.ndarray) -> Adjacency:
        """Build from any list of edges (order, direction and duplicates do not matter).

        Parameters
        ----------
        n : int
            Number of elements.
        u, v : array_like of int, shape (n_edges,)
            Edge endpoints in ``[0, n)``; self-loops are dropped.
        """
        u = np.asarray(u, dtype=np.int64).ravel()
        v = np.asarray(v, dtype=np.int64).ravel()
        if u.shape != v.shape:
            raise InputError(
                f"edge lists must have equal length; got {u.size} and {v.size} "
                "(in Adjacency.from_edges); pass one endpoint array per side"
            )
        if u.size and (min(u.min(), v.min()) < 0 or max(u.max(), v.max()) >= n):
            raise InputError(
                f"edge endpoints must lie in [0, {n}); got values from {min(u.min(), v.min())} "
                f"to {max(u.max(), v.max())} (in Adjacency.from_edges); index in-mask elements from 0"
            )
        lo, hi = np.minimum(u, v), np.maximum(u, v)
        keep = lo != hi
        key = np.unique(lo[keep] * np.int64(n) + hi[keep])
        return cls(int(n), (key // n).astype(np.int32), (key % n).astype(np.int32))

    @classmethod
    def from_sparse(cls, matrix: sparse.spmatrix | sparse.sparray) -> Adjacency:
        """Build from a square sparse matrix whose nonzeros mark neighbours (symmetrised)."""
        coo = sparse.coo_matrix(matrix)
        if coo.shape[0] != coo.shape[1]:
            raise InputError(
                f"an adjacency matrix must be square; got shape {coo.shape} "
                "(in Adjacency.from_sparse); pass an (n, n) matrix over in-mask elements"
            )
        return cls.from_edges(coo.shape[0], coo.row, coo.col)

    @property
    def n_edges(self) -> int:
        """Number of undirected edges."""
        return int(self.u.size)

    def csr(self) -> sparse.csr_matrix:
        """Symmetric CSR matrix (int8 ones, sorted indices) of the graph, built once and cached."""
        if "csr" not in self._cache:
            ones = np.ones(2 * self.u.size, dtype=np.int8)
            rows = np.concatenate([self.u, self.v])
            cols = np.concatenate([self.v, self.u])
            mat = sparse.csr_matrix((ones, (rows, cols)), shape=(self.n, self.n))
            mat.sort_indices()
            self._cache["csr"] = mat
        return self._cache["csr"]

    def degree(self) -> np.ndarray:
        """Number of neighbours of each element, shape (n,)."""
        return np.bincount(self.u, minlength=self.n) + np.bincount(self.v, minlength=self.n)

    def neighbour_table(self) -> np.ndarray:
        """Padded neighbour lists, built once and cached.

        Returns
        -------
        ndarray of intp, shape (n + 1, max_degree)
            Row i lists the neighbours of element i, padded with the sentinel ``n``; row ``n``
            (the sentinel's own row) is all sentinel.  Fixed-width rows let TFCE gather the
            neighbourhoods of many elements in one ``take`` (intp, because numpy converts other
            index types to intp on every gather).
        """
        if "table" not in self._cache:
            csr = self.csr()
            counts = np.diff(csr.indptr)
            width = max(int(counts.max()) if self.n else 0, 1)
            table = np.full((self.n + 1, width), self.n, dtype=np.intp)
            rows = np.repeat(np.arange(self.n), counts)
            cols = np.arange(csr.indices.size) - np.repeat(csr.indptr[:-1], counts)
            table[rows, cols] = csr.indices
            self._cache["table"] = table
        return self._cache["table"]

    def neighbours(self, elements: np.ndarray) -> np.ndarray:
        """Neighbours of the given elements, shape (len(elements), max_degree), padded with n."""
        grid = self._cache.get("grid")
        if grid is not None:
            return grid.neighbours(np.asarray(elements))
        return np.take(self.neighbour_table(), np.asarray(elements), axis=0)

    def neighbour_chain(self) -> np.ndarray:
        """Which neighbour-table entries are adjacent to the entry before them, built once and cached.

        Returns
        -------
        ndarray of bool, shape (n + 1, max_degree)
            ``chain[i, c]`` is True when ``table[i, c - 1]`` and ``table[i, c]`` are both
            neighbours of i and neighbours of each other.  TFCE uses it to skip neighbours that
            are certainly in the same component as the one before them.
        """
        if "chain" not in self._cache:
            table = self.neighbour_table()
            chain = np.zeros(table.shape, dtype=bool)
            if table.shape[1] > 1 and self.u.size:
                n1 = np.int64(self.n + 1)
                keys = np.sort(self.u.astype(np.int64) * n1 + self.v)
                a, b = table[:, :-1].astype(np.int64), table[:, 1:].astype(np.int64)
                probe = np.minimum(a, b) * n1 + np.maximum(a, b)
                pos = np.minimum(np.searchsorted(keys, probe), keys.size - 1)
                chain[:, 1:] = (keys[pos] == probe) & (a < self.n) & (b < self.n)
            self._cache["chain"] = chain
        return self._cache["chain"]


def _grid_offsets(connectivity: int) -> list[tuple[int, int, int]]:
    """Half of the neighbour offsets (the lexicographically positive ones) for a 3-D grid."""
    limit = {6: 1, 18: 2, 26: 3}.get(connectivity)
    if limit is None:
        raise InputError(
            f"grid connectivity must be 6, 18 or 26; got {connectivity!r} "
            "(in grid_adjacency); use 6 (faces), 18 (faces+edges) or 26 (faces+edges+corners)"
        )
    offsets = []
    for di in (-1, 0, 1):
        for dj in (-1, 0, 1):
            for dk in (-1, 0, 1):
                d = (di, dj, dk)
                if d > (0, 0, 0) and sum(abs(x) for x in d) <= limit:
                    offsets.append(d)
    return offsets


def grid_adjacency(mask: np.ndarray, connectivity: int = 26) -> Adjacency:
    """Neighbourhood graph of the True voxels of a 3-D boolean mask.

    Parameters
    ----------
    mask : ndarray of bool, shape (I, J, K)
        In-mask voxels; element ``i`` of the graph is the i-th True voxel in C order
        (``np.flatnonzero(mask)``).
    connectivity : {6, 18, 26}
        Voxels sharing a face (6), a face or an edge (18), or a face, edge or corner (26).  The
        default is 26, the neighbourhood usually used for TFCE and cluster extent on 3-D images.

    Returns
    -------
    Adjacency
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 3:
        raise InputError(
            f"a 3-D mask was expected; got {mask.ndim} dimensions (in grid_adjacency); "
            "pass the brain mask as an (I, J, K) boolean array"
        )
    _grid_offsets(connectivity)  # checks the connectivity
    adjacency = Adjacency(int(mask.sum()))
    adjacency._cache["grid"] = _GridLayout.build(mask, connectivity)
    return adjacency


@dataclass(frozen=True)
class _GridLayout:
    """Voxel neighbourhoods of a 3-D mask by index arithmetic on a padded grid (no table reads).

    Attributes
    ----------
    size : int
        Number of voxels of the grid padded by one voxel on every side.
    gindex : ndarray of intp, shape (n,)
        Flat padded-grid index of each element.
    offsets : ndarray of intp, shape (D,)
        Flat index offsets of the neighbours, ordered along a path on which consecutive offsets
        are neighbours of each other wherever possible.
    earlier : ndarray of uint32, shape (D,)
        Bit c' of ``earlier[c]`` is set when c' < c and the voxels at offsets c' and c are
        neighbours of each other.
    element : ndarray of intp, shape (size,)
        Element index of each padded-grid voxel; n outside the mask.
    """

    size: int
    gindex: np.ndarray
    offsets: np.ndarray
    earlier: np.ndarray
    element: np.ndarray

    @classmethod
    def build(cls, mask: np.ndarray, connectivity: int) -> _GridLayout:
        n = int(mask.sum())
        padded = np.zeros(tuple(s + 2 for s in mask.shape), dtype=bool)
        padded[1:-1, 1:-1, 1:-1] = mask
        strides = (padded.shape[1] * padded.shape[2], padded.shape[2], 1)
        path, earlier = _neighbourhood(connectivity)
        element = np.full(padded.size, n, dtype=np.intp)
        gindex = np.flatnonzero(padded).astype(np.intp)
        element[gindex] = np.arange(n)
        offsets = np.array([int(np.dot(d, strides)) for d in path], dtype=np.intp)
        return cls(int(padded.size), gindex, offsets, earlier.copy(), element)

    def edges(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Each edge once as (u, v) with u < v, sorted by u then v (int32): the neighbours through the
        positive offsets, taken in increasing offset order."""
        positive = np.sort(self.offsets[self.offsets > 0])
        nb = self.element[self.gindex[:, None] + positive[None, :]]
        inside = nb < n
        u = np.repeat(np.arange(n, dtype=np.int32), inside.sum(axis=1))
        return u, nb[inside].astype(np.int32)

    def neighbours(self, elements: np.ndarray) -> np.ndarray:
        """Element indices of the neighbours (n outside the mask), shape (len(elements), D)."""
        return self.element[self.gindex[elements][:, None] + self.offsets[None, :]]


@functools.cache
def _neighbourhood(connectivity: int) -> tuple[list[tuple[int, int, int]], np.ndarray]:
    """The offset path of a connectivity and, per offset, the bits of the earlier offsets adjacent to it."""
    path = _offset_path(connectivity)
    earlier = np.zeros(len(path), dtype=np.uint32)
    for c in range(len(path)):
        for c0 in range(c):
            if _offsets_adjacent(path[c0], path[c], connectivity):
                earlier[c] |= np.uint32(1 << c0)
    earlier.flags.writeable = False
    return path, earlier


def _offsets_adjacent(a: tuple[int, ...], b: tuple[int, ...], connectivity: int) -> bool:
    """Whether the voxels at offsets a and b of a centre voxel are neighbours of each other."""
    d = [x - y for x, y in zip(a, b, strict=True)]
    limit = {6: 1, 18: 2, 26: 3}[connectivity]
    return any(d) and max(abs(x) for x in d) <= 1 and sum(abs(x) for x in d) <= limit


def _offset_path(connectivity: int) -> list[tuple[int, int, int]]:
    """All neighbour offsets, ordered so that consecutive ones are neighbours where possible.

    A depth-first search for a Hamiltonian path (Warnsdorff's rule) through the neighbourhood; it
    exists for 18 and 26 neighbours.  With 6 neighbours no two offsets are neighbours and the
    order does not matter.
    """
    half = _grid_offsets(connectivity)
    offsets = sorted(half + [tuple(-x for x in d) for d in half])
    if connectivity == 6:
        return offsets

    def onward(o: tuple, used: set) -> int:
        return sum(1 for p in offsets if p not in used and p != o and _offsets_adjacent(o, p, connectivity))

    def extend(path: list, used: set) -> bool:
        if len(path) == len(offsets):
            return True
        cands = [o for o in offsets if o not in used and _offsets_adjacent(path[-1], o, connectivity)]
        cands.sort(key=lambda o: onward(o, used))
        for o in cands:
            used.add(o)
            path.append(o)
            if extend(path, used):
                return True
            path.pop()
            used.discard(o)
        return False

    for start in offsets:
        path, used = [start], {start}
        if extend(path, used):
            return path
    return offsets  # not reached for 18 or 26


def mesh_adjacency(
    faces: np.ndarray, n_vertices: int | None = None, mask: np.ndarray | None = None
) -> Adjacency:
    """Neighbourhood graph of a triangle mesh: vertices are neighbours when they share an edge.

    Parameters
    ----------
    faces : ndarray of int, shape (n_faces, 3)
        Vertex indices of each triangle.
    n_vertices : int, optional
        Number of vertices (default: ``faces.max() + 1``).
    mask : ndarray of bool, shape (n_vertices,), optional
        In-mask vertices; the graph is then over ``np.flatnonzero(mask)`` (renumbered from 0) and
        edges leaving the mask are dropped.

    Returns
    -------
    Adjacency
    """
    faces = np.asarray(faces)
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise InputError(
            f"faces must have shape (n_faces, 3); got {faces.shape} (in mesh_adjacency); "
            "pass the triangle array of the surface"
        )
    faces = faces.astype(np.int64)
    nv = int(faces.max()) + 1 if n_vertices is None else int(n_vertices)
    u = np.concatenate([faces[:, 0], faces[:, 1], faces[:, 2]])
    v = np.concatenate([faces[:, 1], faces[:, 2], faces[:, 0]])
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != (nv,):
            raise InputError(
                f"the vertex mask must have shape ({nv},); got {mask.shape} (in mesh_adjacency); "
                "pass one boolean per mesh vertex"
            )
        newid = np.full(nv, -1, dtype=np.int64)
        newid[mask] = np.arange(int(mask.sum()))
        u, v = newid[u], newid[v]
        keep = (u >= 0) & (v >= 0)
        return Adjacency.from_edges(int(mask.sum()), u[keep], v[keep])
    return Adjacency.from_edges(nv, u, v)
