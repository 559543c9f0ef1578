"""Reading every image once into the ``(n_obs, n_in_mask)`` data matrix, within a memory budget.

:func:`load_masked` reads each image's candidate voxels (the user mask, or the whole grid) still in play into
one flat buffer -- in RAM, or in a spill file (:mod:`.spill`) when the budget is short -- while running finite
and nonzero masks are kept; the packed rows are then compacted in place to the analysis mask (:mod:`.packed`).
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import ImageError
from .grid import Grid
from .headers import check_images
from .mask import load_mask
from .masked import Exclusions, MaskedData
from .packed import NEVER, plan_rows
from .reading import _iter_arrays
from .sources import ImageRef, ImageSource, _who
from .spill import _compact, _new_spill, release_pages

#: Bytes of fixed overhead of :func:`load_masked` beyond the per-image part (interpreter, nibabel, zlib).
LOAD_OVERHEAD_FIXED = 16 * 2**20

#: :func:`load_masked` needs at most this many float64 single images of working memory beyond the budget.
LOAD_OVERHEAD_IMAGES = 6


def load_overhead_bytes(grid: Grid) -> int:
    """Working memory :func:`load_masked` may use beyond ``memory_bytes``.

    ``LOAD_OVERHEAD_IMAGES`` float64 single images (the image in use and the two being read in threads, each
    with nibabel's raw and scaled copies, the running finite/nonzero masks, the first-nonzero/first-NaN
    records of :mod:`.packed` and the index arrays of the compaction) plus ``LOAD_OVERHEAD_FIXED``.
    """
    return LOAD_OVERHEAD_IMAGES * 8 * grid.n_voxels + LOAD_OVERHEAD_FIXED


def storage_dtype(grid: Grid) -> type:
    """float64 for images stored as float64 (unscaled), float32 otherwise."""
    header = getattr(grid, "header", None)
    if header is not None:
        slope, inter = header.get_slope_inter()
        if header.get_data_dtype() == np.float64 and slope in (None, 1.0) and inter in (None, 0.0):
            return np.float64
    return np.float32


def chunk_size_for(n_obs: int, n_tests: int, memory_bytes: int) -> int:
    """Voxels per chunk so that one chunk's work fits in ``memory_bytes``.

    Assumes the engine holds, per voxel, about four float64 columns of the data's length (the chunk, a
    centred copy, fitted values, residuals), eight float64 values per test (effect, standard error,
    statistic, p, log p, z, and spares) and 32 more for coefficients and sums of squares.

    Parameters
    ----------
    n_obs : int
        Rows of the design.
    n_tests : int
        Number of hypotheses (each F test counted once).
    memory_bytes : int
        Budget for one chunk's work.

    Returns
    -------
    int
        At least 1.
    """
    per_voxel = 8 * (4 * max(int(n_obs), 1) + 8 * max(int(n_tests), 0) + 32)
    return max(1, int(memory_bytes) // per_voxel)


def load_masked(
    source: ImageSource,
    mask: Path | str | None,
    memory_bytes: int,
    workdir: Path | str | None = None,
    progress: Callable[[int, int], None] | None = None,
    mask_label: str = "mask",
) -> MaskedData:
    """Read every image exactly once into an ``(n_obs, n_in_mask)`` float32 matrix.

    The mask is the user mask (nonzero = in) when given, else the whole grid; from it are left out the
    voxels that are NaN/inf in any image (counted, never filled with 0) and those that are zero in every
    image.  Without a user mask that is the usual default: finite in every image and not zero in all.

    Memory.  Every image's candidate voxels (the whole grid without a user mask) still in play -- finite in
    every image so far and nonzero in one (:mod:`.packed`) -- go in one pass into a buffer reserved for all
    candidates -- in RAM when ``n_obs * n_candidates * 4 <= memory_bytes``, else a memmap in a temporary
    folder under ``workdir`` -- while the finite/nonzero masks accumulate; only the part holding values is
    touched (a zero background never is).  The packed rows are then compacted to the mask in place.  A
    spilled buffer whose compacted matrix fits in ``memory_bytes`` is copied back
    into RAM and the spill removed.  Beyond ``memory_bytes`` the work needs at most
    :func:`load_overhead_bytes` (six float64 single images plus 16 MiB), for any ``n_obs``.

    Parameters
    ----------
    source : ImageSource
        Checked by :func:`check_images` (checked here if not).
    mask : Path or None
        User mask on the images' grid, or None for the default.
    memory_bytes : int
        Budget for the data matrix (bytes).
    workdir : Path, optional
        Where a spill folder may be made (default: the system temporary folder).
    progress : callable(done, total), optional
        Called after each image is read.
    mask_label : str
        How messages name the mask (e.g. ``--mask`` or ``model.json "mask"``).

    Returns
    -------
    MaskedData
        Close it (or use it as a context manager) to remove any spill.

    Raises
    ------
    ImageError
        An unreadable image, an image with no finite value, a mask on another grid, an empty mask.
    InputError
        The spill cannot be created (disk full, folder not writable).
    """
    if not source.checked:
        source, _ = check_images(source)
    grid = source.grid
    assert grid is not None
    n = len(source)
    if n == 0:
        raise ValueError("load_masked needs at least one image")

    cand = _candidates(grid, load_mask(mask, grid, mask_label) if mask is not None else None)
    n_cand = cand.n
    # float32 holds float32 and 16-bit integer images exactly; float64 images keep float64, so
    # that data stored with more digits (e.g. NIST StRD values) reach the engine unrounded.
    spill_dir, buf = _allocate(n * n_cand, storage_dtype(grid), memory_bytes, workdir)
    try:
        tally, record = _read_all(source, buf, cand, spill_dir is not None, progress)
        exclusions = tally.exclusions()
        warnings = tally.warnings
        first_nonzero, first_nonfinite = tally.first_nonzero, tally.first_nonfinite
        full_mask, gather = _layout(tally, cand)  # frees the running masks as soon as it can
        del tally, cand
        _require_voxels(full_mask, exclusions, mask, source.origin)
        plan = plan_rows(record.offsets, record.lengths, record.row_of, first_nonzero, first_nonfinite, gather)
        del first_nonzero, first_nonfinite, gather
        data, spill_dir = _compact(buf, plan, memory_bytes, spill_dir)
        del buf
    except BaseException:
        if spill_dir is not None:
            shutil.rmtree(spill_dir, ignore_errors=True)
        raise

    return MaskedData(grid, full_mask, data, source.labels, exclusions=exclusions, warnings=warnings,
                      spill_dir=spill_dir)


@dataclass(frozen=True, eq=False)
class _Candidates:
    """The voxels read from every image: the whole grid, or the user mask's voxels.

    ``cand_f`` holds the Fortran-order positions of the user mask's voxels (in C order of the mask), or is
    None for the whole grid, whose voxels are then kept in Fortran order until compaction.
    """

    grid: Grid
    user_mask: np.ndarray | None
    cand_f: np.ndarray | None
    n: int


def _candidates(grid: Grid, user_mask: np.ndarray | None) -> _Candidates:
    n_grid = grid.n_voxels
    shape = grid.shape
    # nibabel hands NIfTI data over in Fortran order.  A C-order copy of a volume is a transposition,
    # about 40 times slower than a straight copy (9 ms against 0.2 ms for 91x109x91), so each image's row
    # is filled in Fortran order and put into C order by the one gather that compaction does anyway.
    # f_index[i, j, k] is the Fortran-order position of voxel (i, j, k).
    f_index = np.arange(n_grid, dtype=np.int64).reshape(shape[::-1]).T
    # candidate voxels: the whole grid (Fortran order), or the user mask's voxels (C order)
    cand_f = None if user_mask is None else f_index[user_mask]
    del f_index
    n_cand = n_grid if cand_f is None else int(cand_f.size)
    return _Candidates(grid, user_mask, cand_f, n_cand)


def _allocate(
    n_values: int, dtype: type, memory_bytes: int, workdir: Path | str | None
) -> tuple[Path | None, np.ndarray]:
    """The flat buffer for every image's candidates: in RAM within the budget, else a spill memmap."""
    if n_values * np.dtype(dtype).itemsize <= memory_bytes:
        return None, np.empty(n_values, dtype=dtype)
    return _new_spill(workdir, n_values, dtype)


class _Tally:
    """The running finite/nonzero masks over the candidates of the images read so far, and what to report.

    Also records, for every candidate, the stored row where it first became nonzero and where it first became
    NaN/inf (:mod:`.packed`): together they say which candidates each packed row holds.
    """

    def __init__(self, n: int, n_cand: int) -> None:
        self.n_cand = n_cand
        self.finite_all = np.ones(n_cand, dtype=bool)
        self.finite_any = np.zeros(n_cand, dtype=bool)
        self.nonzero_any = np.zeros(n_cand, dtype=bool)
        self.finite = np.empty(n_cand, dtype=bool)  # scratch, one image
        self.nonzero = np.empty(n_cand, dtype=bool)  # scratch, one image
        self.in_play = np.zeros(n_cand, dtype=bool)  # finite in every image so far and nonzero in one
        self.first_nonzero = np.full(n_cand, NEVER, dtype=np.int32)
        self.first_nonfinite = np.full(n_cand, NEVER, dtype=np.int32)
        self.nonfinite_per_image = np.zeros(n, dtype=np.int64)
        self.warnings: list[str] = []

    def add(self, row: np.ndarray, seq: int, rows: list[int], ref: ImageRef, origin: str, in_mask: bool) -> None:
        """Count one image's candidate values ``row`` (stored row ``seq``, used by the observations ``rows``)."""
        finite, nonzero = self.finite, self.nonzero
        np.isfinite(row, out=finite)
        n_finite = int(np.count_nonzero(finite))
        if n_finite == 0:
            where = " inside the mask" if in_mask else ""
            raise ImageError(
                f"{_who(ref)}: expected finite values; found NaN/inf everywhere{where}: {ref.path} "
                f"(from {origin}); re-create the image or leave the participant out"
            )
        self.nonfinite_per_image[rows] = self.n_cand - n_finite
        # scratch use of in_play: the candidates that turn NaN/inf here for the first time
        np.greater(self.finite_all, finite, out=self.in_play)
        if self.in_play.any():
            self.first_nonfinite[self.in_play] = seq
        self.finite_all &= finite
        self.finite_any |= finite
        np.not_equal(row, 0, out=nonzero)
        nonzero &= finite
        if not nonzero.any():
            inside = " inside the mask" if in_mask else ""
            self.warnings.append(f"{_who(ref)} is zero everywhere{inside}: {ref.path}")
        np.greater(nonzero, self.nonzero_any, out=self.in_play)  # nonzero here for the first time
        if self.in_play.any():
            self.first_nonzero[self.in_play] = seq
        self.nonzero_any |= nonzero
        np.logical_and(self.finite_all, self.nonzero_any, out=self.in_play)

    def take_keep(self) -> np.ndarray:
        """Candidates finite in every image and nonzero in some.  Call last: the running masks are dropped
        here (freed), so that the layout of the mask is built without them."""
        keep = self.finite_all & self.nonzero_any
        del self.finite_all, self.finite_any, self.nonzero_any, self.finite, self.nonzero, self.in_play
        return keep

    def exclusions(self) -> Exclusions:
        return Exclusions(
            n_nonfinite_excluded=int(np.count_nonzero(~self.finite_all & self.finite_any)),
            n_nonfinite_everywhere=int(np.count_nonzero(~self.finite_any)),
            n_zero_excluded=int(np.count_nonzero(self.finite_all & ~self.nonzero_any)),
            nonfinite_per_image=self.nonfinite_per_image,
        )


@dataclass
class _Record:
    """Where the packed rows went: offsets and lengths in the flat buffer, and each one's observation."""

    offsets: list[int]
    lengths: list[int]
    row_of: list[int]


def _read_all(
    source: ImageSource,
    buf: np.ndarray,
    cand: _Candidates,
    spilled: bool,
    progress: Callable[[int, int], None] | None,
) -> tuple[_Tally, _Record]:
    """Read every image once, packing its candidates in play into ``buf`` (:mod:`.packed`), tallying finite
    and nonzero values."""
    n = len(source)
    tally = _Tally(n, cand.n)
    record = _Record([], [], [])
    offset = 0
    done = 0
    for rows, arr in _iter_arrays(source):
        first = rows[0]
        row = _candidate_values(arr, cand, buf.dtype)
        del arr
        tally.add(row, len(record.offsets), rows, source.refs[first], source.origin, cand.user_mask is not None)
        packed = row[tally.in_play]
        del row
        length = int(packed.size)
        for r in rows:  # a 4-D volume used by several rows is stored once per row
            buf[offset : offset + length] = packed
            record.offsets.append(offset)
            record.lengths.append(length)
            record.row_of.append(r)
            offset += length
        del packed
        if spilled:
            release_pages(buf)
        done += len(rows)
        if progress is not None:
            progress(done, n)
    return tally, record


def _candidate_values(arr: np.ndarray, cand: _Candidates, dtype: np.dtype) -> np.ndarray:
    """One image's candidate values in storage ``dtype`` (Fortran order for the whole grid)."""
    flat = arr.reshape(-1, order="F")
    if cand.cand_f is not None:
        flat = flat[cand.cand_f]
    # overflow to inf (float64 beyond float32 range) is wanted: such voxels are then left out
    with np.errstate(over="ignore", invalid="ignore"):
        return flat.astype(dtype, copy=False)


def _require_voxels(full_mask: np.ndarray, exclusions: Exclusions, mask: Path | str | None, origin: str) -> None:
    """ImageError when no candidate is finite in every image and nonzero in some (the mask is empty)."""
    if not full_mask.any():
        n_nonfinite = exclusions.n_nonfinite_excluded + exclusions.n_nonfinite_everywhere
        raise ImageError(
            f"expected some voxels finite in every image and nonzero in some; found none "
            f"({n_nonfinite} NaN/inf somewhere, {exclusions.n_zero_excluded} "
            f"zero in every image; {'mask ' + str(mask) if mask is not None else 'no mask given'}) "
            f"(from {origin}); check the images and the mask"
        )


def _layout(tally: _Tally, cand: _Candidates) -> tuple[np.ndarray, np.ndarray]:
    """The analysis mask on the grid, and the candidate positions of its voxels in the mask's C order.

    The kept candidates are taken out of ``tally`` here, and freed as soon as they are used: this is the
    peak of the work after the reading (index arrays of the whole grid).
    """
    return layout_of(tally.take_keep(), cand)


def layout_of(keep: np.ndarray, cand: _Candidates) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_layout` for the kept candidates ``keep`` (finite in every image and nonzero in some)."""
    shape = cand.grid.shape
    n_grid = cand.grid.n_voxels
    if cand.cand_f is None:
        # keep is in Fortran order; the columns go in C order of the mask
        full_mask = np.ascontiguousarray(keep.reshape(shape[::-1]).T)
        del keep
        gather = np.arange(n_grid, dtype=np.int64).reshape(shape[::-1]).T[full_mask]
    else:
        full_mask = np.zeros(n_grid, dtype=bool)
        full_mask[np.flatnonzero(cand.user_mask)[keep]] = True
        full_mask = full_mask.reshape(shape)
        gather = np.flatnonzero(keep)
        del keep
    return full_mask, gather
