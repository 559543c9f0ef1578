"""Read hand-written design and contrast files for ``groupmodel check``.

A file is TSV, CSV or plain numbers separated by white space, with or without a
header row; lines starting with ``#`` are comments.  Reading is forgiving on
purpose: a typo in one entry is a *finding* (error, with file, line, row and
column), not a crash, so the audit can say everything that is wrong at once.
Only a file that cannot be read at all (missing, not text, no data rows) raises
:class:`~groupmodel.errors.TableError` (exit code 2).
"""

from __future__ import annotations

import csv
import math
import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np

from ..errors import TableError
from ..model.checks import Finding
from ..text import number_text

#: Header names of a design column that holds participant ids instead of numbers.
ID_COLUMNS = ("participant_id",)
#: Header names of a contrast-file column that names the contrast (rows with one name form one F test).
LABEL_COLUMNS = ("hypothesis", "contrast", "name", "label")
#: Header names of a contrast-file column that numbers the rows of one contrast (ignored).
ROW_NUMBER_COLUMNS = ("row",)

#: Longest list of rows or ids spelled out in one finding.
MAX_LISTED = 10

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


@dataclass(frozen=True)
class AuditFinding(Finding):
    """A :class:`~groupmodel.checks.Finding` with the report section it belongs to."""

    section: str = "files"

    def as_dict(self) -> dict[str, str]:
        return {"section": self.section, **super().as_dict()}


@dataclass
class MatrixFile:
    """A design or contrast file as read.

    Attributes
    ----------
    path : Path
    values : ndarray, shape (n_rows, n_columns)
        float64; NaN where an entry is not a number (each such entry is also a finding).
    names : list of str or None
        Header names of the numeric columns (None without a header).
    ids : list of str or None
        A ``participant_id`` column (design files), one per row.
    labels : list of str or None
        Contrast names (contrast files), one per row.
    lines : list of int
        1-based line in the file of every row.
    digits : ndarray of int, shape (n_rows, n_columns)
        Digits typed after the decimal point in each entry (16 for exponent notation); sets how closely the
        audit compares entries with values computed from the table (see :meth:`tolerance`).
    problems : list of AuditFinding
        Shape problems found while reading: entries that are not numbers or not finite, rows of the wrong
        length.
    ragged : bool
        Rows have different numbers of entries (the matrix is then cut to the shortest row).
    """

    path: Path
    values: np.ndarray
    names: list[str] | None
    ids: list[str] | None
    labels: list[str] | None
    lines: list[int]
    digits: np.ndarray
    problems: list[AuditFinding] = field(default_factory=list)
    ragged: bool = False

    @property
    def n_rows(self) -> int:
        return self.values.shape[0]

    @property
    def n_columns(self) -> int:
        return self.values.shape[1]

    @property
    def complete(self) -> bool:
        """Every entry is a finite number and every row has the same length."""
        return not self.ragged and bool(np.isfinite(self.values).all())

    def where(self, row: int, column: int | None = None) -> str:
        """``design.txt line 5 (row 4), column 3 (age)`` for 0-based row and column."""
        text = f"{self.path.name} line {self.lines[row]} (row {row + 1})"
        if column is not None:
            text += f", column {column + 1}"
            if self.names:
                text += f" ({self.names[column]})"
        return text

    def tolerance(self, column: int) -> float:
        """Absolute tolerance of the entries of a design column: half a unit of its last typed digit.

        Hand-typed files round (``-7.23`` for a centred age, ``0.707`` for a polynomial); comparisons with
        values computed from the table allow that rounding.  A column typed in whole numbers is taken as
        exact (0, 1, -1 codings are).  Never less than 1e-9 of the column's scale.
        """
        col = self.values[:, column]
        finite = col[np.isfinite(col)]
        scale = float(np.abs(finite).max()) if finite.size else 1.0
        d = int(self.digits[:, column].max()) if self.digits.size else 0
        typed = 0.5 * 10.0 ** (-d) * 1.01 if d >= 1 else 0.0
        return max(typed, 1e-9 * max(scale, 1.0))

    def tolerances(self) -> np.ndarray:
        """:meth:`tolerance` of every column, shape (n_columns,)."""
        return np.array([self.tolerance(j) for j in range(self.n_columns)])

    def entry_tolerance(self, rows: list[int]) -> float:
        """Largest rounding of the entries of some rows (contrast weights).

        Only entries with three or more decimals (``0.333``, ``0.7071``) count as rounded; ``1``, ``-0.5`` or
        ``0.25`` are taken as exact, so ``0.33 0.33 0.33 -1`` is reported as not summing to zero.
        """
        d = self.digits[rows]
        tol = np.where(d >= 3, 0.5 * 10.0 ** (-d.astype(float)) * 1.01, 0.0)
        return float(max(tol.max(initial=0.0), 1e-12))


def _is_number(text: str) -> bool:
    return bool(_NUMBER.match(text.strip()))


def _decimals(text: str) -> int:
    t = text.strip()
    if "e" in t.lower():
        return 16
    return len(t.split(".", 1)[1]) if "." in t else 0


def _split(line: str, sep: str) -> list[str]:
    if sep == "\t":
        return [f.strip() for f in line.split("\t")]
    if sep == ",":
        return [f.strip() for f in next(csv.reader([line], skipinitialspace=True))]
    return line.split()


def read_matrix(path: Path, kind: Literal["design", "contrasts"]) -> MatrixFile:
    """Read a design or contrast file.

    Parameters
    ----------
    path : Path
    kind : {"design", "contrasts"}
        A design may carry a ``participant_id`` column; a contrast file a name column
        (``hypothesis``, ``contrast``, ``name`` or ``label``) and a ``row`` column.  Without a header, a first
        column of text in every row is read as ids (design) or names (contrasts).

    Raises
    ------
    TableError
        The file is missing, is a folder, is not UTF-8 text, or has no data rows.
    """
    option = "--design" if kind == "design" else "--contrasts"
    numbered = _data_lines(path, kind)
    body = [ln for _, ln in numbered]
    sep = "\t" if any("\t" in ln for ln in body) else ("," if any("," in ln for ln in body) else " ")
    rows = [(n, _split(ln, sep)) for n, ln in numbered]

    first = rows[0][1]
    text_fields = sum(not _is_number(f) for f in first)
    has_header = text_fields * 2 > len(first)
    header = [h.strip() for h in first] if has_header else None
    data = rows[1:] if has_header else rows
    if not data:
        raise TableError(
            f"{option} {path}: expected rows of numbers under the header, found none; add the matrix rows"
        )
    ids, labels, skip = _text_columns(header, data, kind)
    width = len(header) if header is not None else max(len(r) for _, r in data)
    keep = [j for j in range(width) if j not in skip]
    names = [header[j] for j in keep] if header is not None else None
    values, digits, problems, ragged = _entries(path, data, (width, keep, names), header is not None)
    return MatrixFile(
        path=path,
        values=values,
        names=names,
        ids=ids,
        labels=labels,
        lines=[n for n, _ in data],
        digits=digits,
        problems=problems,
        ragged=ragged,
    )


def _data_lines(path: Path, kind: Literal["design", "contrasts"]) -> list[tuple[int, str]]:
    """(1-based line number, text) of every line that is neither blank nor a ``#`` comment."""
    what = "design file" if kind == "design" else "contrast file"
    option = "--design" if kind == "design" else "--contrasts"
    if not path.exists():
        raise TableError(f"{option} {path}: file not found; check the path")
    if path.is_dir():
        raise TableError(f"{option} {path}: expected a {what}, found a folder; give the file")
    try:
        raw_lines = path.read_text(encoding="utf-8-sig").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise TableError(f"{option} {path}: cannot be read as UTF-8 text ({exc}); save it as plain text") from None
    numbered = [(i + 1, ln) for i, ln in enumerate(raw_lines) if ln.strip() and not ln.lstrip().startswith("#")]
    if not numbered:
        raise TableError(
            f"{option} {path}: expected rows of numbers, found an empty file (or only # comments); "
            "give the matrix, one row per line"
        )
    return numbered


def _text_columns(header: list[str] | None, data: list[tuple[int, list[str]]], kind: Literal["design", "contrasts"]
                  ) -> tuple[list[str] | None, list[str] | None, set[int]]:
    """Which fields are text (ids, names) rather than numbers: (ids, labels, indices of the fields to skip)."""
    ids: list[str] | None = None
    labels: list[str] | None = None
    skip: set[int] = set()
    if header is not None:
        lower = [h.lower() for h in header]
        for j, h in enumerate(lower):
            if kind == "design" and h in ID_COLUMNS:
                ids = [r[j] if j < len(r) else "" for _, r in data]
                skip.add(j)
            if kind == "contrasts" and h in LABEL_COLUMNS and labels is None:
                labels = [r[j] if j < len(r) else "" for _, r in data]
                skip.add(j)
            if kind == "contrasts" and h in ROW_NUMBER_COLUMNS:
                skip.add(j)
    elif all(r and not _is_number(r[0]) for _, r in data):
        if kind == "design":
            ids = [r[0] for _, r in data]
        else:
            labels = [r[0] for _, r in data]
        skip.add(0)
    return ids, labels, skip


def _entries(path: Path, data: list[tuple[int, list[str]]], layout: tuple[int, list[int], list[str] | None],
             has_header: bool) -> tuple[np.ndarray, np.ndarray, list[AuditFinding], bool]:
    """The numeric entries (NaN where not a number), their typed decimals, the problems, and raggedness.

    ``layout`` is the row width, the fields kept as numbers and their header names.
    """
    width, keep, names = layout
    problems: list[AuditFinding] = []
    ragged = False
    values = np.full((len(data), len(keep)), np.nan)
    digits = np.zeros((len(data), len(keep)), dtype=int)
    ref, expected = _expected_width(data, width, has_header)
    for i, (line, fields) in enumerate(data):
        if len(fields) != ref:
            ragged = True
            problems.append(AuditFinding(
                "error", "row_length",
                f"{path.name} line {line} (row {i + 1}): expected {ref} entries {expected}, found "
                f"{len(fields)}; give every row the same number of entries",
            ))
        for jj, j in enumerate(keep):
            if j >= len(fields):
                continue
            tok = fields[j]
            if _is_number(tok):
                values[i, jj] = float(tok)
                digits[i, jj] = _decimals(tok)
                continue
            where = f"{path.name} line {line} (row {i + 1}), column {jj + 1}{f' ({names[jj]})' if names else ''}"
            problems.append(_entry_problem(tok, where))
    return values, digits, problems, ragged


def _expected_width(data: list[tuple[int, list[str]]], width: int, has_header: bool) -> tuple[int, str]:
    """The row length every row should have, and why: the header's, most rows', or the longest row's."""
    if has_header:
        return width, "as the header has"
    counts = Counter(len(r) for _, r in data)
    common = max(counts, key=lambda w: (counts[w], w))
    if 2 * counts[common] > len(data) and counts[common] > 1:
        return common, f"as {counts[common]} of the {len(data)} rows have"
    line = next(n for n, r in data if len(r) == width)
    return width, f"as the longest row has (line {line})"


def _entry_problem(tok: str, where: str) -> AuditFinding:
    """An entry that is not a number, or a number that is not finite."""
    try:
        x = float(tok)
    except ValueError:
        x = None
    if x is not None and not math.isfinite(x):
        return AuditFinding(
            "error", "not_finite",
            f"{where}: expected a finite number, found {tok!r}; replace it with the value it stands for",
        )
    shown = repr(tok) if tok else "an empty entry"
    return AuditFinding(
        "error", "not_numeric",
        f"{where}: expected a number, found {shown}; type the number (0, 1, -1, 0.5, ...)",
    )


def read_image_list(path: Path) -> list[tuple[int, str]]:
    """Lines of an image list as (line number, path); blank lines and ``#`` comments skipped.

    Raises
    ------
    TableError
        Missing or unreadable file, or no paths in it.
    """
    if not path.exists():
        raise TableError(f"--images {path}: file not found; check the path")
    try:
        lines = path.read_text(encoding="utf-8-sig").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise TableError(f"--images {path}: cannot be read as UTF-8 text ({exc}); give a text file") from None
    out = [(i + 1, ln.strip()) for i, ln in enumerate(lines) if ln.strip() and not ln.lstrip().startswith("#")]
    if not out:
        raise TableError(f"--images {path}: expected one image path per line, found none; list the images")
    return out


def listed_file(list_path: Path, entry: str) -> Path | None:
    """An image-list entry as an existing file: relative to the current folder, else to the list's folder; None
    when neither exists."""
    for candidate in (Path(entry), list_path.parent / entry):
        if candidate.exists():
            return candidate
    return None


_SUBJECT = re.compile(r"sub-([A-Za-z0-9]+)")


def participant_in_path(image_path: str) -> str | None:
    """The BIDS participant id (``sub-<label>``) in an image path, from its last occurrence; None if absent."""
    found = _SUBJECT.findall(image_path)
    return f"sub-{found[-1]}" if found else None


# Text helpers shared by the audit modules.
num_text = number_text


def listing(items: Sequence[str], sep: str = ", ") -> str:
    """Items joined for a message, at most MAX_LISTED of them."""
    items = list(items)
    if len(items) <= MAX_LISTED:
        return sep.join(items)
    return sep.join(items[:MAX_LISTED]) + f" and {len(items) - MAX_LISTED} more"


def row_text(row: np.ndarray) -> str:
    """A row of weights as ``[0 1 0.5]``."""
    return "[" + " ".join(num_text(float(v)) for v in row) + "]"
