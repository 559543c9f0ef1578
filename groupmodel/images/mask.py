"""The user's analysis mask: read on the images' grid, nonzero (and finite) = in."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import ImageError
from .grid import _KIND_NAME, AFFINE_TOLERANCE_MM, Grid, _fmt_affine, _fmt_shape
from .headers import _Info, _read_info
from .reading import _read_array
from .sources import ImageRef


def load_mask(path: Path | str, grid: Grid, label: str = "mask") -> np.ndarray:
    """Read a user mask on ``grid``: nonzero (and finite) = in.

    Parameters
    ----------
    path : Path
        NIfTI (for volume images) or GIFTI (for surface images) file.
    grid : Grid
        The images' grid.
    label : str
        How messages name the mask (the option or spec key it came from).

    Returns
    -------
    ndarray of bool, shape grid.shape

    Raises
    ------
    ImageError
        Missing or unreadable file, another grid, or no voxel in the mask.
    """
    path = Path(path)
    who = f"{label} {path.name}"
    if not path.is_file():
        raise ImageError(f"{label}: expected a mask image; found no file {path}; fix the path")
    ref = ImageRef(0, label, path)
    info = _read_info(path, who, label)
    if info.n_volumes != 1:
        raise ImageError(f"{who}: expected one volume; found {info.n_volumes}: {path}; give a 3-D mask")
    _check_mask_grid(info, grid, who, path)
    values = _read_array(ref, grid, label)
    inside = np.isfinite(values) & (values != 0)
    if not inside.any():
        raise ImageError(f"{who}: expected some nonzero voxels; found an empty mask: {path}; fix the mask")
    return inside


def _check_mask_grid(info: _Info, grid: Grid, who: str, path: Path) -> None:
    """ImageError when the mask's kind, shape or affine is not the images' grid."""
    if info.kind != grid.kind or info.shape != grid.shape or (
        info.affine is not None
        and grid.affine is not None
        and not float(np.max(np.abs(info.affine - grid.affine))) <= AFFINE_TOLERANCE_MM
    ):
        found = f"{_KIND_NAME[info.kind]} {_fmt_shape(info.shape)}"
        expected = f"{_KIND_NAME[grid.kind]} {_fmt_shape(grid.shape)}"
        if info.affine is not None:
            found += f" affine {_fmt_affine(info.affine)}"
        if grid.affine is not None:
            expected += f" affine {_fmt_affine(grid.affine)}"
        raise ImageError(
            f"{who}: expected the images' grid ({expected}); found {found}: {path}; "
            "resample the mask to the images' grid"
        )
