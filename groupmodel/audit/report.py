"""The report of ``groupmodel check``: findings by section, the columns and contrasts, as text or JSON."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..model.checks import CONDITION_WARN, VIF_WARN
from .columns import ColumnRole
from .contrasts import ContrastReport
from .read import AuditFinding
from .sections import SMD_WARN

#: The report's sections, in order, with their titles.
SECTIONS = {
    "files": "Files and shape",
    "rows": "Rows, participants and images",
    "columns": "What each column encodes",
    "rank": "Rank and collinearity",
    "contrasts": "What each contrast tests",
    "covariates": "Covariates",
    "spec": "Compared with the spec",
    "variances": "Residual variances by group",
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
        from ..outputs.provenance import provenance

        return {
            **provenance(("software", "software_version")),
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
