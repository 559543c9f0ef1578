"""``groupmodel check``: audit hand-written design and contrast files.

Methods reviewers and lab members inherit design and contrast matrices typed by
hand or produced by old scripts.  :func:`audit` reads them with the participants
table (and optionally a model spec and an image list) and reports, finding by
finding (severity ``error``, ``warning`` or ``note``):

1. shape: rows against participants, contrast widths, entries that are not finite numbers;
2. rank, with the dependent columns in words; condition number and VIF;
3. whether every contrast row is estimable, and F contrasts with dependent rows;
4. what every column encodes (see :mod:`groupmodel.audit_columns`);
5. what every contrast tests, over cell means, and the classic mistakes;
6. rows out of place (against the participants' factor levels) and image lists out of order;
7. with a spec: same column space or not, and which generated hypothesis each contrast equals;
8. covariates: uncentred in an interaction, or confounded with a factor.

The statements reuse :mod:`groupmodel.hypotheses`: the audit builds a
:class:`HandDesign` -- a :class:`~groupmodel.design.Design` whose matrix is the
hand matrix and whose cell rows come from the column identification -- so the
same words describe generated and hand-written contrasts.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError, OutputError, TableError
from ..model.checks import (
    CONDITION_WARN,
    VIF_WARN,
    condition_number,
    has_constant_column,
    matrix_rank,
    variance_inflation,
)
from ..model.coding import make_coding
from ..model.design import Column, CovariateCoding
from ..model.table import read_table
from .columns import (
    ColumnRole,
    TableView,
    describe_roles,
    fill_cells,
    identify_column,
    summarise_factors,
)
from .contrasts import (
    UNCENTRED_MEAN_SD,
    ContrastReport,
    ContrastsMixin,
    HandDesign,
    SpecMixin,
    dependents_in_words,
    member_brief,
)
from .read import AuditFinding, listing, num_text, read_matrix
from .rows import RowsMixin

__all__ = ["AuditReport", "ContrastReport", "HandDesign", "SECTIONS", "SMD_WARN", "audit", "run_check_cli"]

#: Standardized mean difference (Cohen's d, pooled SD) of a covariate between two levels of a factor above
#: which the covariate is reported as confounded with the factor: Cohen's "large" effect (common practice).
SMD_WARN = 0.8

SECTIONS = {
    "files": "Files and shape",
    "rows": "Rows, participants and images",
    "columns": "What each column encodes",
    "rank": "Rank and collinearity",
    "contrasts": "What each contrast tests",
    "covariates": "Covariates",
    "spec": "Compared with the spec",
}


@dataclass
class AuditReport:
    """Everything ``groupmodel check`` found.

    Attributes
    ----------
    findings : list of AuditFinding
        In report order (by section).
    columns : list of ColumnRole
        What each design column encodes (empty when the design could not be aligned with the table).
    contrasts : list of ContrastReport
    factors, covariates : list of str
        The table columns the design was found to use.
    """

    design: Path
    contrasts_file: Path | None
    participants: Path
    n_rows: int = 0
    n_columns: int = 0
    findings: list[AuditFinding] = field(default_factory=list)
    columns: list[ColumnRole] = field(default_factory=list)
    contrasts: list[ContrastReport] = field(default_factory=list)
    factors: list[str] = field(default_factory=list)
    covariates: list[str] = field(default_factory=list)
    cells: list[dict[str, str]] | None = None

    def add(self, section: str, severity: str, code: str, message: str) -> None:
        self.findings.append(AuditFinding(severity, code, message, section))  # type: ignore[arg-type]

    @property
    def errors(self) -> list[AuditFinding]:
        return [f for f in self.findings if f.severity == "error"]

    @property
    def warnings(self) -> list[AuditFinding]:
        return [f for f in self.findings if f.severity == "warning"]

    @property
    def exit_code(self) -> int:
        return 1 if self.errors else 0

    def codes(self, severity: str | None = None) -> list[str]:
        return [f.code for f in self.findings if severity is None or f.severity == severity]

    def format(self) -> str:
        """The terminal report: a heading, then each section with one finding per line, then a summary."""
        head = f"groupmodel check: {self.design.name} ({self.n_rows} rows x {self.n_columns} columns)"
        if self.contrasts_file is not None:
            k = len(self.contrasts)
            head += f", {self.contrasts_file.name} ({k} contrast{'s' * (k != 1)})"
        head += f", {self.participants.name}"
        lines = [head]
        for key, title in SECTIONS.items():
            items = [f for f in self.findings if f.section == key]
            if not items:
                continue
            lines.append("")
            lines.append(title)
            lines.extend(f"  {f.severity}: {f.message}" for f in items)
        n_err, n_warn = len(self.errors), len(self.warnings)
        n_note = len(self.findings) - n_err - n_warn
        lines.append("")
        lines.append(f"summary: {n_err} error{'s' * (n_err != 1)}, {n_warn} warning{'s' * (n_warn != 1)}, "
                     f"{n_note} note{'s' * (n_note != 1)}; exit code {self.exit_code}")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        from .. import __version__

        return {
            "software": "groupmodel",
            "software_version": __version__,
            "design_file": str(self.design),
            "contrasts_file": str(self.contrasts_file) if self.contrasts_file else None,
            "participants_file": str(self.participants),
            "n_rows": self.n_rows,
            "n_columns": self.n_columns,
            "summary": {"errors": len(self.errors), "warnings": len(self.warnings),
                        "notes": len(self.findings) - len(self.errors) - len(self.warnings),
                        "exit_code": self.exit_code},
            "factors": self.factors,
            "covariates": self.covariates,
            "findings": [f.as_dict() for f in self.findings],
            "columns": [c.as_dict() for c in self.columns],
            "contrasts": [c.as_dict(self.cells) for c in self.contrasts],
            "thresholds": {"condition_number": CONDITION_WARN, "variance_inflation": VIF_WARN,
                           "standardized_mean_difference": SMD_WARN},
        }


# --------------------------------------------------------------------------------------------------
# The audit
# --------------------------------------------------------------------------------------------------
def audit(
    design: Path | str,
    contrasts: Path | str | None = None,
    participants: Path | str | None = None,
    factors: Sequence[str] | None = None,
    covariates: Sequence[str] | None = None,
    spec: Path | str | None = None,
    images: Path | str | None = None,
) -> AuditReport:
    """Audit a hand-written design (and contrast) file against the participants table.

    Parameters
    ----------
    design : path
        Design file: TSV/CSV with a header row, or numbers separated by white space, tabs or commas; ``#``
        lines are comments.  Rows follow ``participants`` (after the spec's exclusions when ``spec`` is given)
        unless a ``participant_id`` column says otherwise.
    contrasts : path, optional
        Contrast file, one row per contrast row; rows sharing a name (a ``hypothesis``/``contrast``/``name``/
        ``label`` column, or a first column of text) form one F test.
    participants : path
        The BIDS participants.tsv.  Defaults to the spec's table when ``spec`` is given.
    factors, covariates : sequence of str, optional
        Table columns to explain the design with.  Default: the spec's, or every plausible column (text
        columns as factors, numeric columns as covariates), keeping those the design uses.
    spec : path, optional
        A model spec to compare with (column space, and hypothesis by hypothesis).
    images : path, optional
        A text file listing image paths in the order the design rows follow.

    Returns
    -------
    AuditReport

    Raises
    ------
    InputError
        Unreadable input (missing files, no data rows, invalid spec, unknown column names): exit code 2.
    """
    return _Auditor(
        Path(design), Path(contrasts) if contrasts else None, Path(participants) if participants else None,
        list(factors) if factors is not None else None, list(covariates) if covariates is not None else None,
        Path(spec) if spec else None, Path(images) if images else None,
    ).run()


class _Auditor(RowsMixin, ContrastsMixin, SpecMixin):
    """One run of the audit: reads the files, then fills ``self.report`` section by section."""

    def __init__(self, design: Path, contrasts: Path | None, participants: Path | None,
                 factors: list[str] | None, covariates: list[str] | None, spec: Path | None,
                 images: Path | None) -> None:
        self.design_path = design
        self.contrasts_path = contrasts
        self.spec_path = spec
        self.images_path = images
        self.given_factors = factors
        self.given_covariates = covariates
        self.model = None
        self.spec = None
        if spec is not None:
            from ..model.spec import load_spec

            self.spec = load_spec(spec)
            if participants is None:
                participants = self.spec.participants
            else:
                self.spec = dataclasses.replace(self.spec, participants=participants)
        if participants is None:
            raise InputError("check: expected --participants (or --spec naming the table), found neither; "
                             "give --participants participants.tsv")
        self.participants = participants
        self.report = AuditReport(design, contrasts, participants)

    # ----- orchestration -----------------------------------------------------------------------
    def run(self) -> AuditReport:
        rep = self.report
        frame = read_table(self.participants)
        self.frame = frame
        self.sample = None
        if self.spec is not None:
            from ..model.table import select_sample

            self.sample = select_sample(self.spec, table=frame)
        self.x_file = read_matrix(self.design_path, "design")
        self.c_file = read_matrix(self.contrasts_path, "contrasts") if self.contrasts_path else None
        x = self.x_file
        rep.n_rows, rep.n_columns = x.n_rows, x.n_columns
        for p in x.problems:
            rep.findings.append(p)
        if self.c_file is not None:
            rep.findings.extend(self.c_file.problems)
        if x.n_columns == 0:
            raise TableError(f"--design {self.design_path}: expected numeric columns, found none; give the matrix")
        if not x.complete:
            rep.add("files", "note", "stopped",
                    "the other checks need every design entry to be a finite number; fix the entries above first")
            return rep
        self.labels = self._labels()
        self._align()
        if self.align is not None:
            self._identify()
        self._rank()
        self._contrasts()
        if self.align is not None and self.hd is not None:
            self._covariates()
        if self.spec is not None and self.align is not None:
            self._compare_spec()
        if self.images_path is not None:
            self._images()
        order = list(SECTIONS)
        rep.findings.sort(key=lambda f: order.index(f.section))
        return rep

    def _labels(self) -> list[str]:
        x = self.x_file
        if x.names:
            return [f"column {j + 1} ({n})" for j, n in enumerate(x.names)]
        return [f"column {j + 1}" for j in range(x.n_columns)]

    # ----- columns -----------------------------------------------------------------------------
    def _identify(self) -> None:
        """What each column encodes; the rows' order is checked on the way (it decides how to read them)."""
        rep = self.report
        assert self.align is not None
        view = self.table.view(self.align, restrict_levels=True)
        roles = self._roles(view)
        invalid = np.zeros(self.x_file.n_rows, dtype=bool)
        fixed = self._row_order(view, roles)
        if fixed is not None:
            self.align, invalid = fixed
            view = self.table.view(self.align, invalid, restrict_levels=True)
            roles = self._roles(view)
        used_f = [f for f in view.factors if any(f in r.factors or r.within == f for r in roles)]
        used_c = [c for c in view.covariates if any(r.covariate == c for r in roles)]
        if len(used_f) < len(view.factors) or len(used_c) < len(view.covariates):
            # Read again with only the columns the design uses, so an n/a in another column loses no row.
            self.table = self.table.restrict(used_f, used_c)
            view = self.table.view(self.align, invalid, restrict_levels=True)
            roles = self._roles(view)
        self._missing_values(used_f, used_c)
        self.view = view
        self.roles = roles
        rep.columns = roles
        for f in (self.given_factors or (self.spec.model_factors() if self.spec else [])):
            if f not in used_f:
                rep.add("columns", "note", "factor_unused", f"no design column encodes factor {f}")
        for c in (self.given_covariates or (self.spec.model_covariates() if self.spec else [])):
            if c not in used_c:
                rep.add("columns", "note", "covariate_unused", f"no design column uses covariate {c}")
        if self.given_factors is None and self.spec is None and used_f:
            rep.add("columns", "note", "factors_found",
                    f"factors read from {self.participants.name}: {', '.join(used_f)} (the columns the design "
                    "encodes; give --factors to choose)")
        if self.given_covariates is None and self.spec is None and used_c:
            rep.add("columns", "note", "covariates_found",
                    f"covariates read from {self.participants.name}: {', '.join(used_c)} (give --covariates "
                    "to choose)")
        rep.factors, rep.covariates = used_f, used_c
        has_intercept = any(r.kind in ("intercept", "constant") for r in roles)
        summary = summarise_factors(roles, view, has_intercept)
        means = {c: float(view.covariates[c][view.known].mean()) for c in used_c}
        sds = {c: float(view.covariates[c][view.known].std(ddof=1)) for c in used_c}
        self.cov_means, self.cov_sds = means, sds
        describe_roles(roles, view, means, sds)
        for text in summary.values():
            rep.add("columns", "note", "factor_coding", text)
        for r in roles:
            if r.kind == "unexplained":
                rep.add("columns", "warning", "column_unexplained",
                        f"{r.label}: unexplained: it is not a coding of the factors "
                        f"({', '.join(view.factors) or 'none'}) nor a covariate "
                        f"({', '.join(view.covariates) or 'none'}) of {self.participants.name}; if it is a covariate "
                        "or factor of the table, name it with --covariates or --factors; contrasts are stated with "
                        "it held at its mean")
            elif r.kind == "covariate_mixed":
                rep.add("columns", "warning", "column_mixed",
                        f"{r.label}: {r.description}; it mixes a covariate with factor offsets that are not a "
                        "centring; check how the column was computed")
            else:
                rep.add("columns", "note", "column", f"{r.label}: {r.description}")
        self._cells(view, roles, used_f, used_c, has_intercept)

    def _roles(self, view: TableView) -> list[ColumnRole]:
        x = self.x_file
        return [identify_column(j, self.labels[j], x.values[:, j], x.tolerance(j), view) for j in range(x.n_columns)]

    def _cells(self, view: TableView, roles: list[ColumnRole], factors: list[str], covariates: list[str],
               has_intercept: bool) -> None:
        """Cell rows and slopes -> a HandDesign over the valid rows."""
        rep, x = self.report, self.x_file
        pseudo = {r.index: r.label for r in roles if r.kind == "unexplained"}
        cells, rows, slopes = fill_cells(roles, x.values, view, factors, covariates, pseudo)
        v = view.valid
        ids = self.table.ids
        obs = pd.DataFrame({"participant_id": [ids[t] for t in self.align[v]],
                            "row": (self.align[v] + 1).tolist()})
        for f in factors:
            obs[f] = pd.Series([view.factors[f][c] for c in view.codes[f][v]], dtype=object)
        for c in covariates:
            obs[c] = view.covariates[c][v]
        codings = {f: make_coding(f, view.factors[f], "effect", None, view.scores[f]) for f in factors}
        covcodes: dict[str, CovariateCoding] = {}
        for c in covariates:
            m, sd = self.cov_means[c], self.cov_sds[c]
            covcodes[c] = CovariateCoding(c, "mean", m, None, 1.0, m, sd)
        for j, name in pseudo.items():
            col = x.values[v, j]
            m = float(col.mean())
            covcodes[name] = CovariateCoding(name, "mean", m, None, 1.0, m, float(col.std(ddof=1)) if v.sum() > 1
                                             else 0.0)
        terms = tuple(sorted({r.factors for r in roles if r.factors}, key=len))
        self.hd = HandDesign(
            matrix=x.values[v],
            columns=tuple(Column(lab, (), ()) for lab in self.labels),
            terms=terms,
            term_columns={},
            factors=codings,
            covariates=covcodes,
            observations=obs,
            intercept=has_intercept,
            audit_rows=rows,
            audit_slopes=slopes,
        )
        self.report.cells = [dict(zip(factors, c, strict=True)) for c in cells]
        counts = self.hd.cell_counts
        inter = [r for r in roles if len(r.factors) >= 2 or (r.covariate and r.factors)]
        if inter:
            fs = sorted({f for r in inter for f in r.factors}, key=factors.index)
            sub = [i for i, f in enumerate(factors) if f in fs]
            full: dict[tuple[str, ...], int] = {}
            for c, k in zip(cells, counts, strict=True):
                key = tuple(c[i] for i in sub)
                full[key] = full.get(key, 0) + int(k)
            empty = [", ".join(f"{fs[a]}={lv}" for a, lv in enumerate(key)) for key, k in full.items() if k == 0]
            if empty:
                rep.add("columns", "warning", "empty_cell",
                        f"no design row has {listing(empty)}, yet the design has interaction columns of "
                        f"{' x '.join(fs)}: contrasts that need those cells are not estimable; drop those interaction "
                        "columns or collect data for the empty cells")
        self.has_intercept = has_intercept

    # ----- rank --------------------------------------------------------------------------------
    def _brief(self, j: int) -> str:
        """A column's label with a few words on what it is (for lists of dependent columns and VIFs)."""
        if not self.roles or self.x_file.names:
            return self.labels[j]
        r = self.roles[j]
        short = {"intercept": "intercept", "zero": "all zero", "constant": "constant",
                 "unexplained": "unexplained"}.get(r.kind)
        if short is None:
            part = " x ".join(member_brief(r.members[f]) for f in r.factors) if r.separable and r.members \
                else " x ".join(r.factors)
            short = f"{r.covariate} x {part}" if r.covariate and part else (r.covariate or part)
        return f"{self.labels[j]} ({short})"

    def _rank(self) -> None:
        rep, x = self.report, self.x_file.values
        n, p = x.shape
        names = [self._brief(j) for j in range(p)]
        self.rank = matrix_rank(x)
        if p > n:
            rep.add("rank", "error", "too_many_columns",
                    f"the design has {p} columns but only {n} rows; remove columns or add participants")
        if self.rank < p:
            deps = dependents_in_words(x, names)
            rep.add("rank", "error", "rank_deficient",
                    f"the design has rank {self.rank} with {p} columns: " + "; ".join(deps)
                    + "; remove a dependent column (or check for a level coded twice or an empty cell)")
        elif n - self.rank < 1:
            rep.add("rank", "error", "no_error_df",
                    f"the design leaves no residual degrees of freedom (n = {n}, rank = {self.rank}); "
                    "remove columns or add participants")
        else:
            cond = condition_number(x)
            rep.add("rank", "note", "rank",
                    f"full column rank ({p}); {n - p} residual degrees of freedom; condition number {cond:.3g} "
                    f"(columns scaled to unit length)")
            if cond > CONDITION_WARN:
                rep.add("rank", "warning", "ill_conditioned",
                        f"condition number {cond:.3g} (columns scaled to unit length) is above {CONDITION_WARN:g}: "
                        "estimates are sensitive to small changes in the data; centre covariates or drop a "
                        "nearly redundant column")
            # VIF regresses each column on the others plus a constant; without a constant column (a cell-means
            # design) the indicators sum to that constant and the figure means nothing, so it is skipped.
            constant = has_constant_column(x)
            for col, v in (variance_inflation(x, names) if constant else {}).items():
                if v > VIF_WARN:
                    rep.add("rank", "warning", "high_vif",
                            f"{col} has variance inflation factor {v:.3g} (above {VIF_WARN:g}): it is nearly a "
                            "combination of the other columns; centre the covariates it involves, or drop one of "
                            "the near-duplicates")

    # ----- contrasts ---------------------------------------------------------------------------
    def _covariates(self) -> None:
        rep, view = self.report, self.view
        flagged: dict[tuple[str, float], list[ColumnRole]] = {}
        for r in self.roles:
            if r.kind == "covariate_interaction" and r.centre_kind in ("none", "value") and r.covariate:
                c = r.covariate
                where = 0.0 if r.centre_kind == "none" else float(r.centre or 0.0)
                if abs(self.cov_means[c] - where) > UNCENTRED_MEAN_SD * self.cov_sds[c]:
                    flagged.setdefault((c, round(where, 9)), []).append(r)
        for (c, where), rs in flagged.items():
            mean = self.cov_means[c]
            fs = " x ".join(dict.fromkeys(f for r in rs for f in r.factors))
            how = "uncentred" if rs[0].centre_kind == "none" else f"centred at {num_text(where)}, not at its mean,"
            cols = ", ".join(r.label for r in rs)
            rep.add("covariates", "warning", "uncentred_interaction",
                    f"{cols}: covariate {c} {how} times {fs}: the columns of {fs} then describe differences at "
                    f"{c} = {num_text(where)}, not at a typical {c} (mean {num_text(mean)}), and they are nearly "
                    "collinear "
                    f"with the {c} columns; subtract the mean ({num_text(mean)}) from {c} before multiplying")
        for c in self.report.covariates:
            vals = view.covariates[c][view.valid]
            for f in self.report.factors:
                codes = view.codes[f][view.valid]
                best = None
                for a, b in combinations(range(len(view.factors[f])), 2):
                    xa, xb = vals[codes == a], vals[codes == b]
                    if len(xa) < 2 or len(xb) < 2:
                        continue
                    pooled = math.sqrt(((len(xa) - 1) * xa.var(ddof=1) + (len(xb) - 1) * xb.var(ddof=1))
                                       / (len(xa) + len(xb) - 2))
                    if pooled <= 0:
                        continue
                    d = (xa.mean() - xb.mean()) / pooled
                    if best is None or abs(d) > abs(best[0]):
                        best = (d, a, b, xa.mean(), xb.mean())
                if best is not None and abs(best[0]) > SMD_WARN:
                    d, a, b, ma, mb = best
                    la, lb = view.factors[f][a], view.factors[f][b]
                    rep.add("covariates", "warning", "confounded_covariate",
                            f"covariate {c} differs strongly between levels of {f}: mean {num_text(ma)} at {la}, "
                            f"{num_text(mb)} at {lb}, standardized difference d = {d:.2f} (pooled SD; |d| above "
                            f"{SMD_WARN:g}, Cohen's 'large'): the {f} effect and the {c} slope are hard to tell "
                            f"apart, and comparing {f} levels at the mean {c} extrapolates; report it, or match "
                            "the groups")

    # ----- spec --------------------------------------------------------------------------------

# --------------------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------------------
def _split_names(text: str | None) -> list[str] | None:
    if text is None:
        return None
    names = [t.strip() for t in text.split(",") if t.strip()]
    return names


def run_check_cli(args: argparse.Namespace) -> int:
    """``groupmodel check``: print the report, write --json, return 0 (no error finding) or 1."""
    report = audit(
        design=args.design,
        contrasts=args.contrasts,
        participants=args.participants,
        factors=_split_names(args.factors),
        covariates=_split_names(args.covariates),
        spec=args.spec,
        images=args.images,
    )
    print(report.format())
    if args.json is not None:
        from ..outputs.folder import dumps_json

        try:
            args.json.parent.mkdir(parents=True, exist_ok=True)
            args.json.write_text(dumps_json(report.as_dict()), encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"--json {args.json}: cannot be written ({exc.strerror}); choose another path") from None
        print(f"wrote {args.json}")
    return report.exit_code
