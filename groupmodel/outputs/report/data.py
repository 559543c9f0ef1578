"""What the report reads from an output folder (through :mod:`.locate` only)."""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ...errors import InputError
from .locate import Locations, locate


@dataclass(frozen=True)
class FolderData:
    """The files of one output folder that the report shows."""

    locations: Locations
    design: dict[str, Any]
    contrasts: dict[str, Any]
    design_frame: pd.DataFrame
    included: pd.DataFrame | None
    results: pd.DataFrame | None
    results_sidecar: dict[str, Any] | None
    cell_means: pd.DataFrame | None
    summary: dict[str, Any] | None
    summary_table: pd.DataFrame | None
    residuals: pd.DataFrame | None
    known: Mapping[str, Callable[[], np.ndarray]] = field(default_factory=dict)

    def load_map(self, path: Path) -> np.ndarray:
        """A map of the folder (:func:`load_map`), from memory when the writer of the folder handed it over
        (``known``: relative path -> the same values as the file, as :func:`load_map` gives them)."""
        try:
            rel = path.relative_to(self.locations.root).as_posix()
        except ValueError:  # e.g. a background image outside the folder
            rel = None
        made = self.known.get(rel) if rel is not None else None
        return made() if made is not None else load_map(path)

    @property
    def kind(self) -> str:
        """``voxel``, ``table`` or ``build``."""
        if self.summary is not None:
            return "voxel"
        return "table" if self.results is not None else "build"

    @property
    def hypotheses(self) -> dict[str, dict[str, Any]]:
        return self.contrasts.get("hypotheses", {})

    @property
    def matrix(self) -> np.ndarray:
        return self.design_frame[self.contrasts["columns"]].to_numpy(dtype=float)


def _json(path: Path | None) -> dict[str, Any] | None:
    if path is None:
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot be read as JSON ({exc}); rerun the build or fit") from None


def _tsv(path: Path | None) -> pd.DataFrame | None:
    if path is None:
        return None
    try:
        return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False,
                           dtype={"participant_id": str})
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot be read as a table ({exc}); rerun the build or fit") from None


def read_folder(root: Path | str, known: Mapping[str, Callable[[], np.ndarray]] | None = None) -> FolderData:
    """Read what the report needs (an InputError when ``root`` is not a groupmodel output folder); ``known``:
    maps the writer of the folder still holds (:attr:`FolderData.known`)."""
    locs = locate(root)
    design = _json(locs.top("design.json"))
    contrasts = _json(locs.top("contrasts.json"))
    frame = _tsv(locs.top("design.tsv"))
    if design is None or contrasts is None or frame is None:
        raise InputError(f"{root}: expected design.json, contrasts.json and design.tsv, found not all; "
                         "give the --out of a groupmodel build or fit")
    return FolderData(
        locations=locs, design=design, contrasts=contrasts, design_frame=frame,
        included=_tsv(locs.top("participants_included.tsv")),
        results=_tsv(locs.top("results.tsv")), results_sidecar=_json(locs.top("results.json")),
        cell_means=_tsv(locs.top("cell_means.tsv")),
        summary=_json(locs.top("summary.json")), summary_table=_tsv(locs.top("summary.tsv")),
        residuals=_tsv(locs.top("participants_residuals.tsv")), known=dict(known or {}),
    )


def load_map(path: Path) -> np.ndarray:
    """A map's values: the 3-D array of a volume, the 1-D array of a surface (GIFTI) file."""
    import nibabel as nib

    try:
        img = nib.load(str(path))
        if str(path).endswith(".gii"):
            return np.asarray(img.darrays[0].data, dtype=float).ravel()
        return np.asarray(img.dataobj, dtype=float)
    except (OSError, ValueError, IndexError, nib.filebasedimages.ImageFileError) as exc:
        raise InputError(f"{path}: cannot be read as an image ({exc}); name a NIfTI or GIFTI file") from None


__all__ = ["FolderData", "load_map", "read_folder"]
