"""Every output folder is a BIDS derivatives dataset: ``dataset_description.json`` and the index, written last.

Fields as the BIDS specification (version :data:`BIDS_VERSION`, "Modality agnostic files",
dataset_description.json; "Derivatives") asks of a derivative dataset: ``Name`` and ``BIDSVersion`` (required),
``DatasetType`` ``"derivative"``, ``GeneratedBy`` (required for derivatives; each with ``Name``, and here
``Version`` and ``Description``, which gives the command line) and ``SourceDatasets`` (recommended) when the
participants table sits in a BIDS dataset (a folder with its own dataset_description.json).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from .. import __version__
from .folder import OutputFolder
from .index import write_index

#: The version of the BIDS specification the folder follows.
BIDS_VERSION = "1.10.0"


def source_datasets(participants: Path | None) -> list[dict[str, str]] | None:
    """The BIDS dataset the participants table belongs to (its folder holds dataset_description.json)."""
    if participants is None:
        return None
    folder = Path(participants).parent
    description = folder / "dataset_description.json"
    if not description.is_file():
        return None
    entry = {"URL": folder.resolve().as_uri()}
    try:
        raw = json.loads(description.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raw = {}
    if isinstance(raw, dict):
        for key, field in (("DatasetDOI", "DOI"), ("Version", "Version")):
            if isinstance(raw.get(key), str):
                entry[field] = raw[key]
    return [entry]


def dataset_description(what: str, spec: Any, command: str) -> dict[str, Any]:
    """``dataset_description.json`` of a folder with ``what`` (e.g. ``"voxelwise fit"``) of ``spec``."""
    out: dict[str, Any] = {
        "Name": f"groupmodel {what} of {spec.name}",
        "BIDSVersion": BIDS_VERSION,
        "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "groupmodel", "Version": __version__,
                         "Description": f"command line: {command}"}],
    }
    sources = source_datasets(getattr(spec, "participants", None))
    if sources:
        out["SourceDatasets"] = sources
    return out


def finish_folder(o: OutputFolder, description: dict[str, Any]) -> list[str]:
    """Write dataset_description.json, then the index of every file (call last, inside the folder's context)."""
    assert o.path is not None, "use OutputFolder as a context manager"
    o.write_json("dataset_description.json", description)
    write_index(o.path)
    return ["dataset_description.json", "outputs.json"]
