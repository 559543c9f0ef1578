"""Where the images are: one :class:`ImageRef` per observation, gathered in an :class:`ImageSource`.

:func:`resolve_images` reads the spec's ``images`` value as a path pattern, a column of paths or one 4-D
file, without opening any image.  The rows of the participants table it needs are given as arguments.
"""

from __future__ import annotations

import math
import os
import string
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from ..errors import ImageError
from ..runtime.paths import text_join
from .grid import Grid, _is_nifti


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


def _who(ref: ImageRef) -> str:
    """How messages name the image of one observation."""
    vol = f" (volume {ref.volume})" if ref.volume is not None else ""
    return f"image for {ref.label}{vol}"


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
        source = _pattern_source(images, ids, table, base, source_label)
    elif images in columns:
        source = _column_source(images, ids, table, base, source_label)
    else:
        source = _four_d_source(images, ids, base, source_label, file_rows, n_file_rows)
    if source.mode != "4d":
        _check_unique(source)
    return source


def _pattern_source(images: str, ids: list[str], table: pd.DataFrame, base: Path, source_label: str) -> ImageSource:
    """(a) One path per row from a ``{column}`` pattern."""
    fields = _pattern_fields(images, [str(c) for c in table.columns], source_label)
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
        refs.append(ImageRef(i, label, text_join(base, images.format_map(values))))
    return ImageSource(tuple(refs), "pattern", f'{source_label} pattern "{images}"')


def _column_source(images: str, ids: list[str], table: pd.DataFrame, base: Path, source_label: str) -> ImageSource:
    """(b) One path per row from a column of the table."""
    refs = []
    for i, (label, value) in enumerate(zip(ids, table[images].tolist(), strict=True)):
        text = _as_text(value)
        if text is None or not text.strip():
            refs.append(ImageRef(i, label, None, problem=f"n/a in column {images!r}"))
        else:
            refs.append(ImageRef(i, label, text_join(base, text.strip())))
    return ImageSource(tuple(refs), "column", f'{source_label} column "{images}" of participants.tsv')


def _four_d_source(
    images: str,
    ids: list[str],
    base: Path,
    source_label: str,
    file_rows: Sequence[int] | None,
    n_file_rows: int | None,
) -> ImageSource:
    """(c) One 4-D NIfTI file; :func:`check_images` later decides which volume belongs to which row."""
    path = text_join(base, images)
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
    return ImageSource(
        tuple(refs),
        "4d",
        f'{source_label} 4-D file "{images}"',
        file_rows=None if file_rows is None else tuple(int(r) for r in file_rows),
        n_file_rows=n_file_rows,
    )


def _check_unique(source: ImageSource) -> None:
    """ImageError when two observations resolve to the same file."""
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
