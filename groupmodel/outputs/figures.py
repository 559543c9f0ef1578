"""Pictures of the design and the contrasts (matplotlib, no screen needed).

Style: a purple-orange diverging palette centred on zero, each design column
scaled to its own largest absolute value (stated on the picture), participant
ids down the side and column names along the top.

Layout: the figure is sized from its parts (the labels' lengths, the matrix, the caption) and laid out by
matplotlib's constrained layout, so captions are wrapped to the figure's width and never cut off or laid
over the matrix, from one column to 40 and from a few rows to 1,000.  Numbers written in cells are white
on dark cells and black on light ones.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from pathlib import Path
from typing import BinaryIO

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

PALETTE = "PuOr_r"
FOOTER = "groupmodel output for research use; not a clinical or diagnostic tool"
DPI = 110
#: Average width of a character in DejaVu Sans, in units of the font size.
_CHAR_EM = 0.62
_ROTATION = 60  # degrees, column labels along the top
_LABEL_SIZE = 7  # points
_CAPTION_SIZE = 9


def _text_inches(chars: int, size: float) -> float:
    return chars * size * _CHAR_EM / 72


def _scaled(matrix: np.ndarray) -> np.ndarray:
    peak = np.abs(matrix).max(axis=0)
    return matrix / np.where(peak > 0, peak, 1.0)


def _top_margin(column_names: Sequence[str]) -> float:
    """Inches above the matrix for the rotated column labels."""
    longest = max((len(c) for c in column_names), default=1)
    return _text_inches(longest, _LABEL_SIZE) * np.sin(np.radians(_ROTATION)) + 0.35


def _right_overhang(column_names: Sequence[str], cell_width: float) -> float:
    """Inches the last rotated column label reaches right of the matrix."""
    if not column_names:
        return 0.0
    return max(0.0, _text_inches(len(column_names[-1]), _LABEL_SIZE) * np.cos(np.radians(_ROTATION))
               - cell_width / 2)


def _caption_lines(text: str, width_inches: float) -> list[str]:
    """The caption wrapped to ``width_inches`` (at least 20 characters a line)."""
    return textwrap.wrap(text, max(20, int(width_inches * 72 / (_CAPTION_SIZE * _CHAR_EM)) - 2))


def _caption(ax: plt.Axes, lines: list[str]) -> None:
    """The caption under the matrix (ticks are on top, so the x label is free)."""
    ax.set_xlabel("\n".join(lines), fontsize=_CAPTION_SIZE, labelpad=8)


def _save(fig: plt.Figure, path: Path | BinaryIO) -> None:
    fig.savefig(path, dpi=DPI, format="png")
    plt.close(fig)


def _column_labels(ax: plt.Axes, column_names: Sequence[str]) -> None:
    ax.set_xticks(range(len(column_names)))
    ax.set_xticklabels(column_names, rotation=_ROTATION, ha="left", rotation_mode="anchor", fontsize=_LABEL_SIZE)
    ax.xaxis.tick_top()


def plot_design(path: Path | BinaryIO, matrix: np.ndarray, column_names: Sequence[str], row_names: Sequence[str],
                title: str = "design") -> None:
    """Write a PNG of the design: rows are observations, columns are regressors."""
    _save(design_figure(matrix, column_names, row_names, title), path)


def design_figure(matrix: np.ndarray, column_names: Sequence[str], row_names: Sequence[str],
                  title: str = "design") -> plt.Figure:
    """The picture of the design (see :func:`plot_design`), not yet written."""
    n, p = matrix.shape
    cell_w = float(np.clip(9.0 / max(p, 1), 0.3, 0.9))
    matrix_h = float(np.clip(0.16 * n, 2.5, 24.0))
    row_size = 7 if n <= 60 else 6
    left = _text_inches(max((len(r) for r in row_names), default=4), row_size) + 0.7
    right = max(_right_overhang(column_names, cell_w), 1.3)  # room for the colour bar
    width = min(max(left + cell_w * p + right, 5.0), 30.0)
    # the caption is centred under the matrix: wrapped to the matrix's width and the narrower margin twice
    caption = _caption_lines(f"{title}: {n} observations x {p} columns (each column scaled to its largest |value|)",
                             width - left - right + 2 * min(left, right))
    height = min(_top_margin(column_names) + matrix_h + 0.35 + 0.2 * len(caption) + 0.3, 32.0)
    fig, ax = plt.subplots(figsize=(width, height), layout="constrained")
    im = ax.imshow(_scaled(matrix), aspect="auto", cmap=PALETTE, vmin=-1, vmax=1, interpolation="nearest")
    _column_labels(ax, column_names)
    # row labels at least 0.13 inch apart
    step = max(1, int(np.ceil(0.13 * n / matrix_h)))
    ax.set_yticks(range(0, n, step))
    ax.set_yticklabels([row_names[i] for i in range(0, n, step)], fontsize=row_size)
    ax.set_xticks(np.arange(-0.5, p, 1), minor=True)
    ax.grid(which="minor", axis="x", color="white", linewidth=1.2)
    ax.tick_params(which="minor", length=0)
    ax.set_ylabel("observation")
    _caption(ax, caption)
    fig.colorbar(im, ax=ax, fraction=0.05, shrink=min(1.0, 4.0 / matrix_h) if matrix_h > 4 else 1.0,
                 label="scaled value")
    fig.supxlabel(FOOTER, fontsize=6, color="0.4", x=0.01, ha="left")
    return fig


def relative_luminance(rgb: np.ndarray) -> np.ndarray:
    """WCAG 2 relative luminance of sRGB colours (..., 3) in [0, 1]."""
    rgb = np.asarray(rgb, dtype=float)
    linear = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    return linear @ np.array([0.2126, 0.7152, 0.0722])


def _number_colours(scaled: np.ndarray) -> np.ndarray:
    """For each cell, white or black: whichever contrasts more with the cell's colour (WCAG contrast ratio)."""
    cell = relative_luminance(plt.get_cmap(PALETTE)((scaled + 1) / 2)[..., :3])
    on_white = 1.05 / (cell + 0.05)  # white text: (1 + 0.05) / (L + 0.05)
    on_black = (cell + 0.05) / 0.05
    return np.where(on_white > on_black, "white", "black")


def plot_contrasts(path: Path | BinaryIO, rows: np.ndarray, row_labels: Sequence[str], column_names: Sequence[str],
                   tests: Sequence[str]) -> None:
    """Write a PNG of all contrast rows over the design columns, with their weights written in."""
    _save(contrasts_figure(rows, row_labels, column_names, tests), path)


def contrasts_figure(rows: np.ndarray, row_labels: Sequence[str], column_names: Sequence[str],
                     tests: Sequence[str]) -> plt.Figure:
    """The picture of the contrasts (see :func:`plot_contrasts`), not yet written."""
    q, p = rows.shape if rows.size else (0, len(column_names))
    labels = [f"{lab} [{t}]" for lab, t in zip(row_labels, tests, strict=True)]
    cell_w = float(np.clip(14.0 / max(p, 1), 0.55, 1.1))
    cell_h = 0.32
    number_size = 7 if cell_w >= 0.6 else 6
    left = _text_inches(max((len(lab) for lab in labels), default=4), _LABEL_SIZE) + 0.3
    right = max(_right_overhang(column_names, cell_w), 0.3)
    width = min(max(left + cell_w * p + right, 5.0), 30.0)
    caption = _caption_lines("contrast weights over design columns (each row scaled to its largest |weight|)",
                             width - left - right + 2 * min(left, right))
    height = min(_top_margin(column_names) + max(cell_h * q, 0.6) + 0.35 + 0.2 * len(caption) + 0.3, 30.0)
    fig, ax = plt.subplots(figsize=(width, height), layout="constrained")
    if q:
        peak = np.abs(rows).max(axis=1, keepdims=True)
        scaled = rows / np.where(peak > 0, peak, 1)
        ax.imshow(scaled, aspect="auto", cmap=PALETTE, vmin=-1, vmax=1, interpolation="nearest")
        colours = _number_colours(scaled)
        for i, j in zip(*np.nonzero(rows), strict=True):
            ax.text(j, i, f"{rows[i, j]:.3g}", ha="center", va="center", fontsize=number_size, color=colours[i, j])
    else:
        ax.set_xlim(-0.5, p - 0.5)
    _column_labels(ax, column_names)
    ax.set_yticks(range(q))
    ax.set_yticklabels(labels, fontsize=_LABEL_SIZE)
    _caption(ax, caption)
    fig.supxlabel(FOOTER, fontsize=6, color="0.4", x=0.01, ha="left")
    return fig
