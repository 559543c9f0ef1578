"""The report's figures, drawn with matplotlib and handed back as PNG data URIs (no files, no network).

Palette of the report: slate background images, statistics above zero in an amber-to-cream ramp, below zero
in a teal ramp; lines of the interaction plot in a fixed set of muted colours.  Figures are drawn at a
modest resolution so that the report adds little to a run.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence
from dataclasses import dataclass

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402

from .picture import Picture  # noqa: E402

DPI = 80
UP = LinearSegmentedColormap.from_list("gm_up", ["#b5542f", "#f29e4c", "#fff1c1"])
DOWN = LinearSegmentedColormap.from_list("gm_down", ["#1d6f8a", "#3fc1c9", "#d4f5f5"])
LINES = ["#3d5a80", "#c8553d", "#588157", "#8e7dbe", "#b08836", "#4f6d7a"]
INK = "#2b2d42"


def to_picture(fig: plt.Figure) -> Picture:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    w, h = (int(round(v)) for v in fig.get_size_inches() * DPI)
    plt.close(fig)
    return Picture("data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii"), w, h)


def slice_positions(mask: np.ndarray, count: int = 8) -> list[int]:
    """Axial slices (third index) spread evenly over the extent of the mask."""
    ks = np.flatnonzero(mask.any(axis=(0, 1)))
    if ks.size == 0:
        return []
    if ks.size <= count:
        return ks.tolist()
    return np.unique(np.round(np.linspace(ks[0], ks[-1], count + 2)[1:-1]).astype(int)).tolist()


def png_picture(rgb: np.ndarray) -> Picture:
    """A PNG data URI of an (h, w, 3) array of floats in [0, 1]."""
    from PIL import Image  # matplotlib's own PNG writer

    buf = io.BytesIO()
    Image.fromarray(np.round(np.clip(rgb, 0, 1) * 255).astype(np.uint8), "RGB").save(buf, "PNG")
    return Picture("data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii"),
                   rgb.shape[1], rgb.shape[0])


def _scale(a: np.ndarray, factor: int) -> np.ndarray:
    return np.repeat(np.repeat(a, factor, axis=0), factor, axis=1)


def montage(background: np.ndarray, overlay: np.ndarray | None, mask: np.ndarray, limit: float | None = None,
            cmap: str | None = None) -> tuple[Picture, list[int]]:
    """Axial slices of ``background`` (grey) with ``overlay`` on top (NaN where nothing is shown), tiled four to
    a row and drawn as an image directly (no axes: quick); returns the picture and the slice indices.

    Without ``cmap`` the overlay is split into values above zero (UP) and below (DOWN), both scaled to
    ``limit``; with ``cmap`` the overlay is drawn on its own scale from 0 to ``limit``.
    """
    ks = slice_positions(mask)
    lo, hi = _range(background[mask]) if mask.any() else (0.0, 1.0)
    factor = max(1, int(np.ceil(150 / max(background.shape[0], background.shape[1]))))
    tiles = []
    for k in ks:
        grey = np.clip((np.rot90(background[:, :, k]) - lo) / (hi - lo), 0, 1)
        rgb = np.repeat(grey[..., None], 3, axis=2) * 0.6 + 0.08
        if overlay is not None:
            ov = np.rot90(overlay[:, :, k])
            lim = limit or 1.0
            if cmap is not None:
                shown = np.isfinite(ov)
                rgb[shown] = plt.get_cmap(cmap)(np.clip(ov[shown] / lim, 0, 1))[:, :3]
            else:
                up, down = np.isfinite(ov) & (ov > 0), np.isfinite(ov) & (ov < 0)
                rgb[up] = UP(0.3 + 0.7 * np.clip(ov[up] / lim, 0, 1))[:, :3]
                rgb[down] = DOWN(0.3 + 0.7 * np.clip(-ov[down] / lim, 0, 1))[:, :3]
        tiles.append(_scale(rgb, factor))
    if not tiles:
        return png_picture(np.ones((10, 10, 3))), []
    cols = min(4, len(tiles))
    h, w = tiles[0].shape[:2]
    pad = 4
    rows = int(np.ceil(len(tiles) / cols))
    sheet = np.ones((rows * (h + pad) - pad, cols * (w + pad) - pad, 3))
    for i, t in enumerate(tiles):
        r, c = divmod(i, cols)
        sheet[r * (h + pad): r * (h + pad) + h, c * (w + pad): c * (w + pad) + w] = t
    return png_picture(sheet), ks


def _range(values: np.ndarray) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(finite, [2, 98])
    return float(lo), float(hi if hi > lo else lo + 1)


@dataclass(frozen=True)
class CellLine:
    """One line of an interaction plot: a label and, per x level, estimate and 95% limits."""

    label: str
    estimate: np.ndarray
    low: np.ndarray
    high: np.ndarray


def interaction_plot(x_name: str, x_levels: Sequence[str], lines: Sequence[CellLine], outcome: str,
                     title: str) -> Picture:
    """Estimated cell means with 95% confidence intervals: one line per level of one factor."""
    fig, ax = plt.subplots(figsize=(4.2, 2.8), layout="constrained")
    x = np.arange(len(x_levels), dtype=float)
    width = 0.08 * (len(lines) - 1)
    for i, line in enumerate(lines):
        shift = (i - (len(lines) - 1) / 2) * (width / max(len(lines) - 1, 1))
        colour = LINES[i % len(LINES)]
        ax.errorbar(x + shift, line.estimate, yerr=[line.estimate - line.low, line.high - line.estimate],
                    color=colour, marker="o", markersize=4, capsize=3, linewidth=1.3, label=line.label)
    ax.set_xticks(x)
    ax.set_xticklabels(x_levels, fontsize=8)
    ax.set_xlabel(x_name, fontsize=8)
    ax.set_ylabel(f"estimated mean of {outcome}", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title(title, fontsize=8, color=INK)
    if len(lines) > 1 or lines[0].label:
        ax.legend(fontsize=7, frameon=False)
    return to_picture(fig)


__all__ = ["DPI", "CellLine", "Picture", "interaction_plot", "montage", "png_picture", "slice_positions",
           "to_picture"]
