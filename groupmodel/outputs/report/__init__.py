"""report.html: one self-contained page that shows an output folder (no network, no JavaScript, prints on A4).

The page is built from the files of the folder alone (:func:`report_html`), so ``groupmodel build`` and
``groupmodel fit`` write it as their last file and ``groupmodel report DIR`` builds it again from any folder.
Where the files are is known to :mod:`.locate` only.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Mapping
from pathlib import Path

import numpy as np

from ..folder import OutputFolder
from ..index import INDEX_NAME, write_index
from .data import read_folder
from .locate import locate
from .page import document, esc
from .sections import (
    caution_section,
    design_section,
    hypotheses_section,
    sensitivity_section,
    study_section,
    table_fit_section,
)

REPORT_NAME = "report.html"


def report_html(root: Path | str, pictures: bool = True, background: Path | None = None,
                known: Mapping[str, Callable[[], np.ndarray]] | None = None) -> str:
    """The report of the output folder ``root`` as HTML text.

    ``pictures=False`` leaves the figures out (each says so); ``background`` is an image on the grid of the maps
    to draw slices over (default: the mean of the input images, ``mean_input``); ``known``: maps of the folder
    its writer still holds in memory, relative path -> the values the file holds (read instead of the file).
    """
    d = read_folder(root, known)
    sections = [study_section(d), design_section(d, pictures), hypotheses_section(d)]
    kind = d.kind
    if kind == "voxel":
        from .voxel import median_residual_sd, n_in_mask, voxel_sections

        sigma = median_residual_sd(d)
        sections.append(sensitivity_section(d, sigma, n_in_mask(d), "the units of the images (median residual "
                                            "SD over the mask)"))
        sections += voxel_sections(d, pictures, background)
    elif kind == "table":
        side = d.results_sidecar or {}
        sigma = float(side["residual_variance"]) ** 0.5 if "residual_variance" in side else None
        sections.append(sensitivity_section(d, sigma, len(d.hypotheses), "the units of the outcome (its "
                                            "residual SD)"))
        sections.append(table_fit_section(d, pictures))
    else:
        sections.append(sensitivity_section(d, None, len(d.hypotheses), "units of the residual SD (no data "
                                            "fitted yet)"))
    sections.append(caution_section())
    title = {"voxel": "Voxelwise fit", "table": "Table-level fit", "build": "Design"}[kind]
    spec = d.design.get("spec", "")
    version = d.design.get("software_version", "")
    return document(f"groupmodel report: {title}", f"spec {spec}; groupmodel {version}", sections)




def write_report(out: OutputFolder, pictures: bool = True,
                 known: Mapping[str, Callable[[], np.ndarray]] | None = None) -> list[str]:
    """Write report.html into an open output folder from the files already in it (maps in ``known`` from
    memory, the same values: see :func:`report_html`); returns its name.

    A report that cannot be built never costs the results: report.html then says what went wrong and how to
    build it again (``groupmodel report DIR --debug``), and one warning line goes to stderr.
    """
    assert out.path is not None, "use OutputFolder as a context manager"
    try:
        text = report_html(out.path, pictures=pictures, known=known)
    except Exception as exc:  # noqa: BLE001 - the maps and tables are worth more than the report
        problem = f"{type(exc).__name__}: {exc}"
        sys.stderr.write(f"groupmodel: warning: report.html could not be built ({problem}); the other files are "
                         f"written; try groupmodel report {out.target} --debug\n")
        text = document("groupmodel report", "not built", [("problem", "The report could not be built", (
            f"<p>{esc(problem)}</p><p>The other files of this folder are complete. Build the report again with "
            f"<code>groupmodel report {esc(str(out.target))} --debug</code>.</p>"))])
    out.write_text(REPORT_NAME, text)
    if (out.path / INDEX_NAME).exists():  # the index lists every file: now report.html too
        write_index(out.path)
    return [REPORT_NAME]


__all__ = ["REPORT_NAME", "locate", "read_folder", "report_html", "write_report"]
