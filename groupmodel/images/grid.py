"""The grid every image of a study shares, the file kinds, and the short texts messages use for them."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

#: Largest absolute difference between two affines' entries (mm, or mm per voxel) still counted as equal.
AFFINE_TOLERANCE_MM = 1e-4

_NIFTI_SUFFIXES = (".nii", ".nii.gz")
_GIFTI_SUFFIXES = (".gii",)
_KIND_NAME = {"nifti": "NIfTI", "gifti": "GIFTI"}


@dataclass(frozen=True, eq=False)
class Grid:
    """What every image of a study shares, and what is needed to write maps back on it.

    Attributes
    ----------
    kind : {"nifti", "gifti"}
        Volume (NIfTI-1 or NIfTI-2) or surface (GIFTI).
    shape : tuple of int
        ``(X, Y, Z)`` voxels for volumes, ``(n_vertices,)`` for surfaces.
    affine : ndarray of shape (4, 4) or None
        Voxel index -> mm (nibabel's best affine of the first image); None for GIFTI.
    zooms : tuple of float
        Voxel size in mm for volumes (3 values); empty for surfaces.
    header : nibabel Nifti1Header or Nifti2Header or None
        The first image's header, the template for maps written on this grid (sform, qform and their
        codes, units).  Treat as read-only; :func:`write_map` copies it.
    gifti_meta : tuple of (str, str)
        File-level metadata of the first GIFTI image (e.g. ``AnatomicalStructurePrimary``), copied into
        written surface maps so that viewers place them on the right hemisphere.
    """

    kind: Literal["nifti", "gifti"]
    shape: tuple[int, ...]
    affine: np.ndarray | None = None
    zooms: tuple[float, ...] = ()
    header: Any = field(default=None, repr=False)
    gifti_meta: tuple[tuple[str, str], ...] = ()

    @property
    def n_voxels(self) -> int:
        """Number of voxels (or vertices) of the full grid."""
        return int(np.prod(self.shape, dtype=np.int64))

    def matches(self, other: Grid, atol: float = AFFINE_TOLERANCE_MM) -> bool:
        """Same kind, same shape and (volumes) affines equal within ``atol`` mm."""
        if self.kind != other.kind or self.shape != other.shape:
            return False
        if self.affine is None or other.affine is None:
            return self.affine is None and other.affine is None
        return bool(np.max(np.abs(self.affine - other.affine)) <= atol)

    def describe(self) -> str:
        """One line for reports, e.g. ``20x24x20 voxels of 4x4x4 mm`` or ``642 vertices``."""
        if self.kind == "gifti":
            return f"{self.shape[0]} vertices"
        zooms = "x".join(f"{z:g}" for z in self.zooms)
        return f"{_fmt_shape(self.shape)} voxels of {zooms} mm"

    def to_json(self) -> dict[str, Any]:
        """Plain JSON description (for sidecars)."""
        out: dict[str, Any] = {"kind": self.kind, "shape": list(self.shape)}
        if self.affine is not None:
            out["affine"] = self.affine.tolist()
            out["voxel_size_mm"] = list(self.zooms)
        if self.gifti_meta:
            out["metadata"] = dict(self.gifti_meta)
        return out


def _is_nifti(path: Path) -> bool:
    return path.name.lower().endswith(_NIFTI_SUFFIXES)


def _is_gifti(path: Path) -> bool:
    return path.name.lower().endswith(_GIFTI_SUFFIXES)


def _fmt_shape(shape: Sequence[int]) -> str:
    return "x".join(str(int(s)) for s in shape)


def _fmt_affine(affine: np.ndarray) -> str:
    """The top three rows of an affine on one line."""
    rows = ["[" + " ".join(f"{v:.6g}" for v in row) + "]" for row in np.asarray(affine)[:3]]
    return "[" + " ".join(rows) + "]"


def _exc_text(exc: BaseException) -> str:
    text = str(exc).splitlines()[0] if str(exc) else ""
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__
