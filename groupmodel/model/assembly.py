"""The Python API: from a spec to a :class:`Model` (design + hypotheses + findings) and its files.

``groupmodel build`` on the command line is :func:`build` followed by :meth:`Model.write`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import ModelError, SpecError
from .checks import Finding, check_design
from .design import Design, build_design
from .estimability import alternatives
from .hypotheses import Hypothesis, build_hypotheses
from .spec import ModelSpec, load_spec
from .strata import Strata, stratify
from .table import Sample, select_sample
from .variance_groups import variance_group_findings


@dataclass
class Model:
    """A built model: the sample, the design, the hypotheses and what the checks found.

    Attributes
    ----------
    spec : ModelSpec
    sample : Sample
        Included observations and the list of exclusions with reasons.
    design : Design
    hypotheses : dict
        Name -> Hypothesis, in spec order.
    findings : list of Finding
        Design checks, level notes and hypothesis problems.
    """

    spec: ModelSpec
    sample: Sample
    design: Design
    hypotheses: dict[str, Hypothesis]
    findings: list[Finding] = field(default_factory=list)
    #: With within-participant factors: the error stratum of every hypothesis (:mod:`.strata`); else None.
    strata: Strata | None = None

    @property
    def errors(self) -> list[Finding]:
        return [f for f in self.findings if f.severity == "error"]

    @property
    def warnings(self) -> list[Finding]:
        return [f for f in self.findings if f.severity == "warning"]

    def without(self, extra_exclusions: Mapping[str, str]) -> Model:
        """The same model with more participants left out (participant_id -> reason), rebuilt from the
        sample already read: the participants table is not read again."""
        return build(self.spec, extra_exclusions=extra_exclusions, sample=self.sample)

    def raise_for_errors(self) -> None:
        """Raise a ModelError carrying every error finding (exit code 1)."""
        if self.errors:
            raise ModelError(" | ".join(f.message for f in self.errors))

    # ----- tables --------------------------------------------------------------------------------
    def design_frame(self) -> pd.DataFrame:
        frame = pd.DataFrame(self.design.matrix, columns=self.design.column_names)
        frame.insert(0, "participant_id", self.design.participant_ids)
        return frame

    def contrast_rows(self) -> tuple[np.ndarray, list[str], list[str]]:
        """All contrast rows stacked (q_total, p), with 'name row' labels and each row's test."""
        rows, labels, tests = [], [], []
        for h in self.hypotheses.values():
            for i, r in enumerate(h.weights):
                rows.append(r)
                labels.append(h.name if h.n_rows == 1 else f"{h.name} {i + 1}")
                tests.append(h.test)
        matrix = np.array(rows) if rows else np.zeros((0, self.design.n_columns))
        return matrix, labels, tests

    def contrasts_frame(self) -> pd.DataFrame:
        records = []
        for h in self.hypotheses.values():
            for i, r in enumerate(h.weights):
                records.append({"hypothesis": h.name, "row": i + 1, **dict(zip(self.design.column_names, r,
                                                                             strict=True))})
        return pd.DataFrame(records, columns=["hypothesis", "row", *self.design.column_names])

    # ----- sidecars ------------------------------------------------------------------------------
    def design_sidecar(self) -> dict[str, Any]:
        """What design.json holds (written by :mod:`groupmodel.outputs.design_files`)."""
        from ..outputs.design_files import design_sidecar

        return design_sidecar(self)

    # ----- engine view ---------------------------------------------------------------------------
    def tests(self) -> list[Any]:
        """The hypotheses as engine tests (:class:`groupmodel.ols.Test`)."""
        from ..engine.ols import Test

        return [Test(h.name, h.weights, h.test, h.test_tail) for h in self.hypotheses.values()]

    # ----- files ---------------------------------------------------------------------------------
    def write(self, out: Path | str, force: bool = False, pictures: bool = True) -> Path:
        """Write the design files atomically into ``out``; refuses a model with errors (ModelError)."""
        from ..outputs.design_files import write_model_folder

        return write_model_folder(self, out, force=force, pictures=pictures)


def build(
    spec: ModelSpec | Path | str,
    numeric_columns: Sequence[str] = (),
    extra_exclusions: Mapping[str, str] | None = None,
    sample: Sample | None = None,
) -> Model:
    """Build the model of a spec: read the table, build the design and hypotheses, run the checks.

    Parameters
    ----------
    spec : ModelSpec or path
    numeric_columns : sequence of str
        Extra numeric columns every included row must have (e.g. the outcome of a table-level fit).
    extra_exclusions : mapping, optional
        participant_id -> reason for rows a later stage leaves out (e.g. missing images).
    sample : Sample, optional
        The sample of an earlier build of the same spec: its table is used again (not read from disk),
        with ``extra_exclusions`` added to its own (see :meth:`Model.without`).

    Returns
    -------
    Model
        Problems of the model (non-estimable hypotheses, with what can be tested instead; no residual degrees
        of freedom) are in ``model.findings`` with severity ``error``, a rank-deficient design with severity
        ``warning`` (it is fitted with a generalised inverse); unreadable or invalid input raises at once.
    """
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    sample = select_sample(spec, numeric_columns=numeric_columns, extra_exclusions=extra_exclusions, sample=sample)
    design = build_design(spec, sample)
    findings = [Finding("note", "levels", n) for n in sample.notes]
    findings += check_design(design)
    findings += variance_group_findings(spec, design)
    try:
        hypotheses = build_hypotheses(design, spec.hypotheses)
    except SpecError as exc:  # name the spec file and give a JSON path, as every other spec error
        raise SpecError(f"{spec.name} $.{exc}") from None
    for h in hypotheses.values():
        instead = alternatives(spec, design, h, spec.hypotheses[h.name]) if h.problems else ""
        for problem in h.problems:
            findings.append(Finding("error", "not_estimable",
                                    f"hypothesis {h.name} is not estimable: {problem}{instead}"))
        for note in h.notes:
            findings.append(Finding("note", "hypothesis_rows", f"hypothesis {h.name}: {note}"))
    strata = None
    if spec.observations is not None:
        strata, hypotheses, more = stratify(spec, design, hypotheses)
        findings += [Finding(*f) for f in more]
    return Model(spec, sample, design, hypotheses, findings, strata)
