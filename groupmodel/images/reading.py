"""Reading image data: all values of one image, and every image of a source exactly once."""

from __future__ import annotations

from collections.abc import Iterator

import nibabel as nib
import numpy as np

from ..errors import ImageError
from .fastread import is_fast_path, ordered_map, read_nifti_gz, read_threads
from .grid import Grid, _exc_text, _fmt_shape
from .sources import ImageRef, ImageSource, _who

_GIFTI_PARSE_BUFFER = 2**20


def _read_array(ref: ImageRef, grid: Grid, origin: str, use_isal: bool | None = None) -> np.ndarray:
    """All values of one 3-D NIfTI or GIFTI image (one read), shape ``grid.shape``, native dtype.

    A ``.nii.gz`` file is read whole and decompressed in one call (:mod:`.fastread`; ``use_isal`` None means
    isal where installed); the values are those of nibabel's own reading.
    """
    assert ref.path is not None
    try:
        if grid.kind != "gifti" and is_fast_path(ref.path):
            arr = read_nifti_gz(ref.path, use_isal)
        elif grid.kind == "gifti":
            # nibabel's default 35 MB XML parser buffer would dominate the working memory
            img = nib.load(ref.path, buffer_size=_GIFTI_PARSE_BUFFER)
            arr = np.asarray(img.darrays[0].data)
        else:
            img = nib.load(ref.path)
            arr = np.asanyarray(img.dataobj)
    except Exception as exc:
        raise ImageError(
            f"{_who(ref)}: expected readable image data; found {_exc_text(exc)}: {ref.path} (from {origin}); "
            "replace the file"
        ) from exc
    arr = arr.reshape(arr.shape[: len(grid.shape)]) if arr.ndim > len(grid.shape) else arr
    if arr.shape != grid.shape:
        raise ImageError(
            f"{_who(ref)}: expected {_fmt_shape(grid.shape)} values; found {_fmt_shape(arr.shape)}: "
            f"{ref.path}; the file changed after it was checked, run again"
        )
    return arr


def _iter_arrays(source: ImageSource, use_isal: bool | None = None,
                 threads: int | None = None) -> Iterator[tuple[list[int], np.ndarray]]:
    """Yield ``(rows, array)`` for every image, reading each file (or 4-D volume) exactly once.

    Single-image files are read by ``threads`` threads (default :func:`.fastread.read_threads`), in order.
    """
    grid = source.grid
    assert grid is not None
    if source.mode != "4d":
        refs = source.refs
        n_threads = read_threads(len(refs)) if threads is None else threads
        if grid.kind == "gifti":
            n_threads = 1  # the XML parser holds the GIL

        def one(i: int) -> np.ndarray:
            return _read_array(refs[i], grid, source.origin, use_isal)

        for i, arr in enumerate(ordered_map(one, range(len(refs)), n_threads)):
            yield [i], arr
        return
    path = source.refs[0].path
    assert path is not None
    rows_of: dict[int, list[int]] = {}
    for i, ref in enumerate(source.refs):
        assert ref.volume is not None
        rows_of.setdefault(ref.volume, []).append(i)
    # keep_file_open: slicing the volumes in increasing order then decompresses a .nii.gz once in total
    try:
        img = nib.load(path, keep_file_open=True)
    except Exception as exc:
        raise ImageError(
            f"4-D image {path.name}: expected a readable NIfTI file; found {_exc_text(exc)}: {path}; "
            "replace the file"
        ) from exc
    try:
        proxy = img.dataobj
        four_d = len(img.shape) > 3
        for vol in sorted(rows_of):
            ref = source.refs[rows_of[vol][0]]
            try:
                arr = np.asanyarray(proxy[..., vol] if four_d else proxy)
            except Exception as exc:
                raise ImageError(
                    f"{_who(ref)}: expected readable image data; found {_exc_text(exc)}: {path}; "
                    "replace the file"
                ) from exc
            yield rows_of[vol], arr.reshape(grid.shape)
    finally:
        del img
