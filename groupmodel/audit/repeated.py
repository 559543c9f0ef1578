"""Several images per participant in one hand-written design (part of ``groupmodel check``).

A design for a study with sessions or conditions is sometimes written with every image as a row of one OLS
model: the participant ids repeated, one indicator column per participant, or the rows simply repeated per
session.  A between-participant effect (a group, a covariate) tested there has the wrong error term and the
wrong degrees of freedom: the images of one participant are not independent, and the effect must be tested
against the variation between participants, on ``participants - rank`` of the between-participant design
(the participant-average analysis of the classical split-plot design).  This module recognises the layout
and says so once, with the df used and the right df.

The participant of every row is found (in this order) from

1. a ``participant_id`` column in which most participants appear more than once;
2. indicator columns of single participants: 0/1 columns with few ones, no two in the same row, together
   marking at least half the participants, in a design with more rows than marked participants;
3. with neither, and exactly ``k`` (2 or more) times as many rows as participants: rows repeated in blocks
   (all first images in table order, then all second images) or one after the other, where the columns that
   are the same in every row of a participant code the participants' factors and covariates of the table.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..engine.linalg import RowSpace, matrix_rank
from .context import Files, Request
from .read import AuditFinding, listing
from .table_view import PreparedTable

__all__ = ["Grouping", "find_grouping", "repeated_finding"]

#: Fewest participants with several rows for the layout to read as repeated measures.
MIN_GROUPS = 3


@dataclass(frozen=True)
class Grouping:
    """The participant (0..P-1) of every design row, how it was found, and the participant columns."""

    group: np.ndarray
    labels: tuple[str, ...]
    how: str
    participant_columns: tuple[int, ...]

    @property
    def n_participants(self) -> int:
        return len(self.labels)


def _ranges(cols: list[int]) -> str:
    """1-based column numbers with runs written as ``3-14``."""
    out: list[str] = []
    start = prev = None
    for c in [*cols, None]:
        if c is not None and prev is not None and c == prev + 1:
            prev = c
            continue
        if start is not None:
            out.append(f"{start + 1}" if start == prev else f"{start + 1}-{prev + 1}")
        start = prev = c
    return ", ".join(out)


def _by_ids(files: Files) -> Grouping | None:
    ids = files.x.ids
    if ids is None:
        return None
    order = list(dict.fromkeys(ids))
    counts = {p: ids.count(p) for p in order}
    repeated = [p for p in order if counts[p] > 1]
    if len(repeated) < MIN_GROUPS - 1 or 2 * len(repeated) < len(order):
        return None  # one or two ids typed twice: duplicate rows, not repeated measures
    pos = {p: i for i, p in enumerate(order)}
    ks = sorted(set(counts.values()))
    if len(repeated) == len(order):
        each = f"each on {ks[0]} rows" if len(ks) == 1 else f"each on {ks[0]} to {ks[-1]} rows"
    else:
        each = f"{len(repeated)} of them on {ks[-1] if len(ks) == 2 else f'2 to {ks[-1]}'} rows"
    how = f"its participant_id column names {len(order)} participants, {each}"
    return Grouping(np.array([pos[p] for p in ids]), tuple(order), how, ())


def _indicator_columns(x: np.ndarray, most: int) -> list[int]:
    """0/1 columns with 2..``most`` ones, no two with a one in the same row (None if any two overlap)."""
    cand = [j for j in range(x.shape[1]) if np.isin(x[:, j], (0.0, 1.0)).all() and 2 <= x[:, j].sum() <= most]
    if not cand:
        return []
    if (x[:, cand].sum(axis=1) > 1).any():
        return []
    return cand


def _by_indicators(files: Files, table: PreparedTable) -> Grouping | None:
    x = files.x.values
    n, n_table = x.shape[0], len(table.ids)
    cols = _indicator_columns(x, max(2, (2 * n) // max(n_table, 1)))
    none = x[:, cols].sum(axis=1) == 0 if cols else np.ones(n, dtype=bool)
    n_groups = len(cols) + int(none.any())
    if len(cols) < MIN_GROUPS or 2 * n_groups < n_table or n_groups > n_table or n <= n_table \
            or n < 1.5 * n_groups or none.sum() > (2 * n) // n_table:
        return None
    group = np.full(n, len(cols))
    for g, j in enumerate(cols):
        group[x[:, j] == 1] = g
    # participants numbered in order of their first row
    first = {g: int(np.flatnonzero(group == g)[0]) for g in np.unique(group)}
    rank = {g: r for r, g in enumerate(sorted(first, key=first.get))}
    group = np.array([rank[g] for g in group])
    how = f"columns {_ranges(cols)} each mark the rows of one participant"
    return Grouping(group, tuple(f"participant {g + 1}" for g in range(n_groups)), how, tuple(cols))


def _between_columns(x: np.ndarray, group: np.ndarray, skip: tuple[int, ...]) -> list[int]:
    """Columns with one value in all rows of each participant (participant columns left out)."""
    out = []
    for j in range(x.shape[1]):
        if j in skip:
            continue
        col = x[:, j]
        scale = max(1.0, float(np.abs(col).max()))
        if all(np.ptp(col[group == g]) <= 1e-9 * scale for g in np.unique(group)):
            out.append(j)
    return out


def _participant_rows(group: np.ndarray) -> np.ndarray:
    return np.array([int(np.flatnonzero(group == g)[0]) for g in range(int(group.max()) + 1)])


def _by_layout(files: Files, table: PreparedTable, expected: np.ndarray) -> Grouping | None:
    """No ids and no participant columns: rows repeated in blocks or one after the other."""
    from .columns import columns_explained

    x = files.x
    n, n_part = x.n_rows, len(expected)
    if n_part < MIN_GROUPS or n % n_part or n // n_part < 2:
        return None
    k = n // n_part
    layouts = (("in blocks (all participants in table order, then all again)", np.arange(n) % n_part),
               ("one after the other (each participant's rows together)", np.arange(n) // k))
    for words, group in layouts:
        between = _between_columns(x.values, group, ())
        varying = [j for j in between if np.ptp(x.values[:, j]) > 0]
        if not varying:
            continue
        rows = _participant_rows(group)
        sub = dataclasses.replace(x, values=x.values[np.ix_(rows, between)], digits=x.digits[np.ix_(rows, between)],
                                  lines=[x.lines[r] for r in rows], ids=None,
                                  names=[x.names[j] for j in between] if x.names else None)
        if columns_explained(dataclasses.replace(files, x=sub), table, expected) == len(between):
            how = f"it has {k} rows per participant of the table, {words}"
            return Grouping(group, tuple(table.ids[t] for t in expected), how, ())
    return None


def find_grouping(req: Request, files: Files, table: PreparedTable, expected: np.ndarray) -> Grouping | None:
    """The participant of every row when the design has several rows per participant (None: it has not)."""
    del req
    found = _by_ids(files) if files.x.ids is not None else \
        _by_indicators(files, table) or _by_layout(files, table, expected)
    if found is None or found.participant_columns:
        return found
    # participant indicator columns beside participant ids: the columns with ones on exactly one participant
    x = files.x.values
    cols = tuple(j for j in range(x.shape[1]) if np.isin(x[:, j], (0.0, 1.0)).all() and x[:, j].any()
                 and len(np.unique(found.group[x[:, j] == 1])) == 1
                 and (x[found.group == found.group[x[:, j] == 1][0], j] == 1).all())
    return dataclasses.replace(found, participant_columns=cols) if len(cols) >= MIN_GROUPS else found


def _between_contrasts(files: Files, between: list[int]) -> list[int] | None:
    """Contrast rows with weights only on between-participant columns (None: no usable contrast file)."""
    c = files.c
    if c is None or c.n_columns != files.x.n_columns:
        return None
    allowed = np.zeros(c.n_columns, dtype=bool)
    allowed[between] = True
    return [i for i in range(c.n_rows)
            if np.isfinite(c.values[i]).all() and np.any(c.values[i]) and not np.any(c.values[i][~allowed])]


def _df_parts(x: np.ndarray, grouping: Grouping, between: list[int]) -> tuple[int, int, int, int]:
    """Residual df of the images as independent (and its rank), and the right df (and the between rank)."""
    keep = [j for j in range(x.shape[1]) if j not in grouping.participant_columns]
    ones = np.ones((x.shape[0], 1))
    naive = np.hstack([ones, x[:, keep]]) if grouping.participant_columns else x[:, keep]
    rank = matrix_rank(naive)
    rows = _participant_rows(grouping.group)
    has_constant = matrix_rank(np.hstack([x, ones])) == matrix_rank(x)
    b = x[np.ix_(rows, between)]
    if has_constant:
        b = np.hstack([ones[: len(rows)], b])
    rank_b = matrix_rank(b) if b.size else 0
    return x.shape[0] - rank, rank, grouping.n_participants - rank_b, rank_b


@dataclass(frozen=True)
class _Parts:
    """The columns of a repeated-measures design by role, and the df used and the right df."""

    between: list[int]
    varying: list[int]
    within: list[int]
    used: int
    rank: int
    right: int
    rank_b: int


def _parts(x: np.ndarray, grouping: Grouping) -> _Parts:
    between = _between_columns(x, grouping.group, grouping.participant_columns)
    varying = [j for j in between if np.ptp(x[:, j]) > 0]
    within = [j for j in range(x.shape[1]) if j not in between and j not in grouping.participant_columns]
    return _Parts(between, varying, within, *_df_parts(x, grouping, between))


def _body(files: Files, grouping: Grouping, parts: _Parts) -> tuple[str, str]:
    """What goes wrong, in words, and the severity."""
    x, labels, c = files.x.values, files.labels, files.c
    n, n_part = x.shape[0], grouping.n_participants
    rows = _between_contrasts(files, parts.between)
    cols = ", ".join(labels[j] for j in parts.varying) or "the intercept"
    df_words = (f"{parts.used} residual df ({n} rows - rank {parts.rank}), as if the {n} images were independent, "
                f"where the right df is {parts.right} ({n_part} participants - rank {parts.rank_b} of the "
                "between-participant design)")
    if rows and c is not None:
        which = [f"contrast row {i + 1} ({c.path.name} line {c.lines[i]})" for i in rows]
        subject, tested = listing(which) + (" tests" if len(which) == 1 else " test"), c.values[rows]
    elif rows is None and parts.varying:
        subject = f"the between-participant column{'s' * (len(parts.varying) != 1)} ({cols}) would test"
        tested = _unit_rows(x.shape[1], parts.varying)
    elif grouping.participant_columns:
        return "; no contrast tests a between-participant effect", "note"
    else:
        return ("; no contrast tests a between-participant effect, but with the images as independent the "
                "differences between participants stay in the error term of every test"), "error"
    if not grouping.participant_columns:
        return (f"; {subject} a between-participant effect ({cols}: one value per participant), which then has the "
                "wrong error term (the residual between images instead of the variation between participants) "
                f"and the wrong df: {df_words}"), "error"
    estimable = bool(RowSpace.of(x).contains(tested).all())
    return (f"; {subject} a between-participant effect ({cols}: one value per participant), which the "
            f"participant columns {'absorb' if not estimable else 'confound'}: it is "
            f"{'not estimable' if not estimable else 'tested against the wrong error term'} in this model, "
            f"and without the participant columns it has the wrong error term and the wrong df: {df_words}"), "error"


def repeated_finding(req: Request, files: Files, grouping: Grouping) -> AuditFinding:
    """One finding: several images per participant in one model, the df used and the right df, the fix."""
    x = files.x.values
    n, n_part = x.shape[0], grouping.n_participants
    parts = _parts(x, grouping)
    head = (f"repeated measures: {req.design.name} has {n} rows for {n_part} participants ({grouping.how}): "
            "several images per participant in one model")
    body, severity = _body(files, grouping, parts)
    within = ", ".join(files.labels[j] for j in parts.within)
    fix = ("; give the model a spec instead: \"observations\": \"observations.tsv\" (tab-separated, one row per "
           "image with participant_id and the within-participant columns such as session) and \"within\": true on "
           f"each within-participant factor{f' (here the factor coded in {within})' if within else ''}: "
           "each hypothesis is then tested in its error stratum: between-participant effects in the between "
           f"stratum on each participant's average over the within cells ({parts.right} df), within-participant "
           "effects in the within stratum on each participant's within contrasts (README: Within-participant "
           f"factors); or average each participant's images and give one row per participant ({n_part} rows)")
    return AuditFinding(severity, "repeated_measures", head + body + fix, "rows")  # type: ignore[arg-type]


def _unit_rows(p: int, cols: list[int]) -> np.ndarray:
    out = np.zeros((max(len(cols), 1), p))
    for i, j in enumerate(cols):
        out[i, j] = 1.0
    return out
