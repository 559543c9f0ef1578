"""The design and contrast files of a model: design.tsv/json, contrasts.tsv/json and their pictures.

``groupmodel build`` writes these alone; every fit writes them beside its results.
"""

from __future__ import annotations

import dataclasses
import io
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..engine.linalg import condition_number, has_constant_column, matrix_rank, variance_inflation
from ..model.checks import cell_counts_by_term
from .folder import OutputFolder
from .numbers import tidy
from .provenance import RunClock, RunInputs, command_line, provenance, run_record
from .strata_files import strata_sidecar, write_strata

if TYPE_CHECKING:
    from ..model.assembly import Model
    from ..model.hypotheses import Hypothesis


def written_hypothesis(h: Hypothesis) -> Hypothesis:
    """The hypothesis with its weights (over columns and over cells) as written: round-off noise off each row."""
    cell_w = None if h.cell_weights is None else tidy(h.cell_weights, axis=1)
    return dataclasses.replace(h, weights=tidy(h.weights, axis=1), cell_weights=cell_w)


def design_frame(model: Model) -> pd.DataFrame:
    """design.tsv: participant_id and the design columns, round-off noise off each column."""
    frame = model.design_frame()
    names = model.design.column_names
    frame[names] = tidy(frame[names].to_numpy(dtype=float), axis=0)
    return frame


def contrasts_frame(model: Model) -> pd.DataFrame:
    """contrasts.tsv: one line per hypothesis row, round-off noise off each row."""
    frame = model.contrasts_frame()
    names = model.design.column_names
    if len(frame):
        frame[names] = tidy(frame[names].to_numpy(dtype=float), axis=1)
    return frame


def _factor_dict(coding: Any) -> dict[str, Any]:
    out = coding.as_dict()
    if out.get("matrix") is not None:
        out["matrix"] = tidy(out["matrix"], axis=0).tolist()
    return out


def design_sidecar(model: Model) -> dict[str, Any]:
    """design.json: the spec, the columns and their coding, rank and conditioning, cells and findings."""
    d = model.design
    s = np.linalg.svd(d.matrix, compute_uv=False)
    return {
        **provenance(),
        "spec": str(model.spec.path),
        "participants": str(model.sample.source),
        "n_observations": d.n_observations,
        "columns": d.column_sidecar(),
        "factors": {f: _factor_dict(c) for f, c in d.factors.items()},
        "covariates": {c: v.as_dict() for c, v in d.covariates.items()},
        "intercept": d.intercept,
        "terms": [":".join(t) if t else "intercept" for t in d.terms],
        "rank": matrix_rank(d.matrix),
        "rank_tolerance": "largest singular value x max(n, p) x machine epsilon",
        "singular_values": s.tolist(),
        "condition_number": condition_number(d.matrix),
        "condition_number_scaling": "columns scaled to unit length",
        "variance_inflation": (variance_inflation(d.matrix, d.column_names)
                               if has_constant_column(d.matrix) else None),
        "cell_counts": cell_counts_by_term(d),
        "cells": [
            {"cell": dict(zip(d.factors, c, strict=True)), "count": int(k), "design_row": r.tolist()}
            for c, k, r in zip(d.cells, d.cell_counts, tidy(d.cell_rows(), axis=0), strict=True)
        ],
        "excluded": [e.as_dict() for e in model.sample.exclusions],
        "findings": [f.as_dict() for f in model.findings],
        **({"observations": str(model.spec.observations), "strata": strata_sidecar(model.strata)}
           if model.strata is not None else {}),
    }


def contrasts_sidecar(model: Model) -> dict[str, Any]:
    """contrasts.json: the design columns and every hypothesis with its statement and weights."""
    return {
        **provenance(),
        "columns": model.design.column_names,
        "hypotheses": {name: {**written_hypothesis(h).as_dict(model.design), **_stratum_of(model, name)}
                       for name, h in model.hypotheses.items()},
    }


def _stratum_of(model: Model, name: str) -> dict[str, Any]:
    """With within-participant factors: the stratum a hypothesis is tested in and on what data (else nothing)."""
    if model.strata is None or model.strata.tests[name].problems:
        return {}
    t = model.strata.tests[name]
    return {"stratum": t.stratum, "tested_on": t.transformed}


def included_frame(model: Model) -> pd.DataFrame:
    """participants_included.tsv: each included observation with its factor levels and raw covariate (and
    outcome) values, in design-row order (the report summarises covariates per cell from it)."""
    data = model.sample.data
    d = model.design
    keep = ["participant_id", *d.factors, *[c for c in d.covariates if c in data],
            *[c for c in model.sample.numeric_columns if c in data and c not in d.covariates]]
    return data[list(dict.fromkeys(keep))].reset_index(drop=True)


def write_model(model: Model, out: OutputFolder, pictures: bool = True,
                run: dict[str, Any] | None = None) -> list[str]:
    """Write design and contrast files into an open output folder; returns the file names.

    ``run`` is the run record (:func:`~groupmodel.outputs.provenance.run_record`) the sidecars carry.
    """
    extra = {} if run is None else {"provenance": run}
    out.write_tsv("design.tsv", design_frame(model))
    out.write_json("design.json", {**design_sidecar(model), **extra})
    out.write_tsv("contrasts.tsv", contrasts_frame(model))
    out.write_json("contrasts.json", {**contrasts_sidecar(model), **extra})
    out.write_tsv("participants_included.tsv", included_frame(model))
    names = ["design.tsv", "design.json", "contrasts.tsv", "contrasts.json", "participants_included.tsv",
             *write_strata(model, out)]
    if pictures:
        names += draw_pictures(model, out)
    return names


def picture_bytes(model: Model) -> dict[str, bytes]:
    """design.png and contrasts.png as PNG bytes (imports matplotlib)."""
    from .figures import plot_contrasts, plot_design

    d = model.design
    design, contrasts = io.BytesIO(), io.BytesIO()
    plot_design(design, tidy(d.matrix, axis=0), d.column_names, d.participant_ids)
    rows, labels, tests = model.contrast_rows()
    plot_contrasts(contrasts, tidy(rows, axis=1), labels, d.column_names, tests)
    return {"design.png": design.getvalue(), "contrasts.png": contrasts.getvalue()}


def draw_pictures(model: Model, out: OutputFolder) -> list[str]:
    """design.png and contrasts.png (imports matplotlib); returns the file names."""
    return _write_pictures(picture_bytes(model), out)


def _write_pictures(pictures: dict[str, bytes], out: OutputFolder) -> list[str]:
    for name, data in pictures.items():
        out.file(name).write_bytes(data)
    return list(pictures)


class PictureJob:
    """The pictures of a model drawn in memory in a background thread (matplotlib's import and drawing overlap
    the writing of the maps); :meth:`write` waits and writes them into an output folder, or raises what the
    drawing raised."""

    def __init__(self, model: Model) -> None:
        self._pictures: dict[str, bytes] = {}
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, args=(model,), name="groupmodel-pictures", daemon=True)
        self._thread.start()

    def _run(self, model: Model) -> None:
        try:
            self._pictures = picture_bytes(model)
        except BaseException as exc:  # handed to write()
            self._error = exc

    def write(self, out: OutputFolder) -> list[str]:
        """Wait for the drawing and write the pictures into ``out``; returns their names."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return _write_pictures(self._pictures, out)


def write_build(model: Model, o: OutputFolder, pictures: bool = True, command: Sequence[str] | None = None,
                clock: RunClock | None = None) -> list[str]:
    """The files of ``groupmodel build`` into an open output folder: design and contrast files with the run
    record, dataset_description.json and the index; returns the file names."""
    from .dataset import dataset_description, finish_folder

    run = run_record(RunInputs.of_spec(model.spec, sample=model.sample), clock or RunClock.start())
    from .report import write_report

    names = write_model(model, o, pictures=pictures, run=run)
    names += finish_folder(o, dataset_description("design", model.spec, command_line(command)))
    return names + write_report(o, pictures=pictures)  # last: it reads the folder through its index


def write_model_folder(model: Model, out: Path | str, force: bool = False, pictures: bool = True) -> Path:
    """Write the design files atomically into ``out``; refuses a model with errors (ModelError)."""
    clock = RunClock.start()
    folder = OutputFolder(out, force=force)
    model.raise_for_errors()
    with folder as o:
        write_build(model, o, pictures=pictures, clock=clock)
    return Path(out)
