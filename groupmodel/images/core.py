"""Find, check and read the images of a group fit; the analysis mask; chunks of voxels; write maps.

NIfTI volumes and GIFTI surfaces are handled behind one face: a :class:`Grid` says what every image of a
study shares, an :class:`ImageSource` says which file (and volume) belongs to each observation, and
:class:`MaskedData` holds the in-mask values of every image as an ``(n_obs, n_in_mask)`` float32 matrix.

The road through this module::

    source = resolve_images(spec_images, ids, table, base_dir)       # no file is opened
    source, dropped = check_images(source, drop_missing=...)          # headers only (NIfTI)
    with load_masked(source, mask, memory_bytes) as data:             # every image read exactly once
        for cols, y in data.chunks(chunk_size_for(n, n_tests, budget)):
            ...                                                       # y: (n_obs, len) float64
    write_map(path, values, data.mask, data.grid)                     # float32, 0 outside the mask

Voxel order.  Images are indexed as nibabel presents them (``[i, j, k]`` for volumes, ``[vertex]`` for
surfaces).  The columns of the data matrix, and the values given to :func:`write_map`, follow the mask in
C (row-major) order of that indexing, i.e. the order of ``np.flatnonzero(mask)``.

Memory.  :func:`load_masked` keeps the data matrix in RAM when it fits in ``memory_bytes``, else in a numpy
memmap in a temporary folder that :meth:`MaskedData.close` removes.  On top of the budget it needs at most
:func:`load_overhead_bytes` (a few single images' worth; see there).

This module knows nothing about statistics.
"""

from __future__ import annotations

import math
import mmap
import os
import shutil
import string
import tempfile
import weakref
import xml.etree.ElementTree as ET
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import nibabel as nib
import numpy as np
import pandas as pd

from ..errors import ImageError, InputError

#: Largest absolute difference between two affines' entries (mm, or mm per voxel) still counted as equal.
AFFINE_TOLERANCE_MM = 1e-4

#: The command-line flag that turns a missing image into an exclusion (quoted in error messages).
DROP_MISSING_FLAG = "--drop-missing-images"

#: Bytes of fixed overhead of :func:`load_masked` beyond the per-image part (interpreter, nibabel, zlib).
LOAD_OVERHEAD_FIXED = 16 * 2**20

#: :func:`load_masked` needs at most this many float64 single images of working memory beyond the budget.
LOAD_OVERHEAD_IMAGES = 6

_NIFTI_SUFFIXES = (".nii", ".nii.gz")
_GIFTI_SUFFIXES = (".gii",)
_GIFTI_PARSE_BUFFER = 2**20
_KIND_NAME = {"nifti": "NIfTI", "gifti": "GIFTI"}
_GIFTI_GEOMETRY_INTENTS = ("NIFTI_INTENT_POINTSET", "NIFTI_INTENT_TRIANGLE")


# --------------------------------------------------------------------------------------------------------
# Grid
# --------------------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------------------
# Where the images are
# --------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ImageRef:
    """The image of one observation.

    Attributes
    ----------
    row : int
        Position of the observation in the lists given to :func:`resolve_images` (0-based).
    label : str
        How messages name the observation (its participant_id).
    path : Path or None
        The file; None when no path could be formed (see ``problem``).
    volume : int or None
        Volume of a 4-D file (0-based), or None for one image per file.
    problem : str or None
        Why no path could be formed (e.g. ``n/a`` in the path column); treated like a missing file.
    """

    row: int
    label: str
    path: Path | None
    volume: int | None = None
    problem: str | None = None


@dataclass(frozen=True, eq=False)
class ImageSource:
    """Which image belongs to each observation, in observation order.

    Attributes
    ----------
    refs : tuple of ImageRef
        One per observation, in design-row order.
    mode : {"pattern", "column", "4d"}
        How ``images`` was read by :func:`resolve_images`.
    origin : str
        Where the image list came from, for messages, e.g.
        ``model.json "images" pattern "maps/{participant_id}_effect.nii.gz"``.
    grid : Grid or None
        Set by :func:`check_images`.
    file_rows, n_file_rows
        (4-D only) each observation's data row in the participants file and that file's row count,
        when known, so that a 4-D file with one volume per row of the file can be used.
    """

    refs: tuple[ImageRef, ...]
    mode: Literal["pattern", "column", "4d"]
    origin: str
    grid: Grid | None = None
    file_rows: tuple[int, ...] | None = None
    n_file_rows: int | None = None

    def __len__(self) -> int:
        return len(self.refs)

    @property
    def labels(self) -> list[str]:
        """Observation labels, in order."""
        return [r.label for r in self.refs]

    @property
    def rows(self) -> list[int]:
        """Each kept observation's position in the lists given to :func:`resolve_images`."""
        return [r.row for r in self.refs]

    @property
    def checked(self) -> bool:
        """True once :func:`check_images` has passed."""
        return self.grid is not None

    def select(self, positions: Sequence[int]) -> ImageSource:
        """A source with only the observations at ``positions`` (indices into ``refs``), in that order."""
        refs = tuple(self.refs[i] for i in positions)
        file_rows = None if self.file_rows is None else tuple(self.file_rows[i] for i in positions)
        return replace(self, refs=refs, file_rows=file_rows)


def resolve_images(
    images: str,
    participant_ids: Sequence[str],
    table: pd.DataFrame,
    base_dir: Path | str,
    source_label: str = 'model.json "images"',
    *,
    file_rows: Sequence[int] | None = None,
    n_file_rows: int | None = None,
) -> ImageSource:
    """Work out which image belongs to each observation, without opening any image.

    ``images`` is read as, in this order:

    (a) a path pattern when it contains ``{``: every ``{name}`` is replaced by that row's value in column
        ``name`` of ``table`` (e.g. ``maps/{participant_id}_effect.nii.gz``); integral numbers are written
        without a decimal point; an ``n/a`` in a used column leaves the row without an image;
    (b) the name of a column of ``table`` holding one path per row (``n/a`` = no image);
    (c) the path of one 4-D NIfTI file whose volumes follow the rows: either one volume per observation
        (in ``participant_ids`` order) or, when ``file_rows``/``n_file_rows`` are given, one volume per
        row of the participants file.  :func:`check_images` decides which by the volume count.

    Relative paths are taken relative to ``base_dir``.

    Parameters
    ----------
    images : str
        The spec's ``images`` value.
    participant_ids : sequence of str, length n_obs
        Label of each observation (used in messages; may repeat for repeated measures).
    table : DataFrame, n_obs rows
        The observations' rows of the participants table, in the same order.
    base_dir : Path
        Folder that relative paths start from (usually the spec's folder).
    source_label : str
        Where ``images`` came from, for messages.
    file_rows : sequence of int, optional
        (4-D only) each observation's 0-based data row in the participants file.
    n_file_rows : int, optional
        (4-D only) number of data rows in the participants file.

    Returns
    -------
    ImageSource
        Unchecked (``grid`` is None).

    Raises
    ------
    ImageError
        A placeholder that is not a column; ``images`` that is neither a pattern, a column nor a file;
        two observations resolving to the same file.
    """
    ids = [str(p) for p in participant_ids]
    if len(table) != len(ids):
        raise ValueError(f"table has {len(table)} rows but {len(ids)} participant_ids were given")
    base = Path(base_dir)
    columns = [str(c) for c in table.columns]

    if "{" in images or "}" in images:
        fields = _pattern_fields(images, columns, source_label)
        refs = []
        for i, (label, (_, row)) in enumerate(zip(ids, table.iterrows(), strict=True)):
            values: dict[str, str] = {}
            missing = [f for f in fields if _as_text(row[f]) is None]
            if missing:
                problem = f"n/a in column {missing[0]!r} used by the pattern"
                refs.append(ImageRef(i, label, None, problem=problem))
                continue
            for f in fields:
                values[f] = _as_text(row[f])  # type: ignore[assignment]
            refs.append(ImageRef(i, label, base / images.format_map(values)))
        source = ImageSource(tuple(refs), "pattern", f'{source_label} pattern "{images}"')
    elif images in columns:
        refs = []
        for i, (label, value) in enumerate(zip(ids, table[images].tolist(), strict=True)):
            text = _as_text(value)
            if text is None or not text.strip():
                refs.append(ImageRef(i, label, None, problem=f"n/a in column {images!r}"))
            else:
                refs.append(ImageRef(i, label, base / text.strip()))
        source = ImageSource(tuple(refs), "column", f'{source_label} column "{images}" of participants.tsv')
    else:
        path = base / images
        if not path.is_file():
            raise ImageError(
                f'{source_label} "{images}": expected a path pattern with {{participant_id}}, the name of a '
                f"column of participants.tsv, or one 4-D NIfTI file; found none of these (no file {path}); "
                "fix the images entry"
            )
        if not _is_nifti(path):
            raise ImageError(
                f'{source_label} "{images}": a single file must be a 4-D NIfTI (.nii, .nii.gz) with one '
                f"volume per row; found {path}; give a path pattern with {{participant_id}} instead"
            )
        refs = [ImageRef(i, label, path, volume=i) for i, label in enumerate(ids)]
        if file_rows is not None and len(file_rows) != len(ids):
            raise ValueError("file_rows must have one entry per observation")
        source = ImageSource(
            tuple(refs),
            "4d",
            f'{source_label} 4-D file "{images}"',
            file_rows=None if file_rows is None else tuple(int(r) for r in file_rows),
            n_file_rows=n_file_rows,
        )

    if source.mode != "4d":
        seen: dict[Path, str] = {}
        for ref in source.refs:
            if ref.path is None:
                continue
            key = Path(os.path.normpath(ref.path))
            if key in seen:
                raise ImageError(
                    f"each row needs its own image; found {seen[key]} and {ref.label} both using {ref.path} "
                    f"(from {source.origin}); make the pattern or column unique per row, e.g. with "
                    "{participant_id}"
                )
            seen[key] = ref.label
    return source


def _pattern_fields(pattern: str, columns: list[str], source_label: str) -> list[str]:
    """Column names used by a ``{name}`` pattern; ImageError for anything else."""
    try:
        parsed = list(string.Formatter().parse(pattern))
    except ValueError as exc:
        raise ImageError(
            f'{source_label} pattern "{pattern}": expected balanced {{column}} placeholders; found {exc}; '
            "fix the braces (write {{ or }} for a literal brace)"
        ) from exc
    fields: list[str] = []
    for _, name, spec, conv in parsed:
        if name is None:
            continue
        if name not in columns or spec or conv:
            raise ImageError(
                f'{source_label} pattern "{pattern}": expected {{column}} placeholders naming columns of '
                f"participants.tsv ({', '.join(columns)}); found {{{name}{'!' + conv if conv else ''}"
                f"{':' + spec if spec else ''}}}; use one of those columns"
            )
        if name not in fields:
            fields.append(name)
    if not fields:
        raise ImageError(
            f'{source_label} pattern "{pattern}": expected at least one {{column}} placeholder; '
            "fix the pattern"
        )
    return fields


def _as_text(value: Any) -> str | None:
    """A table cell as path text; None for a missing value.  Integral numbers lose their ``.0``."""
    if value is None or value is pd.NA:
        return None
    if isinstance(value, float | np.floating):
        if math.isnan(value):
            return None
        return str(int(value)) if float(value).is_integer() else repr(float(value))
    if isinstance(value, bool | np.bool_):
        return str(bool(value))
    if isinstance(value, int | np.integer):
        return str(int(value))
    text = str(value)
    return None if text == "n/a" else text


# --------------------------------------------------------------------------------------------------------
# Checking headers
# --------------------------------------------------------------------------------------------------------


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


def _who(ref: ImageRef) -> str:
    vol = f" (volume {ref.volume})" if ref.volume is not None else ""
    return f"image for {ref.label}{vol}"


@dataclass
class _Info:
    """Header facts of one image file."""

    kind: Literal["nifti", "gifti"]
    shape: tuple[int, ...]  # spatial shape (trailing single volume removed)
    n_volumes: int
    affine: np.ndarray | None
    zooms: tuple[float, ...]
    header: Any
    meta: tuple[tuple[str, str], ...] = ()


def _nifti_info(path: Path, who: str, origin: str) -> _Info:
    """NIfTI header facts, reading the header only."""
    try:
        img = nib.load(path)
    except Exception as exc:  # nibabel raises many types for a broken file
        raise ImageError(
            f"{who}: expected a readable NIfTI-1/-2 file; found an unreadable file ({_exc_text(exc)}): "
            f"{path} (from {origin}); replace the file"
        ) from exc
    if not isinstance(img, nib.Nifti1Image | nib.Nifti2Image):
        raise ImageError(
            f"{who}: expected a single-file NIfTI-1/-2 image; found {type(img).__name__}: {path}; "
            "convert it to .nii or .nii.gz"
        )
    shape = tuple(int(s) for s in img.shape)
    dtype = img.header.get_data_dtype()
    if dtype.kind not in "biuf" or dtype.fields is not None:
        raise ImageError(
            f"{who}: expected numeric voxel values; found data type {dtype}: {path}; "
            "save the image as float32 (or an integer type)"
        )
    if len(shape) < 3:
        raise ImageError(
            f"{who}: expected a 3-D volume; found shape {_fmt_shape(shape)}: {path}; give 3-D images"
        )
    extra = shape[4:]
    n_volumes = shape[3] if len(shape) > 3 else 1
    if any(s != 1 for s in extra):
        raise ImageError(
            f"{who}: expected a 3-D volume (or 4-D with volumes only); found shape {_fmt_shape(shape)}: "
            f"{path}; give one 3-D image per row"
        )
    zooms = tuple(float(z) for z in img.header.get_zooms()[:3])
    return _Info("nifti", shape[:3], n_volumes, np.asarray(img.affine, float), zooms, img.header.copy())


def _gifti_info(path: Path, who: str, origin: str) -> _Info:
    """GIFTI facts from the XML attributes, without decoding any data array."""
    arrays: list[dict[str, str]] = []
    meta: list[tuple[str, str]] = []
    stack: list[str] = []
    name = value = None
    try:
        for event, elem in ET.iterparse(path, events=("start", "end")):
            if event == "start":
                stack.append(elem.tag)
                if elem.tag == "DataArray":
                    arrays.append(dict(elem.attrib))
                continue
            # file-level metadata: GIFTI/MetaData/MD/{Name,Value}
            if stack[:3] == ["GIFTI", "MetaData", "MD"]:
                if elem.tag == "Name":
                    name = (elem.text or "").strip()
                elif elem.tag == "Value":
                    value = (elem.text or "").strip()
                elif elem.tag == "MD" and name is not None:
                    meta.append((name, value or ""))
                    name = value = None
            stack.pop()
            if elem.tag == "Data":
                elem.clear()  # do not keep the encoded data in memory
    except (ET.ParseError, OSError) as exc:
        raise ImageError(
            f"{who}: expected a readable GIFTI file; found an unreadable file ({_exc_text(exc)}): {path} "
            f"(from {origin}); replace the file"
        ) from exc
    if not arrays:
        raise ImageError(
            f"{who}: expected a GIFTI file with one data array; found no data array: {path}; replace the file"
        )
    intents = [a.get("Intent", "NIFTI_INTENT_NONE") for a in arrays]
    if any(i in _GIFTI_GEOMETRY_INTENTS for i in intents):
        raise ImageError(
            f"{who}: expected per-vertex data (one data array); found a surface geometry file "
            f"(arrays {', '.join(intents)}): {path}; give the participant's data file, not the mesh"
        )
    if len(arrays) != 1:
        raise ImageError(
            f"{who}: expected exactly one data array per participant; found {len(arrays)}: {path}; "
            "write one file per participant with one data array"
        )
    a = arrays[0]
    try:
        ndim = int(a.get("Dimensionality", "1"))
        dims = tuple(int(a[f"Dim{d}"]) for d in range(ndim))
    except (KeyError, ValueError) as exc:
        raise ImageError(
            f"{who}: expected Dimensionality and Dim0.. attributes; found {a}: {path}; replace the file"
        ) from exc
    dtype = a.get("DataType", "")
    if dtype not in nib.nifti1.data_type_codes.niistring or np.dtype(
        nib.nifti1.data_type_codes.dtype[dtype]
    ).kind not in "biuf":
        raise ImageError(
            f"{who}: expected numeric per-vertex values; found DataType {dtype or 'none'}: {path}; "
            "save the data as float32"
        )
    if len(dims) == 0 or any(d != 1 for d in dims[1:]):
        raise ImageError(
            f"{who}: expected one value per vertex; found an array of shape {_fmt_shape(dims)}: {path}; "
            "write one file per participant with one value per vertex"
        )
    return _Info("gifti", (dims[0],), 1, None, (), None, tuple(meta))


def _exc_text(exc: BaseException) -> str:
    text = str(exc).splitlines()[0] if str(exc) else ""
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _read_info(path: Path, who: str, origin: str) -> _Info:
    if _is_nifti(path):
        return _nifti_info(path, who, origin)
    if _is_gifti(path):
        return _gifti_info(path, who, origin)
    raise ImageError(
        f"{who}: expected a NIfTI (.nii, .nii.gz) or GIFTI (.gii) file; found {path.name}: {path} "
        f"(from {origin}); convert the image or fix the path"
    )


def check_images(
    source: ImageSource, drop_missing: bool = False
) -> tuple[ImageSource, list[tuple[str, str]]]:
    """Check every image before any heavy work (NIfTI: headers only; GIFTI: XML attributes only).

    Checks: the file exists and is readable; NIfTI-1/-2 (``.nii``, ``.nii.gz``) or GIFTI (``.gii``, exactly
    one data array) and the same kind for all; numeric data type; one 3-D volume per image (4-D with one
    volume is fine); the same shape; the same affine within :data:`AFFINE_TOLERANCE_MM`; for a 4-D file, a
    volume count equal to the number of observations (or of rows of the participants file).

    Parameters
    ----------
    source : ImageSource
        From :func:`resolve_images`.
    drop_missing : bool
        Leave out observations whose image file does not exist (or whose path has ``n/a``) instead of
        raising.  Unreadable or mismatching files are always errors.

    Returns
    -------
    checked : ImageSource
        The kept observations, with ``grid`` set; ``checked.rows`` gives their positions.
    dropped : list of (label, reason)
        Observations left out because their image is missing (empty unless ``drop_missing``).

    Raises
    ------
    ImageError
        The first problem found, naming the observation and the file.
    """
    if source.mode == "4d":
        return _check_4d(source), []

    kept: list[int] = []
    dropped: list[tuple[str, str]] = []
    first: tuple[ImageRef, _Info] | None = None
    for pos, ref in enumerate(source.refs):
        reason = None
        if ref.path is None:
            reason = f"no image path ({ref.problem})"
        elif not ref.path.exists():
            reason = f"image not found: {ref.path}"
        if reason is not None:
            if drop_missing:
                dropped.append((ref.label, reason))
                continue
            where = f"{ref.path}" if ref.path is not None else ref.problem
            raise ImageError(
                f"image for {ref.label} not found: {where} (from {source.origin}); add the file, fix the "
                f"{'pattern' if source.mode == 'pattern' else 'column'}, or pass {DROP_MISSING_FLAG} to "
                "leave the participant out"
            )
        assert ref.path is not None
        if ref.path.is_dir():
            raise ImageError(
                f"{_who(ref)}: expected an image file; found a folder: {ref.path} (from {source.origin}); "
                "fix the path"
            )
        info = _read_info(ref.path, _who(ref), source.origin)
        if info.n_volumes != 1:
            raise ImageError(
                f"{_who(ref)}: expected one volume per row; found a 4-D image with {info.n_volumes} volumes: "
                f"{ref.path}; give one 3-D image per row, or give one 4-D file as images"
            )
        if first is None:
            first = (ref, info)
        else:
            _compare(first, ref, info)
        kept.append(pos)

    if first is None:
        raise ImageError(
            f"expected at least one image; found none of {len(source)} (from {source.origin}); "
            "add the files or fix the images entry"
        )
    info0 = first[1]
    grid = Grid(info0.kind, info0.shape, info0.affine, info0.zooms, info0.header, info0.meta)
    checked = replace(source.select(kept), grid=grid)
    return checked, dropped


def _compare(first: tuple[ImageRef, _Info], ref: ImageRef, info: _Info) -> None:
    """ImageError when ``info`` does not match the first image's grid."""
    ref0, info0 = first
    base = f"{ref0.label} ({ref0.path})"
    if info.kind != info0.kind:
        raise ImageError(
            f"{_who(ref)}: expected a {_KIND_NAME[info0.kind]} file like {base}; found {_KIND_NAME[info.kind]}: "
            f"{ref.path}; give images of one kind"
        )
    if info.shape != info0.shape:
        unit = "vertices" if info.kind == "gifti" else "voxels"
        raise ImageError(
            f"{_who(ref)}: expected {_fmt_shape(info0.shape)} {unit} like {base}; found "
            f"{_fmt_shape(info.shape)}: {ref.path}; resample every image to one grid"
        )
    if info.affine is not None and info0.affine is not None:
        diff = float(np.max(np.abs(info.affine - info0.affine)))
        if not diff <= AFFINE_TOLERANCE_MM:
            raise ImageError(
                f"{_who(ref)}: expected the affine of {base} {_fmt_affine(info0.affine)}; found "
                f"{_fmt_affine(info.affine)} (differs by up to {diff:.3g} mm, tolerance "
                f"{AFFINE_TOLERANCE_MM:g} mm): {ref.path}; resample every image to one grid"
            )
    side0 = dict(info0.meta).get("AnatomicalStructurePrimary")
    side = dict(info.meta).get("AnatomicalStructurePrimary")
    if side0 and side and side0 != side:
        raise ImageError(
            f"{_who(ref)}: expected a surface of {side0} like {base}; found {side}: {ref.path}; "
            "fit each hemisphere separately"
        )


def _check_4d(source: ImageSource) -> ImageSource:
    """Checks of a single 4-D file; decides which volume belongs to which observation."""
    ref0 = source.refs[0]
    assert ref0.path is not None
    who = f"4-D image {ref0.path.name}"
    info = _nifti_info(ref0.path, who, source.origin)
    n_obs = len(source)
    nv = info.n_volumes
    if source.file_rows is not None and source.n_file_rows is not None and nv == source.n_file_rows:
        volumes = list(source.file_rows)
    elif nv == n_obs:
        volumes = list(range(n_obs))
    else:
        alt = ""
        if source.n_file_rows is not None and source.n_file_rows != n_obs:
            alt = f" or {source.n_file_rows} (one per row of participants.tsv)"
        raise ImageError(
            f"{who}: expected {n_obs} volumes (one per included row){alt}; found {nv}: {ref0.path} "
            f"(from {source.origin}); give a 4-D file whose volumes follow the rows of participants.tsv"
        )
    refs = tuple(replace(r, volume=v) for r, v in zip(source.refs, volumes, strict=True))
    grid = Grid("nifti", info.shape, info.affine, info.zooms, info.header)
    return replace(source, refs=refs, grid=grid)


# --------------------------------------------------------------------------------------------------------
# Masks
# --------------------------------------------------------------------------------------------------------


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
    values = _read_array(ref, grid, label)
    inside = np.isfinite(values) & (values != 0)
    if not inside.any():
        raise ImageError(f"{who}: expected some nonzero voxels; found an empty mask: {path}; fix the mask")
    return inside


# --------------------------------------------------------------------------------------------------------
# Reading data
# --------------------------------------------------------------------------------------------------------


def _read_array(ref: ImageRef, grid: Grid, origin: str) -> np.ndarray:
    """All values of one 3-D NIfTI or GIFTI image (one read), shape ``grid.shape``, native dtype."""
    assert ref.path is not None
    try:
        if grid.kind == "gifti":
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


def _iter_arrays(source: ImageSource) -> Iterator[tuple[list[int], np.ndarray]]:
    """Yield ``(rows, array)`` for every image, reading each file (or 4-D volume) exactly once."""
    grid = source.grid
    assert grid is not None
    if source.mode != "4d":
        for i, ref in enumerate(source.refs):
            yield [i], _read_array(ref, grid, source.origin)
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


def load_overhead_bytes(grid: Grid) -> int:
    """Working memory :func:`load_masked` may use beyond ``memory_bytes``.

    ``LOAD_OVERHEAD_IMAGES`` float64 single images (the image being read, nibabel's raw and scaled copies,
    the running finite/nonzero masks and index arrays) plus ``LOAD_OVERHEAD_FIXED``.
    """
    return LOAD_OVERHEAD_IMAGES * 8 * grid.n_voxels + LOAD_OVERHEAD_FIXED


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
        n_nonfinite_excluded: int,
        n_nonfinite_everywhere: int,
        n_zero_excluded: int,
        nonfinite_per_image: np.ndarray,
        warnings: list[str],
        spill_dir: Path | None,
    ) -> None:
        self.grid = grid
        self.mask = mask
        self.data = data
        self.labels = labels
        self.n_in_mask = int(data.shape[1])
        self.n_nonfinite_excluded = n_nonfinite_excluded
        self.n_nonfinite_everywhere = n_nonfinite_everywhere
        self.n_zero_excluded = n_zero_excluded
        self.nonfinite_per_image = nonfinite_per_image
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

    Memory.  Every image's candidate voxels (the whole grid without a user mask) go in one pass into a
    buffer -- in RAM when ``n_obs * n_candidates * 4 <= memory_bytes``, else a memmap in a temporary folder
    under ``workdir`` -- while the finite/nonzero masks accumulate; the buffer is then compacted to the mask
    in place, row by row.  A spilled buffer whose compacted matrix fits in ``memory_bytes`` is copied back
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
    n_grid = grid.n_voxels

    user_mask = load_mask(mask, grid, mask_label) if mask is not None else None
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

    # float32 holds float32 and 16-bit integer images exactly; float64 images keep float64, so
    # that data stored with more digits (e.g. NIST StRD values) reach the engine unrounded.
    dtype = storage_dtype(grid)
    itemsize = np.dtype(dtype).itemsize
    spill_dir: Path | None = None
    buf: np.ndarray
    if n * n_cand * itemsize <= memory_bytes:
        buf = np.empty(n * n_cand, dtype=dtype)
    else:
        spill_dir, buf = _new_spill(workdir, n * n_cand, dtype)

    finite_all = np.ones(n_cand, dtype=bool)
    finite_any = np.zeros(n_cand, dtype=bool)
    nonzero_any = np.zeros(n_cand, dtype=bool)
    finite = np.empty(n_cand, dtype=bool)
    nonzero = np.empty(n_cand, dtype=bool)
    nonfinite_per_image = np.zeros(n, dtype=np.int64)
    warnings: list[str] = []
    done = 0
    try:
        for rows, arr in _iter_arrays(source):
            first = rows[0]
            row = buf[first * n_cand : (first + 1) * n_cand]
            # overflow to inf (float64 beyond float32 range) is wanted: such voxels are then left out
            with np.errstate(over="ignore", invalid="ignore"):
                if cand_f is None:
                    np.copyto(row.reshape(shape[::-1]).T, arr, casting="unsafe")
                else:
                    np.copyto(row, arr.reshape(-1, order="F")[cand_f], casting="unsafe")
            del arr
            np.isfinite(row, out=finite)
            n_finite = int(np.count_nonzero(finite))
            ref = source.refs[first]
            if n_finite == 0:
                where = " inside the mask" if user_mask is not None else ""
                raise ImageError(
                    f"{_who(ref)}: expected finite values; found NaN/inf everywhere{where}: {ref.path} "
                    f"(from {source.origin}); re-create the image or leave the participant out"
                )
            nonfinite_per_image[rows] = n_cand - n_finite
            finite_all &= finite
            finite_any |= finite
            np.not_equal(row, 0, out=nonzero)
            nonzero &= finite
            if not nonzero.any():
                inside = " inside the mask" if user_mask is not None else ""
                warnings.append(f"{_who(ref)} is zero everywhere{inside}: {ref.path}")
            nonzero_any |= nonzero
            for other in rows[1:]:  # a 4-D volume used by several rows
                buf[other * n_cand : (other + 1) * n_cand] = row
            if spill_dir is not None:
                release_pages(buf)
            done += len(rows)
            if progress is not None:
                progress(done, n)
        del row  # a view of buf, which _compact may shrink

        keep = finite_all & nonzero_any
        n_nonfinite_excluded = int(np.count_nonzero(~finite_all & finite_any))
        n_nonfinite_everywhere = int(np.count_nonzero(~finite_any))
        n_zero_excluded = int(np.count_nonzero(finite_all & ~nonzero_any))
        del finite_all, finite_any, nonzero_any, finite, nonzero
        n_keep = int(np.count_nonzero(keep))
        if n_keep == 0:
            raise ImageError(
                f"expected some voxels finite in every image and nonzero in some; found none "
                f"({n_nonfinite_excluded + n_nonfinite_everywhere} NaN/inf somewhere, {n_zero_excluded} "
                f"zero in every image; {'mask ' + str(mask) if mask is not None else 'no mask given'}) "
                f"(from {source.origin}); check the images and the mask"
            )

        if cand_f is None:
            # keep is in Fortran order; the columns go in C order of the mask
            full_mask = np.ascontiguousarray(keep.reshape(shape[::-1]).T)
            del keep
            gather = np.arange(n_grid, dtype=np.int64).reshape(shape[::-1]).T[full_mask]
        else:
            full_mask = np.zeros(n_grid, dtype=bool)
            full_mask[np.flatnonzero(user_mask)[keep]] = True
            full_mask = full_mask.reshape(shape)
            gather = np.flatnonzero(keep)
            del keep
        del user_mask, cand_f
        # the row layout already is the final one (surfaces; all candidates kept in C order)
        keep_idx = None if gather.size == n_cand and np.array_equal(gather, np.arange(n_cand)) else gather
        del gather

        data, spill_dir = _compact(buf, n, n_cand, keep_idx, memory_bytes, spill_dir)
        del buf
    except BaseException:
        if spill_dir is not None:
            shutil.rmtree(spill_dir, ignore_errors=True)
        raise

    return MaskedData(
        grid,
        full_mask,
        data,
        source.labels,
        n_nonfinite_excluded=n_nonfinite_excluded,
        n_nonfinite_everywhere=n_nonfinite_everywhere,
        n_zero_excluded=n_zero_excluded,
        nonfinite_per_image=nonfinite_per_image,
        warnings=warnings,
        spill_dir=spill_dir,
    )


_SPILL_NAME = "data.f32"


def storage_dtype(grid: Grid) -> type:
    """float64 for images stored as float64 (unscaled), float32 otherwise."""
    header = getattr(grid, "header", None)
    if header is not None:
        slope, inter = header.get_slope_inter()
        if header.get_data_dtype() == np.float64 and slope in (None, 1.0) and inter in (None, 0.0):
            return np.float64
    return np.float32


def _new_spill(workdir: Path | str | None, n_values: int, dtype: type = np.float32) -> tuple[Path, np.memmap]:
    """A temporary folder with a preallocated memmap of ``n_values`` values of ``dtype``."""
    nbytes = n_values * np.dtype(dtype).itemsize
    try:
        d = Path(tempfile.mkdtemp(prefix="groupmodel-spill-", dir=None if workdir is None else str(workdir)))
    except OSError as exc:
        raise InputError(
            f"expected a writable folder for spilling data to disk; found {exc.strerror}: "
            f"{workdir or tempfile.gettempdir()}; choose another work folder or raise the memory limit"
        ) from exc
    path = d / _SPILL_NAME
    try:
        with open(path, "wb") as fh:
            # reserve the space now: a memmap write into a sparse file on a full disk would crash the process
            if hasattr(os, "posix_fallocate"):
                os.posix_fallocate(fh.fileno(), 0, nbytes)
            else:  # pragma: no cover - not Linux
                fh.truncate(nbytes)
        mm = np.memmap(path, dtype=dtype, mode="r+", shape=(n_values,))
    except OSError as exc:
        shutil.rmtree(d, ignore_errors=True)
        raise InputError(
            f"expected {nbytes / 2**20:.1f} MiB of free disk space for spilling data; found "
            f"{exc.strerror}: {d}; free some space, choose another work folder or raise the memory limit"
        ) from exc
    return d, mm


def _compact(
    buf: np.ndarray,
    n: int,
    n_cand: int,
    keep_idx: np.ndarray | None,
    memory_bytes: int,
    spill_dir: Path | None,
) -> tuple[np.ndarray, Path | None]:
    """Turn the flat ``(n, n_cand)`` buffer into the ``(n, n_keep)`` matrix, without a second full copy."""
    n_keep = n_cand if keep_idx is None else int(keep_idx.size)
    if spill_dir is None:
        if keep_idx is not None:
            _compact_rows(buf, n, n_cand, keep_idx)
            # shrink the allocation in place (realloc) rather than copying into a smaller array
            buf.resize(n * n_keep, refcheck=False)
        return buf.reshape(n, n_keep), None

    path = spill_dir / _SPILL_NAME
    itemsize = buf.dtype.itemsize
    if n * n_keep * itemsize <= memory_bytes:
        # the compacted matrix fits the budget: bring it into RAM row by row and remove the spill
        out = np.empty((n, n_keep), dtype=buf.dtype)
        for i in range(n):
            src = buf[i * n_cand : (i + 1) * n_cand]
            out[i] = src if keep_idx is None else src[keep_idx]
            if i % 16 == 15:
                release_pages(buf)
        del buf
        shutil.rmtree(spill_dir, ignore_errors=True)
        return out, None
    if keep_idx is not None:
        _compact_rows(buf, n, n_cand, keep_idx, release=lambda b=buf: release_pages(b))
    assert isinstance(buf, np.memmap)
    dtype = buf.dtype
    buf.flush()
    del buf
    os.truncate(path, n * n_keep * itemsize)
    data = np.memmap(path, dtype=dtype, mode="r", shape=(n, n_keep))
    return data, spill_dir


class SpillReader:
    """Column blocks of a spilled ``(n, V)`` row-major matrix by plain file reads: ``reader[:, a:b]``.

    Reading a short run of every row through a memory map makes the kernel map most of the file, which counts
    in the process's resident memory; plain reads go through the page cache instead.  Picklable (a path and
    a shape), so it can be shipped to workers.
    """

    def __init__(self, path: Path, dtype: np.dtype, shape: tuple[int, int]) -> None:
        self.path = Path(path)
        self.dtype = np.dtype(dtype)
        self.shape = (int(shape[0]), int(shape[1]))

    def __getitem__(self, key: tuple[slice, slice]) -> np.ndarray:
        rows, cols = key
        if rows != slice(None) or not isinstance(cols, slice) or cols.step not in (None, 1):
            raise TypeError("SpillReader supports [:, a:b] only")
        n, total = self.shape
        start, stop, _ = cols.indices(total)
        out = np.empty((n, max(stop - start, 0)), dtype=self.dtype)
        if out.size:
            with open(self.path, "rb", buffering=0) as fh:
                for i in range(n):
                    fh.seek((i * total + start) * self.dtype.itemsize)
                    view = memoryview(out[i]).cast("B")
                    got = fh.readinto(view)
                    if got != view.nbytes:
                        raise OSError(f"short read from the spill file {self.path} (row {i})")
        return out


def release_pages(array: np.ndarray) -> None:
    """Write back and drop the resident pages of a file-backed memmap (no-op for arrays in RAM).

    A spilled data matrix is read and written through a memory map; the kernel keeps every page touched
    resident (counted in the process's RSS) until memory runs short.  Dropping them after each block keeps
    the resident set within the budget; they are read back from disk when touched again.
    """
    base = getattr(array, "_mmap", None)
    if isinstance(array, np.memmap) and base is not None and hasattr(base, "madvise"):
        base.flush()
        base.madvise(mmap.MADV_DONTNEED)


def _compact_rows(flat: np.ndarray, n: int, n_cand: int, keep_idx: np.ndarray,
                  release: Callable[[], None] | None = None) -> None:
    """In place: row i of the result (``keep_idx`` columns) goes to ``flat[i*n_keep:(i+1)*n_keep]``.

    ``keep_idx`` holds distinct positions in any order (a gather, not only a selection).  Row i's
    destination ends at (i+1)*n_keep <= (i+1)*n_cand, the start of row i+1's source, so no row is
    overwritten before it is read; each row is copied out (fancy indexing) before it is written back.
    """
    n_keep = keep_idx.size
    for i in range(n):
        row = flat[i * n_cand : (i + 1) * n_cand][keep_idx]
        flat[i * n_keep : (i + 1) * n_keep] = row
        if release is not None and i % 16 == 15:
            release()


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


# --------------------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------------------


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
    codes = nib.nifti1.intent_codes
    if intent is not None and intent[0] not in codes.code:
        raise ValueError(f"unknown NIfTI intent {intent[0]!r}")
    if grid.kind == "gifti":
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
        return
    hdr = _nifti_template(grid, data.dtype)
    if intent is not None:
        hdr.set_intent(intent[0], tuple(float(p) for p in intent[1]))
    hdr["descrip"] = description.encode("ascii", "replace")[:79]
    klass = nib.Nifti2Image if isinstance(hdr, nib.Nifti2Header) else nib.Nifti1Image
    img = klass(data, None, hdr)
    nib.save(img, path)
