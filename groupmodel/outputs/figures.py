"""Pictures of the design and the contrasts (matplotlib, no screen needed).

Style: a purple-orange diverging palette centred on zero, each design column
scaled to its own largest absolute value (stated on the picture), participant
ids down the side and column names along the top.

Figures are made without pyplot (no global state, no screen), so they may be drawn in a thread while maps
are written; matplotlib is imported only by this module, which is imported only when a picture is drawn.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

PALETTE = "PuOr_r"
FOOTER = "groupmodel output for research use; not a clinical or diagnostic tool"


def _figure(figsize: tuple[float, float]) -> Figure:
    fig = Figure(figsize=figsize, dpi=110)
    FigureCanvasAgg(fig)
    return fig


def _scaled(matrix: np.ndarray) -> np.ndarray:
    peak = np.abs(matrix).max(axis=0)
    return matrix / np.where(peak > 0, peak, 1.0)


def plot_design(path: Path, matrix: np.ndarray, column_names: Sequence[str], row_names: Sequence[str],
                title: str = "design") -> None:
    """Write a PNG of the design: rows are observations, columns are regressors."""
    n, p = matrix.shape
    height = min(max(4.0, 0.14 * n + 2.5), 30.0)
    width = min(max(4.0, 0.55 * p + 2.5), 30.0)
    fig = _figure((width, height))
    ax = fig.subplots()
    im = ax.imshow(_scaled(matrix), aspect="auto", cmap=PALETTE, vmin=-1, vmax=1, interpolation="nearest")
    ax.set_xticks(range(p))
    ax.set_xticklabels(column_names, rotation=60, ha="left", fontsize=7)
    ax.xaxis.tick_top()
    step = max(1, n // 80)
    ax.set_yticks(range(0, n, step))
    ax.set_yticklabels([row_names[i] for i in range(0, n, step)], fontsize=5 if n > 40 else 7)
    ax.set_xticks(np.arange(-0.5, p, 1), minor=True)
    ax.grid(which="minor", axis="x", color="white", linewidth=1.2)
    ax.tick_params(which="minor", length=0)
    ax.set_ylabel("observation")
    ax.set_title(f"{title}: {n} observations x {p} columns (each column scaled to its largest |value|)",
                 fontsize=9, pad=12, y=-0.06 if p > 0 else 1.0)
    fig.colorbar(im, ax=ax, fraction=0.03, pad=0.02, label="scaled value")
    fig.text(0.01, 0.005, FOOTER, fontsize=6, color="0.4")
    fig.tight_layout(rect=(0, 0.02, 1, 1))
    fig.savefig(path)


def plot_contrasts(path: Path, rows: np.ndarray, row_labels: Sequence[str], column_names: Sequence[str],
                   tests: Sequence[str]) -> None:
    """Write a PNG of all contrast rows over the design columns, with their weights written in."""
    q, p = rows.shape if rows.size else (0, len(column_names))
    fig = _figure((min(max(5.0, 0.6 * p + 4), 30), min(max(2.5, 0.32 * q + 2), 30)))
    ax = fig.subplots()
    if q:
        peak = np.abs(rows).max(axis=1, keepdims=True)
        ax.imshow(rows / np.where(peak > 0, peak, 1), aspect="auto", cmap=PALETTE, vmin=-1, vmax=1,
                  interpolation="nearest")
        for i in range(q):
            for j in range(p):
                if rows[i, j] != 0:
                    ax.text(j, i, f"{rows[i, j]:.3g}", ha="center", va="center", fontsize=6)
    ax.set_xticks(range(p))
    ax.set_xticklabels(column_names, rotation=60, ha="left", fontsize=7)
    ax.xaxis.tick_top()
    ax.set_yticks(range(q))
    ax.set_yticklabels([f"{lab} [{t}]" for lab, t in zip(row_labels, tests, strict=True)], fontsize=7)
    ax.set_title("contrast weights over design columns (each row scaled to its largest |weight|)",
                 fontsize=9, y=-0.12)
    fig.text(0.01, 0.005, FOOTER, fontsize=6, color="0.4")
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    fig.savefig(path)
