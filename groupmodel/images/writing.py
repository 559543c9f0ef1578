"""Writing maps and masks back on the images' grid (NIfTI volumes, GIFTI surfaces)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from .fastread import gzip_bytes
from .grid import Grid, _is_gifti, _is_nifti


def unmask(values: np.ndarray, mask: np.ndarray, fill: float = 0.0, dtype: Any = np.float32) -> np.ndarray:
    """Values in mask order -> an array of the mask's shape, ``fill`` outside the mask.

    Parameters
    ----------
    values : ndarray, shape (n_in_mask,)
        In ``np.flatnonzero(mask)`` order.
    mask : ndarray of bool
    fill : float
    dtype : numpy dtype of the result
    """
    values = np.asarray(values)
    n_in = int(np.count_nonzero(mask))
    if values.shape != (n_in,):
        raise ValueError(f"expected {n_in} values (one per mask voxel), got shape {values.shape}")
    out = np.full(mask.shape, fill, dtype=dtype)
    out[mask] = values
    return out


def _check_suffix(path: Path, grid: Grid) -> None:
    ok = _is_gifti(path) if grid.kind == "gifti" else _is_nifti(path)
    if not ok:
        want = ".gii" if grid.kind == "gifti" else ".nii or .nii.gz"
        raise ValueError(f"a {grid.kind} map must be written to a {want} file, not {path.name}")


def _nifti_template(grid: Grid, dtype: Any) -> Any:
    """A fresh header for a map on ``grid``: the inputs' sform/qform and units, nothing else of theirs."""
    if grid.header is not None:
        hdr = grid.header.copy()
    else:
        hdr = nib.Nifti1Header()
        if grid.affine is not None:
            hdr.set_sform(grid.affine, code="aligned")
            hdr.set_qform(grid.affine, code="unknown")
    hdr.extensions.clear()  # input extensions describe the input, not this map
    hdr.set_data_dtype(dtype)
    hdr.set_slope_inter(None, None)
    for key in ("slice_code", "slice_start", "slice_end", "slice_duration", "toffset", "cal_min", "cal_max",
                "dim_info"):
        hdr[key] = 0
    hdr.set_intent("none", (), name="")
    hdr["descrip"] = b""
    hdr["aux_file"] = b""
    return hdr


def write_map(
    path: Path | str,
    values: np.ndarray,
    mask: np.ndarray,
    grid: Grid,
    *,
    fill: float = 0.0,
    intent: tuple[str, Sequence[float]] | None = None,
    description: str = "",
) -> Path:
    """Write one map on the images' grid as float32.

    Out-of-mask voxels are ``fill`` (0 by default: many viewers show NaN badly and 0 is never above a
    threshold; pass ``fill=np.nan`` where "not tested" must be distinguishable from 0).

    Parameters
    ----------
    path : Path
        ``.nii.gz`` (or ``.nii``) for volumes, ``.gii`` for surfaces.
    values : ndarray, shape (n_in_mask,) or grid.shape
        Mask-order values, or a full-grid array (its out-of-mask voxels are set to ``fill``).
    mask : ndarray of bool, shape grid.shape
    grid : Grid
    fill : float
        Value outside the mask.
    intent : (str, sequence of float), optional
        NIfTI intent name and parameters, e.g. ``("t test", (52,))``, ``("f test", (2, 52))``,
        ``("z score", ())``, ``("p value", ())``, ``("estimate", ())``.
    description : str
        Short text stored in the file (NIfTI ``descrip``, at most 79 characters; GIFTI array ``Name``).

    Returns
    -------
    Path
        The written file.  Volumes keep the inputs' sform and qform (and their codes), NIfTI-1 or
        NIfTI-2 like the first input; surfaces are one float32 data array.
    """
    path = Path(path)
    _check_suffix(path, grid)
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != grid.shape:
        raise ValueError(f"mask shape {mask.shape} is not the grid shape {grid.shape}")
    values = np.asarray(values)
    if values.ndim == 1 and values.size == np.count_nonzero(mask):
        data = unmask(values, mask, fill, np.float32)
    elif values.shape == grid.shape:
        data = np.where(mask, values, fill).astype(np.float32)
    else:
        raise ValueError(
            f"expected {np.count_nonzero(mask)} mask-order values or a {grid.shape} array, got {values.shape}"
        )
    _write(path, data, grid, intent, description)
    return path


def write_mask(path: Path | str, mask: np.ndarray, grid: Grid, description: str = "analysis mask") -> Path:
    """Write a 0/1 mask (uint8) on the images' grid; same file kinds and header rules as :func:`write_map`."""
    path = Path(path)
    _check_suffix(path, grid)
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != grid.shape:
        raise ValueError(f"mask shape {mask.shape} is not the grid shape {grid.shape}")
    _write(path, mask.astype(np.uint8), grid, None, description)
    return path


def _write(path: Path, data: np.ndarray, grid: Grid, intent: tuple[str, Sequence[float]] | None,
           description: str) -> None:
    if intent is not None and intent[0] not in nib.nifti1.intent_codes.code:
        raise ValueError(f"unknown NIfTI intent {intent[0]!r}")
    if grid.kind == "gifti":
        _write_gifti(path, data, grid, intent, description)
    else:
        _write_nifti(path, data, grid, intent, description)


def _write_gifti(path: Path, data: np.ndarray, grid: Grid, intent: tuple[str, Sequence[float]] | None,
                 description: str) -> None:
    codes = nib.nifti1.intent_codes
    darray_meta = {"Name": description} if description else {}
    if intent is not None and len(intent[1]):
        darray_meta["IntentParameters"] = " ".join(f"{p:g}" for p in intent[1])
    da = nib.gifti.GiftiDataArray(
        data,
        intent=codes.niistring[intent[0]] if intent is not None else "NIFTI_INTENT_NONE",
        datatype="NIFTI_TYPE_UINT8" if data.dtype == np.uint8 else "NIFTI_TYPE_FLOAT32",
        meta=nib.gifti.GiftiMetaData(darray_meta),
    )
    img = nib.gifti.GiftiImage(meta=nib.gifti.GiftiMetaData(dict(grid.gifti_meta)), darrays=[da])
    nib.save(img, path)


def _write_nifti(path: Path, data: np.ndarray, grid: Grid, intent: tuple[str, Sequence[float]] | None,
                 description: str) -> None:
    hdr = _nifti_template(grid, data.dtype)
    if intent is not None:
        hdr.set_intent(intent[0], tuple(float(p) for p in intent[1]))
    hdr["descrip"] = description.encode("ascii", "replace")[:79]
    klass = nib.Nifti2Image if isinstance(hdr, nib.Nifti2Header) else nib.Nifti1Image
    img = klass(data, None, hdr)
    if path.name.lower().endswith(".gz"):
        # the bytes nib.save would write, compressed in one call at a fast level (see fastread)
        path.write_bytes(gzip_bytes(img.to_bytes()))
    else:
        nib.save(img, path)
