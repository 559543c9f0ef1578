"""Columns of the masked data matrix read straight from the image files, by whoever needs them.

On a cluster each worker reads the columns of its own chunk from the shared file system
(:class:`ColumnReader`), so that the data matrix never travels.  The values are those :func:`load_masked`
puts in the matrix (the same reading, the same storage dtype), so a fit is the same wherever it reads.
"""

from __future__ import annotations

import os
import uuid
from dataclasses import dataclass, field

import numpy as np

from .masked import MaskedData
from .reading import _iter_arrays
from .sources import ImageSource

__all__ = ["ColumnReader", "first_unreadable", "image_paths"]


@dataclass(frozen=True, eq=False)
class ColumnReader:
    """Reads columns ``s:e`` of the ``(n_obs, n_in_mask)`` matrix from the images (pickles; holds no data).

    Attributes
    ----------
    source : ImageSource
        Checked, in observation order.
    index : ndarray of int64, shape (n_in_mask,)
        Position of each mask column in the C-order flattened grid (``np.flatnonzero(mask)``).
    dtype : str
        Storage dtype of the matrix (``float32``, or ``float64`` for float64 images).
    token : str
        Names this reader's data in the workers' caches.
    """

    source: ImageSource
    index: np.ndarray
    dtype: str
    token: str = field(default_factory=lambda: uuid.uuid4().hex)

    @classmethod
    def of(cls, source: ImageSource, data: MaskedData) -> ColumnReader:
        """The reader of the matrix ``data`` that :func:`load_masked` made from ``source``."""
        return cls(source, np.flatnonzero(data.mask).astype(np.int64), str(data.data.dtype))

    @property
    def n_obs(self) -> int:
        return len(self.source)

    @property
    def n_columns(self) -> int:
        return int(self.index.size)

    @property
    def shape(self) -> tuple[int, int]:
        """(n_obs, n_in_mask), the shape of the matrix read."""
        return self.n_obs, self.n_columns

    @property
    def paths(self) -> list[str]:
        """Every image file, once each, in observation order."""
        return image_paths(self.source)

    def __getitem__(self, key: tuple[slice, slice]) -> np.ndarray:
        """``reader[:, a:b]``: columns ``a:b`` of every row, read as :meth:`read` does (so that the reader may stand
        where the matrix would; only whole rows and contiguous columns)."""
        rows, cols = key
        if rows != slice(None) or not isinstance(cols, slice) or cols.step not in (None, 1):
            raise TypeError(f"a ColumnReader reads blocks of columns [:, a:b]; got {key!r}")
        s, e, _ = cols.indices(self.n_columns)
        return self.read(s, max(s, e))

    def read(self, s: int, e: int) -> np.ndarray:
        """Columns ``s:e``, shape (n_obs, e - s), in the storage dtype; every image read once (one at a time)."""
        where = self.index[s:e]
        out = np.empty((self.n_obs, where.size), dtype=self.dtype)
        for rows, arr in _iter_arrays(self.source, threads=1):
            with np.errstate(over="ignore", invalid="ignore"):  # as load_masked: float64 beyond float32 is inf
                out[rows] = arr.reshape(-1)[where].astype(self.dtype, copy=False)
        return out


def image_paths(source: ImageSource) -> list[str]:
    """Every image file of ``source``, once each, in observation order."""
    return list(dict.fromkeys(str(r.path) for r in source.refs if r.path is not None))


def first_unreadable(paths: list[str]) -> str | None:
    """The first of ``paths`` that is not a readable file here (None when all are)."""
    for path in paths:
        if not (os.path.isfile(path) and os.access(path, os.R_OK)):
            return path
    return None
