"""Small charts written directly as inline SVG (quick, sharp at any zoom, no image files)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .page import esc, num

INK = "#2b2d42"
BAR = "#7a8fa6"
ALERT = "#c8553d"
DOT = "#3d5a80"
W, H = 420, 220
LEFT, RIGHT, TOP, BOTTOM = 52, 12, 12, 38


def _frame(body: str, label: str, xlabel: str, ylabel: str, ymax: float) -> str:
    ph = H - TOP - BOTTOM
    ticks = "".join(
        f'<line x1="{LEFT - 4}" y1="{TOP + ph - ph * f:.1f}" x2="{LEFT}" y2="{TOP + ph - ph * f:.1f}" '
        f'stroke="{INK}"/><text x="{LEFT - 6}" y="{TOP + ph - ph * f + 4:.1f}" font-size="10" '
        f'text-anchor="end" fill="{INK}">{esc(num(ymax * f))}</text>' for f in (0, 0.5, 1))
    return (f'<svg xmlns="http://www.w3.org/2000/svg" role="img" aria-label="{esc(label)}" width="{W}" '
            f'height="{H}" viewBox="0 0 {W} {H}" class="chart">'
            f'<rect x="0" y="0" width="{W}" height="{H}" fill="white"/>{body}'
            f'<line x1="{LEFT}" y1="{TOP}" x2="{LEFT}" y2="{H - BOTTOM}" stroke="{INK}"/>'
            f'<line x1="{LEFT}" y1="{H - BOTTOM}" x2="{W - RIGHT}" y2="{H - BOTTOM}" stroke="{INK}"/>{ticks}'
            f'<text x="{(LEFT + W - RIGHT) / 2}" y="{H - 6}" font-size="11" text-anchor="middle" '
            f'fill="{INK}">{esc(xlabel)}</text>'
            f'<text x="12" y="{(TOP + H - BOTTOM) / 2}" font-size="11" text-anchor="middle" fill="{INK}" '
            f'transform="rotate(-90 12 {(TOP + H - BOTTOM) / 2})">{esc(ylabel)}</text></svg>')


def p_histogram(p: np.ndarray, elements: str, label: str) -> str:
    """Histogram of p values in 20 bins, with a dashed line at the count expected under no effect."""
    p = p[np.isfinite(p)]
    counts, _ = np.histogram(p, bins=20, range=(0.0, 1.0))
    expected = p.size / 20
    ymax = float(max(counts.max(initial=0), expected, 1))
    pw, ph = W - LEFT - RIGHT, H - TOP - BOTTOM
    bw = pw / 20
    bars = "".join(f'<rect x="{LEFT + i * bw + 1:.1f}" y="{TOP + ph - ph * c / ymax:.1f}" width="{bw - 2:.1f}" '
                   f'height="{ph * c / ymax:.1f}" fill="{BAR}"><title>{esc(f"{i / 20:g} to {(i + 1) / 20:g}: {c}")}'
                   "</title></rect>" for i, c in enumerate(counts))
    ey = TOP + ph - ph * expected / ymax
    line = (f'<line x1="{LEFT}" y1="{ey:.1f}" x2="{W - RIGHT}" y2="{ey:.1f}" stroke="{ALERT}" '
            'stroke-dasharray="5 4"/>')
    xt = "".join(f'<text x="{LEFT + pw * f:.1f}" y="{H - BOTTOM + 13}" font-size="10" text-anchor="middle" '
                 f'fill="{INK}">{f:g}</text>' for f in (0, 0.25, 0.5, 0.75, 1))
    return _frame(bars + line + xt, label, "uncorrected p", elements, ymax)


def residual_dots(ids: Sequence[str], values: np.ndarray, unusual: np.ndarray, label: str) -> str:
    """Each participant's mean absolute residual, sorted; unusual ones in red and named."""
    values = np.asarray(values, dtype=float)
    order = np.argsort(values, kind="stable")
    ymax = float(values.max(initial=0)) * 1.1 or 1.0
    pw, ph = W - LEFT - RIGHT, H - TOP - BOTTOM
    step = pw / max(len(order), 1)
    parts = []
    for pos, i in enumerate(order):
        x = LEFT + step * (pos + 0.5)
        y = TOP + ph - ph * values[i] / ymax
        colour = ALERT if unusual[i] else DOT
        parts.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3" fill="{colour}"><title>{esc(ids[i])}: '
                     f"{esc(num(values[i]))}</title></circle>")
        if unusual[i]:
            parts.append(f'<text x="{x - 5:.1f}" y="{y - 5:.1f}" font-size="10" text-anchor="end" '
                         f'fill="{ALERT}">{esc(ids[i])}</text>')
    return _frame("".join(parts), label, "participants, sorted", "mean |residual|", ymax)


__all__ = ["p_histogram", "residual_dots"]
