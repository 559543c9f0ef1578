"""The loaded data: the in-mask values of every image, and how to read them back in column blocks."""

from __future__ import annotations

import shutil
import weakref
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .grid import Grid
from .spill import _SPILL_NAME, SpillReader


@dataclass(frozen=True, eq=False)
class Exclusions:
    """Voxels left out of the analysis mask, and why (see :class:`MaskedData` for each field)."""

    n_nonfinite_excluded: int
    n_nonfinite_everywhere: int
    n_zero_excluded: int
    nonfinite_per_image: np.ndarray


class MaskedData:
    """The in-mask values of every image: an ``(n_obs, n_in_mask)`` float32 matrix in observation order.

    Attributes
    ----------
    grid : Grid
    mask : ndarray of bool, shape grid.shape
        The analysis mask; columns of ``data`` follow ``np.flatnonzero(mask)``.
    n_in_mask : int
    n_nonfinite_excluded : int
        Voxels left out because they are NaN/inf in some images but finite in others.
    n_nonfinite_everywhere : int
        Voxels NaN/inf in every image (background of NaN-padded images); left out.
    n_zero_excluded : int
        Voxels finite and zero in every image; left out (no information, and no variance).
    nonfinite_per_image : ndarray of int, shape (n_obs,)
        NaN/inf voxels of each image among the candidate voxels (the user mask, or the whole grid).
    labels : list of str
        Observation labels.
    warnings : list of str
        Things worth telling the user (e.g. an image that is zero everywhere).
    data : ndarray or numpy.memmap of float32 (float64 for float64 images), shape (n_obs, n_in_mask)
    spilled : bool
        True when ``data`` lives in a memmap on disk.
    """

    def __init__(
        self,
        grid: Grid,
        mask: np.ndarray,
        data: np.ndarray,
        labels: list[str],
        *,
        exclusions: Exclusions,
        warnings: list[str],
        spill_dir: Path | None,
    ) -> None:
        self.grid = grid
        self.mask = mask
        self.data = data
        self.labels = labels
        self.n_in_mask = int(data.shape[1])
        self.n_nonfinite_excluded = exclusions.n_nonfinite_excluded
        self.n_nonfinite_everywhere = exclusions.n_nonfinite_everywhere
        self.n_zero_excluded = exclusions.n_zero_excluded
        self.nonfinite_per_image = exclusions.nonfinite_per_image
        self.warnings = warnings
        self.spill_dir = spill_dir
        self._finalizer = (
            weakref.finalize(self, shutil.rmtree, str(spill_dir), True) if spill_dir is not None else None
        )

    @property
    def spilled(self) -> bool:
        return self.spill_dir is not None

    @property
    def n_obs(self) -> int:
        return int(self.data.shape[0])

    def chunks(self, n_voxels: int) -> Iterator[tuple[slice, np.ndarray]]:
        """Blocks of mask columns as float64 copies.

        Parameters
        ----------
        n_voxels : int
            Columns per block (the last block may be smaller).

        Yields
        ------
        cols : slice
            Which columns of ``data`` (positions in mask order).
        block : ndarray of float64, shape (n_obs, cols.stop - cols.start)
            A fresh C-contiguous copy; callers may modify it.
        """
        if n_voxels < 1:
            raise ValueError("n_voxels must be >= 1")
        if self.spill_dir is not None:
            yield from self._spilled_chunks(n_voxels)
            return
        for start in range(0, self.n_in_mask, n_voxels):
            cols = slice(start, min(start + n_voxels, self.n_in_mask))
            yield cols, np.array(self.data[:, cols], dtype=np.float64, order="C")

    def columns(self) -> np.ndarray | SpillReader:
        """The data matrix for readers of column blocks (``x[:, a:b]``): the array itself, or for a spilled
        matrix a reader that uses plain file reads (see :meth:`_spilled_chunks`)."""
        if self.spill_dir is None:
            return self.data
        return SpillReader(self.spill_dir / _SPILL_NAME, self.data.dtype, self.data.shape)

    def _spilled_chunks(self, n_voxels: int) -> Iterator[tuple[slice, np.ndarray]]:
        # Plain reads, not the memory map: reading a short run of every row through a map makes the kernel
        # map most of the file (counted in RSS); reads go through the page cache, which is not ours.
        reader = self.columns()
        assert isinstance(reader, SpillReader)
        total = self.data.shape[1]
        for start in range(0, total, n_voxels):
            cols = slice(start, min(start + n_voxels, total))
            yield cols, reader[:, cols].astype(np.float64)

    def voxel_coords(self) -> np.ndarray:
        """Grid indices of the mask columns, shape (n_in_mask, len(grid.shape)), int64."""
        return np.argwhere(self.mask)

    def close(self) -> None:
        """Remove any spill file (the data become unavailable)."""
        if self.spill_dir is not None:
            self.data = np.empty((self.n_obs, 0), np.float32)
            assert self._finalizer is not None
            self._finalizer()
            self.spill_dir = None

    def __enter__(self) -> MaskedData:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
