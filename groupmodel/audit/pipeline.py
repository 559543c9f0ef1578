"""``groupmodel check``: audit hand-written design and contrast files.

Methods reviewers and lab members inherit design and contrast matrices typed by
hand or produced by old scripts.  :func:`audit` reads them with the participants
table (and optionally a model spec and an image list) and reports, finding by
finding (severity ``error``, ``warning`` or ``note``):

1. shape: rows against participants, contrast widths, entries that are not finite numbers;
2. rank, with the dependent columns in words; condition number and VIF;
3. whether every contrast row is estimable, and F contrasts with dependent rows;
4. what every column encodes (see :mod:`groupmodel.audit.columns`);
5. what every contrast tests, over cell means, and the classic mistakes;
6. rows out of place (each row's participant found from its coding and covariate values, or from the
   image list, whatever the order: see :mod:`groupmodel.audit.reorder`) and image lists out of order;
   several images per participant in one model (see :mod:`groupmodel.audit.repeated`);
7. with a spec: same column space or not, and which generated hypothesis each contrast equals;
8. covariates: uncentred in an interaction, or confounded with a factor.

The statements reuse :mod:`groupmodel.model.hypotheses`: the audit builds a
:class:`HandDesign` -- a :class:`~groupmodel.design.Design` whose matrix is the
hand matrix and whose cell rows come from the column identification -- so the
same words describe generated and hand-written contrasts.

How it is built: :mod:`groupmodel.audit.context` reads the inputs into a frozen
:class:`~groupmodel.audit.context.AuditContext`, and :func:`build_context` adds the
later stages one by one (rows aligned, columns identified, contrasts assessed, the
spec compared), each a function returning a new frozen object.  The report is then
the findings of :data:`PIPELINE`, one function per section, in report order.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence
from pathlib import Path

from .align import align_rows
from .cells import HandDesign
from .context import AuditContext, check_shape, make_request, read_inputs
from .contrasts import ContrastReport, assess_contrasts
from .identify import identify_columns
from .image_variances import image_variance_findings
from .pasted import pasted_covariate_findings
from .read import AuditFinding
from .report import SECTIONS, AuditReport
from .sections import (
    SMD_WARN,
    column_findings,
    contrast_findings,
    covariate_findings,
    rank_findings,
    row_and_image_findings,
    shape_findings,
    spec_findings,
    with_spec_matches,
)
from .spec import compare_with_spec
from .variances import variance_findings

__all__ = ["AuditReport", "ContrastReport", "HandDesign", "SECTIONS", "SMD_WARN", "audit"]

#: The report's sections, in report order: each a function of the context returning its findings.
PIPELINE: tuple[Callable[[AuditContext], list[AuditFinding]], ...] = (
    shape_findings,
    row_and_image_findings,
    column_findings,
    pasted_covariate_findings,
    rank_findings,
    contrast_findings,
    covariate_findings,
    spec_findings,
    variance_findings,
    image_variance_findings,
)


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
    req = make_request(Path(design), Path(contrasts) if contrasts else None,
                       Path(participants) if participants else None, (factors, covariates),
                       Path(spec) if spec else None, Path(images) if images else None)
    ctx = build_context(AuditContext(req, read_inputs(req)))
    # With an entry that is not a finite number only the files are reported: the other checks need numbers.
    sections = PIPELINE if ctx.files.x.complete else PIPELINE[:1]
    findings = [f for section in sections for f in section(ctx)]
    order = list(SECTIONS)
    findings.sort(key=lambda f: order.index(f.section))
    return _report(ctx, findings)


def build_context(ctx: AuditContext) -> AuditContext:
    """The later stages, each a new frozen context: rows aligned, columns identified, contrasts, spec."""
    check_shape(ctx.request, ctx.files)
    if not ctx.files.x.complete:
        return ctx  # the other checks need every design entry to be a finite number
    ctx = dataclasses.replace(ctx, alignment=align_rows(ctx.request, ctx.files))
    if ctx.alignment is not None and ctx.alignment.claimed is not None:
        ctx = dataclasses.replace(ctx, columns=identify_columns(ctx.request, ctx.files, ctx.alignment))
    ctx = dataclasses.replace(ctx, contrasts=assess_contrasts(ctx))
    if ctx.request.spec is not None and ctx.columns is not None:
        ctx = dataclasses.replace(ctx, spec=compare_with_spec(ctx))
    return ctx


def _report(ctx: AuditContext, findings: list[AuditFinding]) -> AuditReport:
    req, x, ident = ctx.request, ctx.files.x, ctx.columns
    return AuditReport(
        design=req.design,
        contrasts_file=req.contrasts,
        participants=req.participants,
        n_rows=x.n_rows,
        n_columns=x.n_columns,
        findings=findings,
        columns=list(ident.roles) if ident is not None else [],
        contrasts=with_spec_matches(ctx),
        factors=list(ident.factors) if ident is not None else [],
        covariates=list(ident.covariates) if ident is not None else [],
        cells=[dict(zip(ident.factors, c, strict=True)) for c in ident.cells] if ident is not None else None,
    )
