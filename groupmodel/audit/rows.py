"""The report section on rows: which participant every row is, rows out of place, image lists.

Part of ``groupmodel check`` (see :mod:`groupmodel.audit`).  The alignment itself is
:mod:`groupmodel.audit.align`, the order check :mod:`groupmodel.audit.order`; this module gathers their findings
and adds the rows whose table entry is n/a and the checks of an image list against the participant ids in its
paths.
"""

from __future__ import annotations

import numpy as np

from .context import AuditContext
from .read import AuditFinding, listed_file, listing, participant_in_path, read_image_list


def _rows(severity: str, code: str, message: str) -> AuditFinding:
    return AuditFinding(severity, code, message, "rows")  # type: ignore[arg-type]


def row_and_image_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Rows against the participants (alignment, order, n/a entries), then the image list."""
    out: list[AuditFinding] = []
    if ctx.alignment is not None:
        out.extend(ctx.alignment.findings)
    if ctx.columns is not None:
        out.extend(ctx.columns.order_findings)
        out.extend(missing_value_findings(ctx))
    if ctx.request.images is not None:
        out.extend(image_findings(ctx))
    return out


def missing_value_findings(ctx: AuditContext) -> list[AuditFinding]:
    """Design rows of participants whose entry in a column the design uses is n/a: an error."""
    assert ctx.columns is not None and ctx.alignment is not None and ctx.alignment.claimed is not None
    table = ctx.columns.table
    ids = table.ids
    problems = []
    for i, t in enumerate(ctx.columns.align):  # the rows' participants, after any reordering found
        if t < 0:
            continue
        cols = [f for f in ctx.columns.factors if table.codes[f][t] < 0] + [
            c for c in ctx.columns.covariates if not np.isfinite(table.covariates[c][t])]
        if cols:
            problems.append(f"row {i + 1} ({ids[t]}: {', '.join(cols)})")
    if not problems:
        return []
    return [_rows("error", "missing_value_row",
                  f"{ctx.request.design.name}: design rows of participants whose "
                  f"{ctx.request.participants.name} entry is n/a: {listing(problems)}; the design gives them "
                  "values the table does not have: leave them out or fill in the table")]


def _claimed_ids(ctx: AuditContext) -> list[str] | None:
    """The participant of every design row as the design file claims it (None: not known)."""
    x = ctx.files.x
    if x.ids is not None:
        return list(x.ids)
    if ctx.columns is not None and ctx.columns.follows_images:
        ids = ctx.columns.table.ids
        return [ids[t] for t in ctx.columns.align]
    if ctx.alignment is not None and ctx.alignment.claimed is not None:
        ids = ctx.alignment.table.ids
        return [ids[t] if t >= 0 else "?" for t in ctx.alignment.claimed]
    return None


def image_findings(ctx: AuditContext) -> list[AuditFinding]:
    """An image list against the design rows: counts, order, ids in the paths, files that do not exist."""
    path = ctx.request.images
    assert path is not None
    entries = read_image_list(path)
    name = path.name
    n = ctx.files.x.n_rows
    claimed = _claimed_ids(ctx)
    if claimed is None:
        return [_rows("note", "images_unchecked",
                      f"{name}: the design rows could not be matched to participants, so the image order was not "
                      "checked")]
    out: list[AuditFinding] = []
    found = [(ln, p, participant_in_path(p)) for ln, p in entries]
    no_id = [f"line {ln}" for ln, _, pid in found if pid is None]
    if no_id:
        out.append(_rows("warning", "image_no_id",
                         f"{name}: no participant id (sub-<label>) in the path at {listing(no_id)}, so the order of "
                         "those images cannot be checked; name the files with the BIDS sub-<label>"))
    claimed_set = set(claimed)
    listed = {pid for _, _, pid in found if pid}
    extra = [f"line {ln} ({pid})" for ln, _, pid in found if pid and pid not in claimed_set]
    absent = [f"row {i + 1} ({pid})" for i, pid in enumerate(claimed) if pid not in listed]
    if len(entries) != n or extra or absent:
        parts = []
        if extra:
            parts.append(f"images of participants with no design row at {listing(extra)}")
        if absent:
            parts.append(f"no image for design {listing(absent)}")
        detail = ": " + "; ".join(parts) if parts else ""
        out.append(_rows("error", "image_count",
                         f"{name} lists {len(entries)} images, the design has {n} rows{detail}; list one image per "
                         "design row, in row order"))
    # Order: the images of design participants against the design rows of listed participants.
    seq = [(ln, pid) for ln, _, pid in found if pid in claimed_set]
    rows = [(i, pid) for i, pid in enumerate(claimed) if pid in listed]
    wrong = [f"line {ln} is {pid} but design row {i + 1} is {want}"
             for (ln, pid), (i, want) in zip(seq, rows, strict=False) if pid != want]
    if wrong:
        out.append(_rows("error", "image_order",
                         f"{name} does not follow the design rows (the same participants in another order): "
                         f"{listing(wrong)}; list the images in design-row order"))
    missing = [f"line {ln}" for ln, p in entries if listed_file(path, p) is None]
    if missing:
        out.append(_rows("note", "image_missing",
                         f"{name}: {len(missing)} listed image(s) do not exist (relative to the current folder or to "
                         f"{name}'s folder): {listing(missing)}"))
    if not wrong and not extra and not absent and len(entries) == n and not no_id:
        out.append(_rows("note", "image_order_ok",
                         f"{name}: the participant id in every image path matches its design row"))
    return out
