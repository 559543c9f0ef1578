"""The analysis mask without the data matrix: the images scanned for finite and nonzero values only.

:func:`groupmodel.images.loading.load_masked` reads every image into the ``(n_obs, n_in_mask)`` matrix while it
finds the mask.  A fit on a Dask cluster needs only the mask on the machine that runs it: its workers read the
columns of their chunks from the files themselves (:class:`~groupmodel.images.columns.ColumnReader`).
:func:`scan_part` scans a contiguous group of the images (a pure function of picklable inputs: it may run on a
worker) and :func:`masked_columns` combines the groups into the mask, exclusions and warnings ``load_masked``
finds for the same images (the same rule, the same storage dtype, warnings in image order), with the columns
read from the files when asked for.  Nothing is written to disk and no image is held in memory.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .columns import ColumnReader
from .headers import check_images
from .loading import _candidate_values, _Candidates, _candidates, _require_voxels, _Tally, layout_of, storage_dtype
from .mask import load_mask
from .masked import Exclusions, MaskedData
from .reading import _iter_arrays
from .sources import ImageSource

__all__ = ["ScanPart", "masked_columns", "scan_groups", "scan_part"]


@dataclass(frozen=True, eq=False)
class ScanPart:
    """What one group of images says about the candidate voxels (the user mask's, or the whole grid).

    Attributes
    ----------
    index : int
        The group's place among the groups (its warnings come in that order).
    positions : tuple of int
        The observations of the group (positions in the source).
    finite_all, finite_any, nonzero_any : ndarray of bool, shape (n_candidates,)
        Finite in every image of the group, in some, nonzero (and finite) in some.
    nonfinite : ndarray of int64, shape (len(positions),)
        NaN/inf candidates of each observation's image.
    warnings : tuple of str
        Images that are zero everywhere, in the group's order.
    """

    index: int
    positions: tuple[int, ...]
    finite_all: np.ndarray
    finite_any: np.ndarray
    nonzero_any: np.ndarray
    nonfinite: np.ndarray
    warnings: tuple[str, ...]


def scan_groups(source: ImageSource, groups: int) -> list[tuple[int, ...]]:
    """The observations cut into at most ``groups`` contiguous groups (one for a 4-D file, read once)."""
    n = len(source)
    if source.mode == "4d" or groups <= 1 or n <= 1:
        return [tuple(range(n))]
    size = -(-n // min(groups, n))
    return [tuple(range(s, min(n, s + size))) for s in range(0, n, size)]


def scan_part(source: ImageSource, index: int, positions: Sequence[int], cand: _Candidates,
              threads: int | None = None) -> ScanPart:
    """Scan the images of ``positions`` (a checked source; :class:`ScanPart`); ``threads`` decompress at once
    (default: as many as the reader finds useful).

    Raises
    ------
    ImageError
        An unreadable image, or one with no finite value.
    """
    sub = source.select(list(positions))
    assert sub.grid is not None
    dtype = np.dtype(storage_dtype(sub.grid))
    tally = _Tally(len(sub), cand.n)
    for seq, (rows, arr) in enumerate(_iter_arrays(sub, threads=threads)):
        row = _candidate_values(arr, cand, dtype)
        del arr
        tally.add(row, seq, rows, sub.refs[rows[0]], source.origin, cand.user_mask is not None)
    return ScanPart(index, tuple(positions), tally.finite_all, tally.finite_any, tally.nonzero_any,
                    tally.nonfinite_per_image, tuple(tally.warnings))


#: How the groups are scanned: given the groups and the candidates, the parts in any order (here by default).
ScanRunner = Callable[[list[tuple[int, ...]], _Candidates], Iterable[ScanPart]]


def masked_columns(
    source: ImageSource,
    mask: str | None,
    mask_label: str = "mask",
    run: ScanRunner | None = None,
    groups: int = 1,
) -> MaskedData:
    """The analysis mask of the images and a :class:`MaskedData` whose ``data`` reads its columns from the files
    (a :class:`~groupmodel.images.columns.ColumnReader`: ``data[:, a:b]``), with the exclusions and warnings of
    :func:`~groupmodel.images.loading.load_masked` for the same images and mask.

    Parameters
    ----------
    source : ImageSource
    mask : path or None
        User mask on the images' grid, or None for the default (finite in every image, not zero in all).
    mask_label : str
        How messages name the mask.
    run : callable, optional
        Scans the groups (e.g. on a cluster's workers), returning their :class:`ScanPart` in any order; default
        :func:`scan_part` on each group here.
    groups : int
        Groups of images to scan (contiguous; one for a 4-D file).
    """
    if not source.checked:
        source, _ = check_images(source)
    grid = source.grid
    assert grid is not None
    cand = _candidates(grid, load_mask(mask, grid, mask_label) if mask is not None else None)
    cut = scan_groups(source, groups)
    parts = run(cut, cand) if run is not None else (scan_part(source, i, g, cand) for i, g in enumerate(cut))
    finite_all = np.ones(cand.n, dtype=bool)
    finite_any = np.zeros(cand.n, dtype=bool)
    nonzero_any = np.zeros(cand.n, dtype=bool)
    nonfinite = np.zeros(len(source), dtype=np.int64)
    warnings: dict[int, tuple[str, ...]] = {}
    for part in parts:  # as they come: and, or and placing are the same in any order
        finite_all &= part.finite_all
        finite_any |= part.finite_any
        nonzero_any |= part.nonzero_any
        nonfinite[list(part.positions)] = part.nonfinite
        warnings[part.index] = part.warnings
    exclusions = Exclusions(
        n_nonfinite_excluded=int(np.count_nonzero(~finite_all & finite_any)),
        n_nonfinite_everywhere=int(np.count_nonzero(~finite_any)),
        n_zero_excluded=int(np.count_nonzero(finite_all & ~nonzero_any)),
        nonfinite_per_image=nonfinite,
    )
    full_mask, _ = layout_of(finite_all & nonzero_any, cand)
    _require_voxels(full_mask, exclusions, mask, source.origin)
    reader = ColumnReader(source, np.flatnonzero(full_mask).astype(np.int64), np.dtype(storage_dtype(grid)).name)
    return MaskedData(grid, full_mask, reader, source.labels, exclusions=exclusions,  # type: ignore[arg-type]
                      warnings=[w for i in sorted(warnings) for w in warnings[i]], spill_dir=None)
