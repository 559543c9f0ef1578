"""Header facts of image files (NIfTI: the header only; GIFTI: the XML attributes only) and the checks
:func:`check_images` runs on them before any heavy work."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Literal, NoReturn

import nibabel as nib
import numpy as np

from ..errors import ImageError
from .grid import _KIND_NAME, AFFINE_TOLERANCE_MM, Grid, _exc_text, _fmt_affine, _fmt_shape, _is_gifti, _is_nifti
from .sources import ImageRef, ImageSource, _who

#: The command-line flag that turns a missing image into an exclusion (quoted in error messages).
DROP_MISSING_FLAG = "--drop-missing-images"

_GIFTI_GEOMETRY_INTENTS = ("NIFTI_INTENT_POINTSET", "NIFTI_INTENT_TRIANGLE")


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


# --------------------------------------------------------------------------------------------------------
# Reading header facts
# --------------------------------------------------------------------------------------------------------


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
    arrays, meta = _gifti_attributes(path, who, origin)
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
    return _Info("gifti", (_gifti_n_vertices(arrays[0], who, path),), 1, None, (), None, tuple(meta))


def _gifti_attributes(path: Path, who: str, origin: str) -> tuple[list[dict[str, str]], list[tuple[str, str]]]:
    """The attributes of every DataArray and the file-level metadata, parsing the XML as a stream."""
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
    return arrays, meta


def _gifti_n_vertices(a: dict[str, str], who: str, path: Path) -> int:
    """The vertex count of a GIFTI data array's attributes, after checking its type and shape."""
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
    return dims[0]


def _read_info(path: Path, who: str, origin: str) -> _Info:
    if _is_nifti(path):
        return _nifti_info(path, who, origin)
    if _is_gifti(path):
        return _gifti_info(path, who, origin)
    raise ImageError(
        f"{who}: expected a NIfTI (.nii, .nii.gz) or GIFTI (.gii) file; found {path.name}: {path} "
        f"(from {origin}); convert the image or fix the path"
    )


# --------------------------------------------------------------------------------------------------------
# Checking the images of a source
# --------------------------------------------------------------------------------------------------------


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
    ImageProblems
        Every problem found (missing, unreadable, on another grid), each naming the observation and the file:
        the one message when there is one, else a count by kind and the first :data:`MAX_LISTED_PROBLEMS`.
    """
    if source.mode == "4d":
        return _check_4d(source), []

    kept: list[int] = []
    dropped: list[tuple[str, str]] = []
    problems: list[ImageProblem] = []
    first: tuple[ImageRef, _Info] | None = None
    for pos, ref in enumerate(source.refs):
        reason = _missing_reason(ref)
        if reason is not None:
            if drop_missing:
                dropped.append((ref.label, reason))
            else:
                problems.append(_missing_problem(ref, source))
            continue
        try:
            info = _check_one(ref, source.origin)
        except ImageError as exc:
            problems.append(ImageProblem("unreadable", str(exc)))
            continue
        if first is None:
            first = (ref, info)
        else:
            try:
                _compare(first, ref, info)
            except ImageError as exc:
                problems.append(ImageProblem("on another grid", str(exc)))
                continue
        kept.append(pos)

    if problems:
        raise_problems(problems, len(source), source.origin)
    if first is None:
        raise ImageError(
            f"expected at least one image; found none of {len(source)} (from {source.origin}); "
            "add the files or fix the images entry"
        )
    info0 = first[1]
    grid = Grid(info0.kind, info0.shape, info0.affine, info0.zooms, info0.header, info0.meta)
    checked = replace(source.select(kept), grid=grid)
    return checked, dropped


#: How many image problems an error lists line by line (the rest are counted).
MAX_LISTED_PROBLEMS = 10


@dataclass(frozen=True)
class ImageProblem:
    """One image that cannot be used: its kind (``missing``, ``unreadable``, ``on another grid``) and the
    message naming the observation, the file and the fix."""

    kind: str
    message: str


class ImageProblems(ImageError):
    """Several images cannot be used: every problem, counted by kind (the first few listed line by line)."""

    def __init__(self, message: str, problems: tuple[ImageProblem, ...]) -> None:
        super().__init__(message)
        self.problems = problems


def problems_text(problems: list[ImageProblem], n_images: int, origin: str) -> str:
    """``5 of 60 images cannot be used (3 missing, 1 on another grid, 1 unreadable; from ...)`` and the first
    :data:`MAX_LISTED_PROBLEMS` messages, one per line."""
    counts: dict[str, int] = {}
    for p in problems:
        counts[p.kind] = counts.get(p.kind, 0) + 1
    drop = (f", or pass {DROP_MISSING_FLAG} to leave out participants whose image is missing"
            if "missing" in counts else "")
    head = (f"{len(problems)} of {n_images} images cannot be used "
            f"({', '.join(f'{n} {kind}' for kind, n in counts.items())}; from {origin}); fix them all{drop}:")
    lines = [f"  {p.message}" for p in problems[:MAX_LISTED_PROBLEMS]]
    if len(problems) > MAX_LISTED_PROBLEMS:
        lines.append(f"  ... and {len(problems) - MAX_LISTED_PROBLEMS} more")
    return "\n".join([head, *lines])


def raise_problems(problems: list[ImageProblem], n_images: int, origin: str) -> NoReturn:
    """One problem: its own message; several: every one of them at once (:class:`ImageProblems`)."""
    if len(problems) == 1:
        raise ImageProblems(problems[0].message, tuple(problems))
    if len(problems) == n_images and len({p.kind for p in problems}) == 1 and problems[0].kind != "missing":
        # one cause for all (a wrong suffix, say): the first message says it
        raise ImageProblems(f"{problems[0].message} (and the same for all {n_images} images)", tuple(problems))
    raise ImageProblems(problems_text(problems, n_images, origin), tuple(problems))


def _missing_reason(ref: ImageRef) -> str | None:
    """Why an observation has no image (no path, or no file there); None when the file exists."""
    if ref.path is None:
        return f"no image path ({ref.problem})"
    if not ref.path.exists():
        return f"image not found: {ref.path}"
    return None


def _missing_problem(ref: ImageRef, source: ImageSource) -> ImageProblem:
    where = f"{ref.path}" if ref.path is not None else ref.problem
    return ImageProblem("missing", (
        f"image for {ref.label} not found: {where} (from {source.origin}); add the file, fix the "
        f"{'pattern' if source.mode == 'pattern' else 'column'}, or pass {DROP_MISSING_FLAG} to "
        "leave the participant out"
    ))


def _check_one(ref: ImageRef, origin: str) -> _Info:
    """Header facts of one existing image file, which must hold a single volume."""
    assert ref.path is not None
    if ref.path.is_dir():
        raise ImageError(
            f"{_who(ref)}: expected an image file; found a folder: {ref.path} (from {origin}); "
            "fix the path"
        )
    info = _read_info(ref.path, _who(ref), origin)
    if info.n_volumes != 1:
        raise ImageError(
            f"{_who(ref)}: expected one volume per row; found a 4-D image with {info.n_volumes} volumes: "
            f"{ref.path}; give one 3-D image per row, or give one 4-D file as images"
        )
    return info


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
