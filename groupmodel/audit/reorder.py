"""Design rows in another order than the participants table: found, explained, and read in their true order.

Runs when the columns cannot all be explained with the rows in table order.  Two sources say which
participant each row is without trusting the order: an image list whose paths carry the participant ids
(``--images``), and the rows themselves (:func:`groupmodel.audit.realign.match_rows`).  A reordering is adopted
only when it explains more columns than the table order.  Part of ``groupmodel check``.
"""

from __future__ import annotations

import numpy as np

from ..errors import TableError
from .columns import columns_explained
from .context import Files, Request
from .order import RowOrder
from .read import AuditFinding, listing, participant_in_path, read_image_list
from .realign import Matched, match_rows
from .reorder_words import Family, family_text, runs_text, simplest_family
from .table_view import PreparedTable, TableView


def reorder_rows(req: Request, files: Files, table: PreparedTable, claimed: np.ndarray) -> RowOrder | None:
    """The rows read in their true order, with the finding that says so; None when the table order stands."""
    n = files.x.n_rows
    if files.x.ids is not None or (claimed < 0).any() or n < 3:
        return None  # rows named by a participant_id column are where their ids say
    before = columns_explained(files, table, claimed)
    if before == files.x.n_columns:
        return None
    images = image_alignment(req, table, claimed)
    by_images = -1
    if images is not None and not np.array_equal(images, claimed):
        by_images = columns_explained(files, table, images)
    matched = match_rows(files, table, claimed)
    if matched is not None and matched.family.kind == "none":
        matched = None
    align = claimed[matched.order] if matched is not None else claimed
    by_rows = columns_explained(files, table, align) if matched is not None else -1
    if images is not None and by_images > before and by_images >= by_rows:
        return RowOrder(images, np.zeros(n, dtype=bool), (_follows_images(req, table, claimed, images),),
                        follows_images=True)
    if matched is None or by_rows <= before:
        return None
    kept = _only_a_new_factor(req, files, table, claimed, matched)
    if kept:
        return RowOrder(claimed.copy(), np.zeros(n, dtype=bool), (_maybe_out_of_place(req, matched, kept),))
    finding = _out_of_place(req, table, claimed, matched, images)
    return RowOrder(align, np.zeros(n, dtype=bool), (finding,))


def _coded_in_order(files: Files, table: PreparedTable, claimed: np.ndarray) -> set[str]:
    """The factors some column already codes with the rows in table order."""
    from .columns import _factor_function

    view = table.view(claimed)
    names = list(view.factors)
    out: set[str] = set()
    for j in range(files.x.n_columns):
        found = _factor_function(files.x.values[:, j], files.x.tolerance(j), view, names)
        if found is not None:
            out.update(found[0])
    return out


def _only_a_new_factor(req: Request, files: Files, table: PreparedTable, claimed: np.ndarray,
                       matched: Matched) -> list[str]:
    """The factors the columns already code in table order, when the reordering keeps every row at its levels
    of them and explains the other columns by a further table column, with the factors chosen by the audit and
    no covariate evidence: a column coding something that is not in the table fits as well.  Else []."""
    if table.explicit_factors or req.spec is not None or matched.covariate is not None:
        return []
    coded = _coded_in_order(files, table, claimed) & set(matched.factors)
    if not coded or set(matched.factors) <= coded:
        return []
    view = table.view(claimed)
    moved = np.flatnonzero(matched.order != np.arange(matched.order.size))
    if all((view.codes[f][moved] == matched.row_codes[f][moved]).all() for f in coded):
        return [f for f in matched.factors if f in coded]
    return []


def _maybe_out_of_place(req: Request, matched: Matched, kept: list[str]) -> AuditFinding:
    """A warning: rows reordered within levels, or a column of something the table does not hold."""
    tname = req.participants.name
    new = " x ".join(f for f in matched.factors if f not in kept)
    return AuditFinding(
        "warning", "rows_out_of_place",
        f"{req.design.name}: the columns left unexplained in {tname} order would code {new} if rows were reordered "
        f"within the levels of {', '.join(kept)}; either those rows are out of place or the columns code "
        f"something that is not in {tname}: give --factors to say what the design codes (the rest of this "
        "report reads the rows in table order)", "rows")


def image_alignment(req: Request, table: PreparedTable, claimed: np.ndarray) -> np.ndarray | None:
    """The table row of every image in ``--images``, when each line names one of the design's participants."""
    if req.images is None:
        return None
    try:
        entries = read_image_list(req.images)
    except TableError:  # an unreadable list is reported by the image checks
        return None
    ids = table.ids
    at = {ids[t]: t for t in claimed.tolist()}
    found = [participant_in_path(p) for _, p in entries]
    if len(found) != claimed.size or any(pid not in at for pid in found) or len(set(found)) != len(found):
        return None
    return np.array([at[pid] for pid in found], dtype=int)  # type: ignore[index]


def _follows_images(req: Request, table: PreparedTable, claimed: np.ndarray, images: np.ndarray) -> AuditFinding:
    """Design and image list agree with each other, in another order than the table: a note."""
    assert req.images is not None
    view = table.view(claimed)
    position = {int(t): k for k, t in enumerate(claimed)}
    order = np.array([position[int(t)] for t in images])
    keys = {f: (view.codes[f][order], view.codes[f]) for f in view.factors}
    order, fam = simplest_family(order, np.arange(order.size), keys)
    what = family_text(fam, order, [table.ids[t] for t in claimed], view.factors)
    tname = req.participants.name
    return AuditFinding(
        "note", "rows_follow_images",
        f"{req.design.name} follows {req.images.name}, not {tname}: read with the participant id of each image, "
        f"the rows match the participants, and {what}; the design and the images agree with each other, so a "
        f"fit of the two together pairs every image with its own row; {tname} lists the participants in "
        "another order (the rest of this report reads the rows in the images' order)", "rows")


def _basis(matched: Matched, view: TableView) -> str:
    moved = np.flatnonzero(matched.order != np.arange(matched.order.size))
    cells_differ = any((view.codes[f][moved] != matched.row_codes[f][moved]).any() for f in matched.factors)
    if matched.covariate and cells_differ:
        return f"factor levels and {matched.covariate} values"
    if matched.covariate:
        return f"{matched.covariate} values"
    return "factor levels"


def _out_of_place(req: Request, table: PreparedTable, claimed: np.ndarray, matched: Matched,
                  images: np.ndarray | None) -> AuditFinding:
    """The error: what happened to the rows, and the table row of each design row."""
    tname = req.participants.name
    view = table.view(claimed)
    ids_at = [table.ids[t] for t in claimed]
    fam, order = matched.family, matched.order
    lead = f"{req.design.name}: the rows match the participants' {_basis(matched, view)} only after reordering"
    tail = f"put the rows in {tname} order or add a participant_id column (the rest of this report reads them " \
           "reordered)"
    if fam.kind in ("swap", "swaps") and len(fam.pairs) <= 3:
        rows = [r for pair in fam.pairs for r in pair]
        if matched.factors and all(any(view.codes[f][r] != matched.row_codes[f][r] for f in matched.factors)
                                   for r in rows):
            lead = f"{req.design.name}: the rows match the participants' factor levels only after reordering"
        return AuditFinding("error", "rows_out_of_place", f"{lead} ({family_text(fam, order, ids_at, view.factors)})"
                            f": {_coded_as(fam, matched, view, ids_at)}; {tail}", "rows")
    what = family_text(fam, order, ids_at, view.factors)
    numbers = runs_text([int(claimed[k]) + 1 for k in order])
    parts = [f"{lead}: {what}; {tname} lists the participants in another order",
             f"the {tname} row of each design row is {numbers}"]
    if matched.others:
        parts.append(f"the factor columns fit {' or '.join(matched.others)} equally well (the design may code "
                     "that instead): give --factors to say which")
    if not matched.exact:
        parts.append("rows of one cell cannot be told apart without ids or a covariate column, so the table "
                     "order is assumed within each cell")
    if images is not None and np.array_equal(images, claimed):
        parts.append(f"{req.images.name if req.images else 'the image list'} follows {tname}, so every moved row's "
                     "image would be fitted with another participant's design row")
    return AuditFinding("error", "rows_out_of_place", "; ".join(parts + [tail]), "rows")


def _coded_as(fam: Family, matched: Matched, view: TableView, ids_at: list[str]) -> str:
    """For a few swapped rows: each row's participant and cell, and the cell its coding says."""
    texts = []
    fs = matched.factors
    for i, j in fam.pairs:
        for r in (i, j):
            own = ", ".join(f"{f}={view.factors[f][view.codes[f][r]]}" for f in fs)
            coded = ", ".join(f"{f}={view.factors[f][matched.row_codes[f][r]]}" for f in fs)
            if fs and own != coded:
                texts.append(f"row {r + 1} ({ids_at[r]}, {own}) is coded as {coded}")
            else:
                texts.append(f"row {r + 1} ({ids_at[r]}) has the {matched.covariate} of {ids_at[matched.order[r]]}")
    return listing(texts, "; ")
