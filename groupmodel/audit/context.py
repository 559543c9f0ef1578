"""The frozen context of one audit, built in explicit stages, each a function returning a new frozen object.

1. :func:`read_inputs`: the spec (if any), the participants table (read by :mod:`groupmodel.model.table`), the
   spec's sample, the design and contrast files as read (:class:`Files`);
2. :func:`groupmodel.audit.align.align_rows`: which table row every design row is (:class:`Alignment`);
3. :func:`groupmodel.audit.identify.identify_columns`: what every column encodes, the rows' order checked on
   the way (:mod:`groupmodel.audit.reorder`, then :mod:`groupmodel.audit.order`), and the design row of every
   cell (:class:`Identification`);
4. :func:`groupmodel.audit.contrasts.assess_contrasts`: every hand contrast, its estimability and statement;
5. :func:`groupmodel.audit.spec.compare_with_spec`: the comparison with the spec's design and hypotheses.

The report sections (:mod:`groupmodel.audit.sections`) are functions of the finished :class:`AuditContext`.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from ..errors import InputError, TableError
from ..model.table import Sample, read_table
from .read import AuditFinding, MatrixFile, read_matrix
from .words import member_brief

if TYPE_CHECKING:
    from ..model.spec import ModelSpec
    from .align import Alignment
    from .columns import ColumnRole
    from .contrasts import ContrastSet
    from .identify import Identification
    from .spec import SpecComparison


@dataclass(frozen=True)
class Request:
    """What was asked: the files, and the factors and covariates named (None: choose)."""

    design: Path
    contrasts: Path | None
    participants: Path
    factors: tuple[str, ...] | None
    covariates: tuple[str, ...] | None
    spec: ModelSpec | None
    spec_path: Path | None
    images: Path | None


@dataclass(frozen=True)
class Files:
    """The files as read: design and contrast matrices, the participants table as text, the spec's sample."""

    x: MatrixFile
    c: MatrixFile | None
    frame: pd.DataFrame
    sample: Sample | None
    labels: tuple[str, ...]


@dataclass(frozen=True)
class AuditContext:
    """Everything the report sections read; each later stage is None until built (or when it cannot be)."""

    request: Request
    files: Files
    alignment: Alignment | None = None
    columns: Identification | None = None
    contrasts: ContrastSet | None = None
    spec: SpecComparison | None = None

    @property
    def roles(self) -> tuple[ColumnRole, ...]:
        return self.columns.roles if self.columns is not None else ()

    def brief(self, j: int) -> str:
        """A column's label with a few words on what it is (for lists of dependent columns and VIFs)."""
        label = self.files.labels[j]
        if not self.roles or self.files.x.names:
            return label
        r = self.roles[j]
        short = {"intercept": "intercept", "zero": "all zero", "constant": "constant",
                 "unexplained": "unexplained"}.get(r.kind)
        if short is None:
            part = " x ".join(member_brief(r.members[f]) for f in r.factors) if r.separable and r.members \
                else " x ".join(r.factors)
            short = f"{r.covariate} x {part}" if r.covariate and part else (r.covariate or part)
        return f"{label} ({short})"


def make_request(design: Path, contrasts: Path | None, participants: Path | None,
                 names: tuple[Sequence[str] | None, Sequence[str] | None], spec: Path | None,
                 images: Path | None) -> Request:
    """Load the spec (if any) and settle which participants table to read.

    ``names`` holds the factors and the covariates given (None: choose).
    """
    factors, covariates = names
    model_spec = None
    if spec is not None:
        from ..model.spec import load_spec

        model_spec = load_spec(spec)
        if participants is None:
            participants = model_spec.participants
        else:
            model_spec = dataclasses.replace(model_spec, participants=participants)
    if participants is None:
        raise InputError("check: expected --participants (or --spec naming the table), found neither; "
                         "give --participants participants.tsv")
    return Request(design, contrasts, participants, tuple(factors) if factors is not None else None,
                   tuple(covariates) if covariates is not None else None, model_spec, spec, images)


def read_inputs(req: Request) -> Files:
    """Read the participants table (and the spec's sample of it), then the design and contrast files."""
    frame = read_table(req.participants)
    sample = None
    if req.spec is not None:
        from ..model.table import select_sample

        sample = select_sample(req.spec, table=frame)
    x = read_matrix(req.design, "design")
    c = read_matrix(req.contrasts, "contrasts") if req.contrasts else None
    if x.names:
        labels = tuple(f"column {j + 1} ({n})" for j, n in enumerate(x.names))
    else:
        labels = tuple(f"column {j + 1}" for j in range(x.n_columns))
    return Files(x, c, frame, sample, labels)


def check_shape(req: Request, files: Files) -> None:
    """A design file without numeric columns cannot be audited at all."""
    if files.x.n_columns == 0:
        raise TableError(f"--design {req.design}: expected numeric columns, found none; give the matrix")


def file_findings(files: Files) -> list[AuditFinding]:
    """The problems found while reading the design and contrast files."""
    out = list(files.x.problems)
    if files.c is not None:
        out.extend(files.c.problems)
    return out
