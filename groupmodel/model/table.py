"""Read ``participants.tsv`` and select the observations a model uses.

Every value is read as text first (so numeric-looking factor levels stay
strings, e.g. ``"0.5"``); covariates are converted to numbers afterwards with
an error naming the row and column of any text that is not a number.  Rows are
left out for three reasons only -- the spec's ``exclude`` list, its ``include``
filter, or a missing value (``n/a``) in a column the model reads -- and each
left-out row is listed with its reason.  Nothing vanishes silently.
"""

from __future__ import annotations

import csv
import hashlib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import SpecError, TableError
from .jsonfile import decode_utf8, read_json
from .spec import ModelSpec

#: Values read as missing.  ``n/a`` is the BIDS marker; an empty field is not valid BIDS but means the same.
MISSING = ("n/a", "")


@dataclass(frozen=True)
class Exclusion:
    """One left-out row of the table.

    ``row`` is the 1-based data row in the file (the header is row 0).
    """

    participant_id: str
    row: int
    reason: str

    def as_dict(self) -> dict[str, object]:
        return {"participant_id": self.participant_id, "row": self.row, "reason": self.reason}


@dataclass(frozen=True)
class Sample:
    """The observations a model is fitted to, and the account of who was left out.

    Attributes
    ----------
    data : pandas.DataFrame
        One row per included observation, in table order, with ``participant_id``, a ``row`` column (1-based
        data row in the file), factor columns as text and covariate / outcome columns as float64.
    table : pandas.DataFrame
        The whole participants table as read (every row, every column, as text): later steps (image paths,
        exchangeability blocks, rebuilding with further exclusions) take what they need from here instead of
        reading the file again.
    sidecar_levels, numeric_columns, extra_exclusions
        What the selection was made with, so that it can be made again with more exclusions
        (:func:`select_sample` with ``sample=``).
    exclusions : tuple of Exclusion
        Every left-out row with its reason, in table order.
    levels : dict
        Factor name -> its levels in declared order (after dropping undeclared-but-unobserved ones).
    notes : list of str
        Remarks on how levels were chosen (printed as notes).
    """

    data: pd.DataFrame
    exclusions: tuple[Exclusion, ...]
    levels: dict[str, tuple[str, ...]]
    source: Path
    notes: list[str] = field(default_factory=list)
    table: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["participant_id"]), repr=False,
                                compare=False)
    sidecar_levels: dict[str, tuple[str, ...]] = field(default_factory=dict, repr=False)
    numeric_columns: tuple[str, ...] = ()
    extra_exclusions: dict[str, str] = field(default_factory=dict)
    #: With an observations table: the participants and observations tables as read (``table`` is then the
    #: observations joined to the participants, one row per image); None otherwise.
    participants_table: pd.DataFrame | None = field(default=None, repr=False, compare=False)
    observations_table: pd.DataFrame | None = field(default=None, repr=False, compare=False)

    @property
    def n(self) -> int:
        return len(self.data)

    @property
    def participant_ids(self) -> list[str]:
        return self.data["participant_id"].tolist()

    @property
    def file_rows(self) -> list[int]:
        """Each observation's 0-based data row in the participants file."""
        return [r - 1 for r in self.data["row"]]

    @property
    def n_file_rows(self) -> int:
        """Number of data rows in the participants file (included or not)."""
        return len(self.table)

    def table_rows(self) -> pd.DataFrame:
        """Every column of the participants table (as text) for the included observations, in design order."""
        return self.table.iloc[self.file_rows].reset_index(drop=True)


def read_table(path: Path, what: str = "participants table", unique: bool = True) -> pd.DataFrame:
    """Read a BIDS participants table (or, with ``unique=False``, an observations table) as text.

    Returns
    -------
    pandas.DataFrame
        All columns as Python ``str`` (object dtype), stripped of surrounding white space.

    Raises
    ------
    TableError
        Missing or unreadable file, not tab-separated, no ``participant_id`` column, duplicate ids.
    """
    name = path.name
    if not path.exists():
        raise TableError(f"{what} {path}: file not found; check the path in the model spec")
    if path.is_dir():
        raise TableError(f"{what} {path}: expected a TSV file, found a folder; give the file")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise TableError(f"{what} {path}: cannot be read ({exc.strerror}); check the file") from None
    lines = decode_utf8(data, f"{what} {path}", TableError, encoding="utf-8-sig").splitlines()
    lines = [ln for ln in lines if ln.strip()]
    if not lines:
        raise TableError(f"{name}: the file is empty; expected a header row starting with participant_id")
    header = lines[0].split("\t")
    if len(header) == 1 and ("," in lines[0] or ";" in lines[0]):
        raise TableError(
            f"{name} line 1: expected tab-separated columns, found {lines[0][:40]!r} with no tabs; "
            "save the table as TSV (tab-separated)"
        )
    header = [h.strip() for h in header]
    if "participant_id" not in header:
        raise TableError(
            f"{name} line 1: expected a participant_id column, found columns {header}; "
            "add participant_id as the first column (BIDS)"
        )
    if len(set(header)) != len(header):
        dup = sorted({h for h in header if header.count(h) > 1})
        raise TableError(f"{name} line 1: column names {dup} appear more than once; rename them")
    rows = []
    for i, ln in enumerate(lines[1:], start=2):
        fields = next(csv.reader([ln], delimiter="\t", quoting=csv.QUOTE_NONE))
        if len(fields) != len(header):
            raise TableError(
                f"{name} line {i}: expected {len(header)} tab-separated fields, found {len(fields)}; "
                "fix the row (use n/a for a missing value)"
            )
        rows.append([f.strip() for f in fields])
    frame = pd.DataFrame(rows, columns=header, dtype=object)
    _check_ids(name, frame["participant_id"], unique)
    frame.attrs["sha256"] = hashlib.sha256(data).hexdigest()  # of the bytes read (the run's provenance record)
    return frame


def _check_ids(name: str, ids: pd.Series, unique: bool = True) -> None:
    """Every row has a participant_id, and (``unique``) no id appears twice."""
    missing_id = [i + 1 for i, v in enumerate(ids) if v in MISSING]
    if missing_id:
        raise TableError(f"{name} row {missing_id[0]}: participant_id is missing; give every row an id")
    if not unique:
        return
    dup_mask = ids.duplicated(keep=False)
    if dup_mask.any():
        first = ids[dup_mask].iloc[0]
        where = [i + 1 for i, v in enumerate(ids) if v == first]
        raise TableError(
            f"{name} rows {where}: participant_id {first!r} appears {len(where)} times; "
            "each participant must have one row"
        )


def read_sidecar_levels(path: Path | None) -> dict[str, tuple[str, ...]]:
    """Levels declared in a BIDS ``participants.json`` (column -> keys of its ``Levels``)."""
    if path is None:
        return {}
    path = Path(path)
    if not path.exists():
        raise TableError(f"participants sidecar {path}: file not found; fix participants_sidecar in the spec")
    if path.is_dir():
        raise TableError(
            f"participants sidecar {path}: expected a JSON file (participants.json), found a folder; "
            "fix participants_sidecar in the spec"
        )
    raw = read_json(path, "participants sidecar", TableError, numbers=False)
    out: dict[str, tuple[str, ...]] = {}
    if isinstance(raw, dict):
        for col, desc in raw.items():
            if isinstance(desc, dict) and isinstance(desc.get("Levels"), dict):
                out[col] = tuple(str(k) for k in desc["Levels"])
    return out


def _to_number(value: str) -> float | None:
    try:
        x = float(value)
    except ValueError:
        return None
    return x if np.isfinite(x) else None


def select_sample(
    spec: ModelSpec,
    table: pd.DataFrame | None = None,
    sidecar_levels: dict[str, tuple[str, ...]] | None = None,
    numeric_columns: Sequence[str] = (),
    extra_exclusions: Mapping[str, str] | None = None,
    sample: Sample | None = None,
) -> Sample:
    """Apply exclude, include and missing-value rules and resolve factor levels.

    The participants table and sidecar are read here (once) unless given; the returned :class:`Sample` keeps
    them.  With ``sample``, the selection is made again from that sample's table, sidecar levels and numeric
    columns, with ``extra_exclusions`` added to its own: nothing is read from disk.

    Parameters
    ----------
    spec : ModelSpec
    table : DataFrame, optional
        The table as text (default: read ``spec.participants``).
    sidecar_levels : dict, optional
        Levels from participants.json (default: read ``spec.participants_sidecar``).
    numeric_columns : sequence of str
        Further numeric columns that must be present (e.g. the outcome of a table-level fit); a row with
        ``n/a`` there is left out like any other missing value.
    extra_exclusions : mapping, optional
        participant_id -> reason, for rows left out by a later stage (e.g. a missing image with
        ``--drop-missing-images``); listed with the others.
    sample : Sample, optional
        An earlier selection whose table, sidecar levels, numeric columns and exclusions are reused.
    """
    extra = dict(extra_exclusions or {})
    if spec.observations is not None:
        return _select_with_observations(spec, sidecar_levels, numeric_columns, extra, sample)
    if sample is not None:
        table, sidecar_levels = sample.table, sample.sidecar_levels
        numeric_columns = tuple(numeric_columns) or sample.numeric_columns
        extra = {**sample.extra_exclusions, **extra}
    if table is None:
        table = read_table(spec.participants)
    if sidecar_levels is None:
        sidecar_levels = read_sidecar_levels(spec.participants_sidecar)
    selected = _select_rows(spec, table, sidecar_levels, numeric_columns, extra or None)
    return replace(selected, table=table, sidecar_levels=dict(sidecar_levels),
                   numeric_columns=tuple(numeric_columns), extra_exclusions=extra)


def _check_columns(spec: ModelSpec, table: pd.DataFrame, needed: Sequence[str]) -> None:
    """Every column the model reads or filters on is in the table; every excluded id is in it."""
    name = spec.participants.name
    for col in list(needed) + list(spec.include):
        if col not in table.columns:
            where = "$.include" if col in spec.include and col not in needed else "the model"
            raise TableError(
                f"{name}: column {col!r} used by {spec.name} {where} is not in the table "
                f"(columns {list(table.columns)}); fix the name in the spec or add the column"
            )
    known = set(table["participant_id"])
    unknown = [p for p in spec.exclude if p not in known]
    if unknown:
        raise SpecError(
            f"{spec.name} $.exclude: participant_id {unknown[0]!r} is not in {name}; fix or remove the id"
        )


def _left_out(spec: ModelSpec, table: pd.DataFrame, needed: Sequence[str],
              extra_exclusions: Mapping[str, str] | None) -> tuple[list[Exclusion], list[int]]:
    """Each left-out row with its reason, and the 0-based positions of the rows kept, in table order."""
    exclusions: list[Exclusion] = []
    keep: list[int] = []
    excluded_ids = set(spec.exclude)
    for i, rec in enumerate(table.to_dict("records")):
        pid = rec["participant_id"]
        row = i + 1
        if pid in excluded_ids:
            exclusions.append(Exclusion(pid, row, f"listed in {spec.name} exclude"))
            continue
        if extra_exclusions and pid in extra_exclusions:
            exclusions.append(Exclusion(pid, row, extra_exclusions[pid]))
            continue
        filtered = next(
            (c for c, allowed in spec.include.items() if rec[c] not in allowed), None
        )
        if filtered is not None:
            exclusions.append(
                Exclusion(
                    pid, row, f"column {filtered} is {rec[filtered]!r}, not in include {list(spec.include[filtered])}"
                )
            )
            continue
        empty = next((c for c in needed if rec[c] == ""), None)
        if empty is not None:
            raise TableError(
                f"{spec.participants.name} row {row}, column {empty!r}: the field is empty; "
                "write n/a for a missing value (BIDS) or fill it in"
            )
        missing = [c for c in needed if rec[c] in MISSING]
        if missing:
            what = ", ".join(missing)
            exclusions.append(Exclusion(pid, row, f"missing value (n/a) in column {what}"))
            continue
        keep.append(i)
    return exclusions, keep


def _as_number(v: str) -> float | None:
    try:
        x = float(v)
    except ValueError:
        return None
    return x if math.isfinite(x) else None


def _sorted_levels(observed: list[str]) -> tuple[str, ...]:
    """Observed levels in numeric order when every one reads as a finite number (``7 < 10 < 25``), else as text."""
    numbers = [_as_number(v) for v in observed]
    if all(x is not None for x in numbers):
        return tuple(v for _, v in sorted(zip(numbers, observed, strict=True)))  # ties ("1", "1.0"): by text
    return tuple(sorted(observed))


def _factor_levels(spec: ModelSpec, f: str, values: list[str], rows: list[int],
                   sidecar_levels: Mapping[str, tuple[str, ...]], notes: list[str]) -> tuple[str, ...]:
    """A factor's levels: declared in the spec, else in participants.json, else the sorted observed values
    (numerically when every one reads as a finite number, else as text).

    Values outside declared levels are refused; sidecar levels nobody has are left out (with a note).
    """
    name = spec.participants.name
    fs = spec.factors[f]
    observed = list(dict.fromkeys(values))
    if fs.levels is not None:
        declared: tuple[str, ...] = fs.levels
        source = f"{spec.name} factors.{f}.levels"
    elif f in sidecar_levels:
        declared = sidecar_levels[f]
        sidecar_name = spec.participants_sidecar.name if spec.participants_sidecar else "participants.json"
        source = f"{sidecar_name} {f}.Levels"
    else:
        declared = _sorted_levels(observed)
        source = ""
    if source:
        for r, v in zip(rows, values, strict=True):
            if v not in declared:
                raise TableError(
                    f"{name} row {r}, column {f!r}: level {v!r} is not declared in {source} {list(declared)}; "
                    "fix the value or add the level"
                )
    if fs.levels is None and source:
        unused = [lv for lv in declared if lv not in observed]
        if unused:
            notes.append(
                f"factor {f}: level(s) {unused} from {source} have no included participant and are left out "
                "of the design"
            )
            declared = tuple(lv for lv in declared if lv in observed)
    _check_levels(spec, f, declared)
    return declared


def _check_levels(spec: ModelSpec, f: str, declared: tuple[str, ...]) -> None:
    fs = spec.factors[f]
    if fs.reference is not None and fs.reference not in declared:
        raise SpecError(
            f"{spec.name} $.factors.{f}.reference: expected one of the levels {list(declared)}, "
            f"found {fs.reference!r}; fix the reference"
        )
    if fs.scores is not None and len(fs.scores) != len(declared):
        raise SpecError(
            f"{spec.name} $.factors.{f}.scores: expected {len(declared)} scores (one per level "
            f"{list(declared)}), found {len(fs.scores)}; give one score per level"
        )
    if len(declared) < 2:
        raise TableError(
            f"{spec.participants.name} column {f!r}: a factor needs at least 2 levels among the included "
            f"participants, found {list(declared)}; drop the factor from the terms or check include/exclude"
        )


def _numbers(name: str, column: str, rows: list[int], values: list[str]) -> np.ndarray:
    """A numeric column as float64, refusing (with row and column) any text that is not a number."""
    nums = []
    for r, v in zip(rows, values, strict=True):
        x = _to_number(v)
        if x is None:
            raise TableError(
                f"{name} row {r}, column {column!r}: expected a number, found {v!r}; "
                "fix the value (use n/a for a missing value) or declare the column as a factor"
            )
        nums.append(x)
    return np.asarray(nums, dtype=float)


def _select_rows(
    spec: ModelSpec,
    table: pd.DataFrame,
    sidecar_levels: dict[str, tuple[str, ...]],
    numeric_columns: Sequence[str],
    extra_exclusions: Mapping[str, str] | None,
) -> Sample:
    """The selection itself (see :func:`select_sample`); reads nothing."""
    name = spec.participants.name
    factors = spec.model_factors()
    covariates = list(spec.model_covariates()) + [c for c in numeric_columns if c not in spec.model_covariates()]
    needed = list(spec.columns_used()) + [c for c in numeric_columns if c not in spec.columns_used()]
    _check_columns(spec, table, needed)
    exclusions, keep = _left_out(spec, table, needed, extra_exclusions)

    data = table.iloc[keep].reset_index(drop=True)
    rows = [i + 1 for i in keep]
    out = pd.DataFrame({"participant_id": data["participant_id"].tolist(), "row": rows})
    notes: list[str] = []
    levels: dict[str, tuple[str, ...]] = {}
    for f in factors:
        values = data[f].tolist()
        levels[f] = _factor_levels(spec, f, values, rows, sidecar_levels, notes)
        out[f] = pd.Series(values, dtype=object)
    extra_factor_cols = [c for c in needed if c not in factors and c not in covariates]
    for c in extra_factor_cols:  # within-centring factors that are not model terms
        out[c] = pd.Series(data[c].tolist(), dtype=object)
    for c in covariates:
        out[c] = _numbers(name, c, rows, data[c].tolist())
    return Sample(data=out, exclusions=tuple(exclusions), levels=levels, source=spec.participants, notes=notes)


# --------------------------------------------------------------------------------------------------
# Several images per participant: the observations table joined to the participants table
# --------------------------------------------------------------------------------------------------
def _select_with_observations(spec: ModelSpec, sidecar_levels: dict[str, tuple[str, ...]] | None,
                              numeric_columns: Sequence[str], extra: dict[str, str],
                              sample: Sample | None) -> Sample:
    """Participants selected on the between-participant columns, then their rows of the observations table
    (one per image) checked on the within-participant and numeric columns; one row of ``data`` per image."""
    assert spec.observations is not None
    if sample is not None and sample.participants_table is not None and sample.observations_table is not None:
        ptable, obs, sidecar_levels = sample.participants_table, sample.observations_table, sample.sidecar_levels
        numeric_columns = tuple(numeric_columns) or sample.numeric_columns
        extra = {**sample.extra_exclusions, **extra}
    else:
        ptable = read_table(spec.participants)
        obs = read_table(spec.observations, "observations table", unique=False)
    if sidecar_levels is None:
        sidecar_levels = read_sidecar_levels(spec.participants_sidecar)
    within = spec.within_factors()
    between = between_spec(spec)
    joined = _join(spec, ptable, obs)
    lifted = [c for c in list(between.columns_used()) + list(spec.include)
              if c in obs.columns and c not in ptable.columns]
    people = _select_rows(between, _lift(spec, ptable, joined, lifted), sidecar_levels, (), extra or None)
    ospec = replace(spec, participants=spec.observations)
    kept_ids = set(people.data["participant_id"])
    numeric = [c for c in numeric_columns if c not in between.columns_used()]
    needed = list(within) + numeric
    _check_columns(replace(ospec, include={}, exclude=()), joined, needed)
    exclusions = list(people.exclusions)
    keep: list[int] = []
    for i, rec in enumerate(joined.to_dict("records")):
        if rec["participant_id"] not in kept_ids:
            continue
        empty = next((c for c in needed if rec[c] == ""), None)
        if empty is not None:
            raise TableError(f"{ospec.participants.name} row {i + 1}, column {empty!r}: the field is empty; "
                             "write n/a for a missing value (BIDS) or fill it in")
        missing = [c for c in needed if rec[c] in MISSING]
        if missing:
            exclusions.append(Exclusion(rec["participant_id"], i + 1, f"{spec.observations.name} row {i + 1}: "
                                        f"missing value (n/a) in column {', '.join(missing)}"))
            continue
        keep.append(i)
    _check_one_per_cell(spec, joined, keep, within)
    data = _observation_data(ospec, people, joined, keep, within, numeric, sidecar_levels)
    entered = set(data["participant_id"])
    for _, row in people.data.iterrows():
        if row["participant_id"] not in entered:
            exclusions.append(Exclusion(row["participant_id"], int(row["row"]),
                                        f"no usable row in {spec.observations.name}"))
    return Sample(data=data, exclusions=tuple(exclusions), levels={**people.levels, **data.attrs["levels"]},
                  source=spec.participants, notes=people.notes + data.attrs["notes"], table=joined,
                  sidecar_levels=dict(sidecar_levels), numeric_columns=tuple(numeric_columns),
                  extra_exclusions=extra, participants_table=ptable, observations_table=obs)


def between_spec(spec: ModelSpec) -> ModelSpec:
    """The spec restricted to its between-participant factors and the terms made of them only."""
    within = set(spec.within_factors())
    return replace(spec, factors={f: fs for f, fs in spec.factors.items() if not fs.within},
                   terms=tuple(t for t in spec.terms if not within.intersection(t)), observations=None)


def _join(spec: ModelSpec, ptable: pd.DataFrame, obs: pd.DataFrame) -> pd.DataFrame:
    """The observations table with each participant's columns of participants.tsv, as text, in its row order."""
    assert spec.observations is not None
    oname, pname = spec.observations.name, spec.participants.name
    both = [c for c in obs.columns if c != "participant_id" and c in ptable.columns]
    if both:
        raise TableError(f"{oname} line 1: column {both[0]!r} is also in {pname}; keep each column in one table")
    known = dict(zip(ptable["participant_id"], range(len(ptable)), strict=True))
    for i, pid in enumerate(obs["participant_id"]):
        if pid not in known:
            raise TableError(f"{oname} row {i + 1}: participant_id {pid!r} is not in {pname}; "
                             "add the participant to the participants table or fix the id")
    positions = [known[p] for p in obs["participant_id"]]
    extra = ptable.drop(columns=["participant_id"]).iloc[positions].reset_index(drop=True)
    return pd.concat([obs.reset_index(drop=True), extra], axis=1)


def _lift(spec: ModelSpec, ptable: pd.DataFrame, joined: pd.DataFrame, columns: Sequence[str]) -> pd.DataFrame:
    """Between-participant columns kept in the observations table, one value per participant (refusing one
    that varies within a participant); participants without observations get n/a."""
    assert spec.observations is not None
    out = ptable.copy()
    for c in columns:
        values: dict[str, str] = {}
        for i, (pid, v) in enumerate(zip(joined["participant_id"], joined[c], strict=True)):
            if values.setdefault(pid, v) != v:
                raise TableError(
                    f"{spec.observations.name} row {i + 1}, column {c!r}: participant {pid} has {values[pid]!r} "
                    f"and {v!r}; {c} is between-participant (a factor without \"within\": true, or a covariate) "
                    "and must be the same in every row of a participant"
                )
        out[c] = [values.get(p, "n/a") for p in out["participant_id"]]
    return out


def _check_one_per_cell(spec: ModelSpec, joined: pd.DataFrame, keep: Sequence[int], within: Sequence[str]) -> None:
    """At most one row per participant and within-participant cell."""
    assert spec.observations is not None
    seen: dict[tuple[str, ...], int] = {}
    for i in keep:
        key = (joined["participant_id"].iloc[i], *(joined[f].iloc[i] for f in within))
        if key in seen:
            cell = ", ".join(f"{f}={v}" for f, v in zip(within, key[1:], strict=True)) or "(no within factor)"
            raise TableError(
                f"{spec.observations.name} rows {seen[key] + 1} and {i + 1}: participant {key[0]} has two rows "
                f"for {cell}; give one image per participant and within-participant cell (average runs first)"
            )
        seen[key] = i


def _observation_data(ospec: ModelSpec, people: Sample, joined: pd.DataFrame, keep: list[int],
                      within: Sequence[str], numeric: Sequence[str],
                      sidecar_levels: Mapping[str, tuple[str, ...]]) -> pd.DataFrame:
    """One row per kept image: participant_id, row (in the observations table), the participant's between
    columns, the within factors (text) and the numeric columns (float64); levels and notes in ``attrs``."""
    rows = [i + 1 for i in keep]
    ids = joined["participant_id"].iloc[keep].tolist()
    per_person = people.data.set_index("participant_id")
    out = pd.DataFrame({"participant_id": ids, "row": rows})
    for c in per_person.columns:
        if c != "row":
            out[c] = per_person[c].reindex(ids).to_numpy()
    notes: list[str] = []
    levels: dict[str, tuple[str, ...]] = {}
    for f in within:
        values = joined[f].iloc[keep].tolist()
        levels[f] = _factor_levels(ospec, f, values, rows, sidecar_levels, notes) if keep else ()
        out[f] = pd.Series(values, dtype=object)
    for c in numeric:
        out[c] = _numbers(ospec.participants.name, c, rows, joined[c].iloc[keep].tolist())
    out.attrs["levels"], out.attrs["notes"] = levels, notes
    return out
