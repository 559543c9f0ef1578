"""The HTML of the report: escaping, tables, figures, sections and the page around them (no JavaScript).

Look: a cream page, dark slate ink, section headings with a rust rule, tables with light banding; on paper
(A4) the side list of contents is dropped and figures are kept whole.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence
from typing import Any

from ...text import number_text
from .picture import Picture

CSS = """
:root { --ink: #2b2d42; --paper: #fbf8f1; --rule: #b5542f; --band: #f0ebe0; --soft: #6b6f80; --warn: #9c2f1a; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.45 "Source Sans 3", "Segoe UI", Helvetica, Arial, sans-serif; }
header.top { padding: 18px 28px 10px; border-bottom: 3px solid var(--rule); }
header.top h1 { margin: 0; font-size: 24px; letter-spacing: 0.02em; }
header.top p { margin: 4px 0 0; color: var(--soft); }
nav.contents { position: fixed; top: 0; right: 0; width: 190px; padding: 16px 12px; font-size: 13px; }
nav.contents a { display: block; color: var(--ink); text-decoration: none; padding: 2px 0; }
nav.contents a:hover { text-decoration: underline; }
main { padding: 8px 230px 40px 28px; max-width: 1280px; }
section { margin-top: 26px; }
h2 { font-size: 19px; border-bottom: 2px solid var(--rule); padding-bottom: 2px; }
h3 { font-size: 16px; margin: 20px 0 6px; }
table { border-collapse: collapse; margin: 6px 0 12px; font-size: 13px; }
th, td { padding: 3px 9px; text-align: left; vertical-align: top; }
th { border-bottom: 1px solid var(--ink); font-weight: 600; }
tbody tr:nth-child(even) { background: var(--band); }
.wide { overflow-x: auto; max-width: 100%; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.figrow { display: flex; flex-wrap: wrap; gap: 18px; align-items: flex-start; }
figure { margin: 6px 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd6c6; background: white; }
figcaption { font-size: 12px; color: var(--soft); max-width: 640px; }
.note { color: var(--soft); font-size: 13px; }
.finding-error { color: var(--warn); font-weight: 600; }
.finding-warning { color: #8a5a00; }
.caution { border-left: 4px solid var(--rule); padding: 6px 12px; background: var(--band); }
code { font-size: 13px; }
@media (max-width: 1000px) {
  nav.contents { position: static; width: auto; padding: 8px 28px; }
  nav.contents a { display: inline-block; margin-right: 14px; }
  main { padding-right: 28px; }
}
@media print {
  @page { size: A4; margin: 14mm; }
  body { background: white; font-size: 11pt; }
  nav.contents { display: none; }
  main { padding: 0; max-width: none; }
  section, figure, table { break-inside: avoid; }
  .wide { overflow: visible; }
  table { font-size: 8pt; }
  h2, h3 { break-after: avoid; }
}
"""


def esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def num(x: float) -> str:
    """A number without round-off noise: 4 significant digits, whole numbers without decimals; a tiny value
    (a p value of 2e-10) is kept, not written as 0."""
    return number_text(x, whole_tol=1e-9 * min(1.0, abs(x))) if x != 0 else "0"


def value(v: Any) -> str:
    """A table value as text: counts whole, other numbers without round-off noise, missing as n/a."""
    if v is None:
        return "n/a"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "n/a" if math.isnan(v) else num(v)
    try:
        f = float(v)  # numpy scalars
    except (TypeError, ValueError):
        return esc(v)
    if hasattr(v, "dtype") and getattr(v.dtype, "kind", "") in "iu":
        return str(int(f))
    if hasattr(v, "dtype") and getattr(v.dtype, "kind", "") == "b":
        return "yes" if bool(v) else "no"
    return "n/a" if math.isnan(f) else num(f)


def _is_number(v: Any) -> bool:
    return not isinstance(v, (str, bool)) and v is not None and hasattr(v, "__float__")


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], ident: str | None = None,
          raw: bool = False) -> str:
    """A table; values pass through :func:`value` (``raw``: cells are already HTML)."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = []
        for v in row:
            if raw and isinstance(v, str):
                cells.append(f"<td>{v}</td>")
            else:
                cls = ' class="num"' if _is_number(v) else ""
                cells.append(f"<td{cls}>{value(v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    attr = f' id="{esc(ident)}"' if ident else ""
    return (f'<div class="wide"><table{attr}><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody>'
            "</table></div>")


def figure(pic: Picture | str | None, caption: str, alt: str) -> str:
    """An embedded picture (a PNG data URI, or inline SVG text) with its caption (nothing but the caption when
    pictures are off)."""
    if pic is None:
        return f'<p class="note">{esc(caption)} (figure not drawn: pictures are off)</p>'
    if isinstance(pic, str):
        return f"<figure>{pic}<figcaption>{esc(caption)}</figcaption></figure>"
    return (f'<figure><img src="{pic.uri}" width="{pic.width}" height="{pic.height}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def section(ident: str, title: str, body: str) -> str:
    return f'<section id="{esc(ident)}"><h2>{esc(title)}</h2>{body}</section>'


def paragraph(text: str, cls: str | None = None) -> str:
    attr = f' class="{cls}"' if cls else ""
    return f"<p{attr}>{esc(text)}</p>"


def document(title: str, subtitle: str, sections: Sequence[tuple[str, str, str]]) -> str:
    """The whole page from (id, title, html) sections."""
    nav = "".join(f'<a href="#{esc(i)}">{esc(t)}</a>' for i, t, _ in sections)
    body = "".join(section(i, t, h) for i, t, h in sections)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{esc(title)}</title><style>{CSS}</style></head><body>"
            f'<header class="top"><h1>{esc(title)}</h1><p>{esc(subtitle)}</p></header>'
            f'<nav class="contents" aria-label="contents">{nav}</nav><main>{body}</main></body></html>\n')


__all__ = ["CSS", "document", "esc", "figure", "num", "paragraph", "section", "table", "value"]
