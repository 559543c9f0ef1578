"""Which participant every row of a hand-written design is (part of ``groupmodel check``).

Rows follow the participants table (after the spec's exclusions, or after rows with n/a when that makes the
count fit) unless the design has a ``participant_id`` column.  With one row too many or too few and no ids,
every position is tried for the missing or extra row; extra rows are sought among the participants the spec
leaves out and among rows that repeat the row before them.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations

import numpy as np

from ..model.table import MISSING
from .context import Files, Request
from .read import AuditFinding, listing
from .table_view import PreparedTable, TableChoice, prepare_table

#: Designs up to this many rows get a search for the one missing or extra row when the count is off by one.
GUESS_MAX_ROWS = 400


@dataclass(frozen=True)
class Alignment:
    """The table prepared for the audit, and the table row of every design row as the file claims it.

    ``claimed`` is None when the rows could not be matched to participants (the checks that need the table
    are then skipped); -1 marks a design row with no participant.
    """

    table: PreparedTable
    claimed: np.ndarray | None
    findings: tuple[AuditFinding, ...]


def _rows(message: str, code: str, severity: str = "error") -> AuditFinding:
    return AuditFinding(severity, code, message, "rows")  # type: ignore[arg-type]


def table_choice(req: Request, files: Files) -> TableChoice:
    """The factor and covariate columns given (or the spec's), with the spec's levels and scores."""
    spec, sample = req.spec, files.sample
    factors = list(req.factors) if req.factors is not None else None
    covariates = list(req.covariates) if req.covariates is not None else None
    if factors is None and spec is not None:
        factors = list(spec.model_factors())
    if covariates is None and spec is not None:
        covariates = list(spec.model_covariates())
    spec_scores = None
    if spec is not None:
        spec_scores = {f: fs.scores for f, fs in spec.factors.items() if fs.scores is not None}
    return TableChoice(factors, covariates, sample.levels if sample is not None else None, spec_scores)


def align_rows(req: Request, files: Files) -> Alignment:
    """Which table row every design row is, with the findings on rows."""
    choice = table_choice(req, files)
    repeated = _repeated(req, files, choice)
    if repeated is not None:
        return repeated
    if files.x.ids is not None:
        return _align_by_ids(req, files, choice)
    return _align_by_order(req, files, choice)


def _repeated(req: Request, files: Files, choice: TableChoice) -> Alignment | None:
    """Several rows per participant (repeated measures): one finding, and the checks that need one row per
    participant skipped (see :mod:`groupmodel.audit.repeated`)."""
    from .repeated import find_grouping, repeated_finding

    ids = files.frame["participant_id"].tolist()
    if files.x.ids is not None:
        pos = {p: i for i, p in enumerate(ids)}
        expected = np.array(sorted({pos[p] for p in files.x.ids if p in pos}), dtype=int)
    else:
        sample_rows = _sample_rows(files)
        expected = sample_rows if sample_rows is not None else np.arange(len(ids))
    candidates = [expected]
    if files.x.ids is None and files.sample is None and (choice.factors or choice.covariates):
        alt = _drop_missing(files, choice.factors, choice.covariates)
        if alt is not None and len(alt[0]) < len(expected):
            candidates.append(alt[0])  # the participants without n/a in the columns named
    for rows in candidates:
        table = prepare_table(files.frame, req.participants, choice, rows)
        grouping = find_grouping(req, files, table, rows)
        if grouping is not None:
            return Alignment(table, None, (repeated_finding(req, files, grouping),))
    return None


def _sample_rows(files: Files) -> np.ndarray | None:
    if files.sample is None:
        return None
    return np.array(files.sample.data["row"].tolist(), dtype=int) - 1


def _align_by_ids(req: Request, files: Files, choice: TableChoice) -> Alignment:
    """Rows named by a participant_id column."""
    x, frame = files.x, files.frame
    assert x.ids is not None
    ids = frame["participant_id"].tolist()
    pos = {p: i for i, p in enumerate(ids)}
    tname = req.participants.name
    found: list[AuditFinding] = []
    align = np.full(x.n_rows, -1)
    unknown = []
    seen: dict[str, int] = {}
    for i, pid in enumerate(x.ids):
        if pid in seen:
            found.append(_rows(f"{x.where(i)}: participant_id {pid} already names row {seen[pid] + 1}; "
                               "give each participant one row", "duplicate_participant"))
            continue
        seen[pid] = i
        if pid in pos:
            align[i] = pos[pid]
        else:
            unknown.append(f"row {i + 1} ({pid})")
    if unknown:
        found.append(_rows(f"{req.design.name}: participant_id not in {tname}: {listing(unknown)}; "
                           "fix the ids or add the participants to the table", "unknown_participant"))
    found.extend(_against_sample(req, files, align, ids))
    table = prepare_table(frame, req.participants, choice, align[align >= 0])
    return Alignment(table, align.astype(int), tuple(found))


def _against_sample(req: Request, files: Files, align: np.ndarray, ids: list[str]) -> list[AuditFinding]:
    """Design rows named by id against the spec's sample (or, without a spec, the participants left out)."""
    tname = req.participants.name
    sample_rows = _sample_rows(files)
    in_design = set(align[align >= 0].tolist())
    if sample_rows is None:
        absent = [ids[t] for t in range(len(ids)) if t not in in_design]
        if absent:
            return [_rows(f"{len(absent)} participant(s) of {tname} have no design row: {listing(absent)}",
                          "not_in_design", "note")]
        return []
    missing = [ids[t] for t in sample_rows if t not in in_design]
    reasons = {e.participant_id: e.reason for e in files.sample.exclusions} if files.sample else {}
    in_sample = set(sample_rows.tolist())
    extra = [f"{ids[t]} ({reasons.get(ids[t], 'left out')})" for t in align[align >= 0] if t not in in_sample]
    if not (missing or extra):
        return []
    parts = []
    if missing:
        parts.append(f"missing {len(missing)} participant(s) the spec includes: {listing(missing)}")
    if extra:
        parts.append(f"has {len(extra)} the spec leaves out: {listing(extra)}")
    return [_rows(f"{req.design.name} has {files.x.n_rows} rows, {req.spec_path.name if req.spec_path else ''} "
                  f"includes {len(sample_rows)} participants of {tname}: it " + "; it ".join(parts)
                  + "; make the design rows the spec's participants", "row_count")]


def _align_by_order(req: Request, files: Files, choice: TableChoice) -> Alignment:
    """No ids: rows follow the table (after the spec's exclusions, or after n/a rows if that fits)."""
    x, frame = files.x, files.frame
    ids = frame["participant_id"].tolist()
    n = x.n_rows
    tname = req.participants.name
    found: list[AuditFinding] = []
    sample_rows = _sample_rows(files)
    if sample_rows is not None:
        expected = sample_rows
        how = f"{req.spec_path.name if req.spec_path else 'the spec'} includes {len(expected)} " \
              f"participants of {tname}"
    else:
        expected = np.arange(len(frame))
        how = f"{tname} has {len(expected)} participants"
        if n != len(expected):
            alt = _drop_missing(files, choice.factors, choice.covariates)
            if alt is not None and len(alt[0]) == n:
                expected, cols = alt
                dropped = [ids[t] for t in range(len(frame)) if t not in set(expected.tolist())]
                found.append(_rows(f"{req.design.name} has {n} rows: it matches {tname} with the "
                                   f"{len(dropped)} row(s) that have n/a in {', '.join(cols)} left out "
                                   f"({listing(dropped)})", "rows_after_na", "note"))
    table = prepare_table(frame, req.participants, choice, expected)
    if n == len(expected):
        return Alignment(table, np.asarray(expected, dtype=int), tuple(found))
    diff = n - len(expected)
    words = f"{abs(diff)} row{'s' * (abs(diff) != 1)} {'too many' if diff > 0 else 'too few'}"
    message = f"{req.design.name} has {n} rows, but {how}: {words}"
    fix = "; give one row per participant in table order, or add a participant_id column"
    # One row too many or too few: try every position (a few hundred quick identifications at most).
    guess = _guess_one(req, files, table, np.asarray(expected)) if abs(diff) == 1 and n <= GUESS_MAX_ROWS \
        else None
    if guess is None and diff > 0 and n <= GUESS_MAX_ROWS:
        located = _locate_extra(req, files, table, np.asarray(expected))
        if located is not None:  # its text ends with the fix
            found.append(_rows(message + f"; {located[1]}", "row_count"))
            return Alignment(table, located[0], tuple(found))
    if guess is None:
        found.append(_rows(message + fix + "; the checks that need the table (columns, cells, contrast "
                           "statements) were skipped", "row_count"))
        return Alignment(table, None, tuple(found))
    align, text = guess
    found.append(_rows(message + f"; {text}" + fix, "row_count"))
    return Alignment(table, np.asarray(align, dtype=int), tuple(found))


def _drop_missing(files: Files, factors: list[str] | None, covariates: list[str] | None
                  ) -> tuple[np.ndarray, list[str]] | None:
    """Table rows without n/a in the given columns (or, with none given, in some set of columns)."""
    frame = files.frame
    na = {c: frame[c].isin(MISSING).to_numpy() for c in frame.columns if c != "participant_id"}
    given = list(factors or []) + list(covariates or [])
    if given:
        cols = [c for c in given if c in na]
        bad = np.zeros(len(frame), dtype=bool)
        for c in cols:
            bad |= na[c]
        return np.flatnonzero(~bad), [c for c in cols if na[c].any()]
    with_na = [c for c in na if na[c].any()]
    target = files.x.n_rows
    found: dict[tuple[int, ...], list[str]] = {}
    for k in range(1, min(len(with_na), 5) + 1):
        for cols in combinations(with_na, k):
            bad = np.zeros(len(frame), dtype=bool)
            for c in cols:
                bad |= na[c]
            if (~bad).sum() == target:
                found.setdefault(tuple(np.flatnonzero(~bad).tolist()), list(cols))
    if len(found) == 1:
        rows, cols = next(iter(found.items()))
        return np.array(rows, dtype=int), cols
    return None


def _guess_one(req: Request, files: Files, table: PreparedTable, expected: np.ndarray
               ) -> tuple[np.ndarray, str] | None:
    """With one row too many or too few and no ids: the single row whose removal explains every column."""
    x = files.x
    n, p = x.values.shape
    ids = table.ids
    best: list[tuple[int, np.ndarray]] = []
    if n == len(expected) - 1:
        for t in range(len(expected)):
            align = np.delete(expected, t)
            if _score(files, table, align) == p:
                best.append((t, align))
        if len(best) == 1:
            t, align = best[0]
            pid = ids[expected[t]]
            return align, f"the rows match the participants if {pid} ({req.participants.name} row " \
                          f"{expected[t] + 1}) is the one left out"
    elif n == len(expected) + 1:
        for d in range(n):
            align = np.insert(expected, d, -1)
            if _score(files, table, align) == p:
                best.append((d, align))
        if len(best) == 1:
            d, align = best[0]
            return align, f"the rows match the participants if design row {d + 1} " \
                          f"({req.design.name} line {x.lines[d]}) is dropped"
    return None


def _locate_extra(req: Request, files: Files, table: PreparedTable, expected: np.ndarray
                  ) -> tuple[np.ndarray, str] | None:
    """Extra rows that are the participants the spec leaves out, or rows that repeat the row before them."""
    x = files.x
    n, p = x.values.shape
    ids = table.ids
    if files.sample is not None and n == len(files.frame):
        kept = set(expected.tolist())
        align = np.array([t if t in kept else -1 for t in range(n)], dtype=int)
        if _score(files, table, align) == p:
            reasons = {e.participant_id: e.reason for e in files.sample.exclusions}
            extra = [f"row {t + 1} ({ids[t]}: {reasons.get(ids[t], 'left out')})" for t in range(n) if align[t] < 0]
            return align, (f"the design has a row for every participant of {req.participants.name}, including "
                           f"the {len(extra)} the spec leaves out: {listing(extra)}; delete those rows")
    repeats = [d for d in range(1, n) if np.array_equal(x.values[d], x.values[d - 1])]
    if len(repeats) == n - len(expected):
        align = np.full(n, -1)
        align[[d for d in range(n) if d not in repeats]] = expected
        if _score(files, table, align) == p:
            dup = [f"row {d + 1} ({req.design.name} line {x.lines[d]}) repeats row {d} ({ids[align[d - 1]]})"
                   if align[d - 1] >= 0 else f"row {d + 1} repeats row {d}" for d in repeats]
            return align, f"{listing(dup)}: delete the repeated row{'s' * (len(dup) != 1)}"
    return None


def _score(files: Files, table: PreparedTable, align: np.ndarray) -> int:
    """How many columns a quick identification explains (see :func:`groupmodel.audit.columns.columns_explained`)."""
    from .columns import columns_explained

    return columns_explained(files, table, align)
