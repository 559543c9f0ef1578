"""Which ``--out`` a run may write to, checked before any work.

* ``--out`` may not be the working directory or a folder holding it, nor a folder holding an input (the spec,
  the participants table, the images, the mask): replacing it would delete them (or fail at the end on a busy
  folder).
* An existing, non-empty folder is replaced only with ``--force``, and only when it is a groupmodel output:
  it holds the record groupmodel writes into every output folder (:data:`OUTPUT_RECORD`, listing the files it
  wrote) and no other file, or (without that record) a ``dataset_description.json`` whose ``GeneratedBy`` names
  groupmodel and no file its index ``outputs.json`` does not list.  Anything
  else (a folder of notes, a home directory) is refused.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable
from pathlib import Path

from ..errors import OutputError

__all__ = ["OUTPUT_RECORD", "check_target", "output_record", "why_not_replaceable"]

#: The record inside every output folder: who wrote it and which files.
OUTPUT_RECORD = ".groupmodel-output.json"
#: Files at most named in a refusal.
_SHOWN = 3


def output_record(folder: Path) -> str:
    """The record's JSON text for the files now in ``folder`` (relative paths, sorted)."""
    files = sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file() and p.name != OUTPUT_RECORD)
    return json.dumps({"software": "groupmodel", "files": files}, indent=2, ensure_ascii=False) + "\n"


def _generated_by_groupmodel(folder: Path) -> bool:
    try:
        description = json.loads((folder / "dataset_description.json").read_text(encoding="utf-8"))
        return any(str(g.get("Name", "")).lower() == "groupmodel" for g in description.get("GeneratedBy", []))
    except (OSError, ValueError, AttributeError, TypeError):
        return False


def _indexed_files(folder: Path) -> set[str] | None:
    """The files the index ``outputs.json`` of a groupmodel folder lists (with the index itself)."""
    if not (folder / "outputs.json").exists():
        return {"dataset_description.json"}
    try:
        index = json.loads((folder / "outputs.json").read_text(encoding="utf-8"))
        return {str(e["path"]) for e in index["files"]} | {"outputs.json"}
    except (OSError, ValueError, KeyError, TypeError):
        return None


def why_not_replaceable(folder: Path) -> str | None:
    """None when ``folder`` is a groupmodel output that --force may replace, else the reason it is not."""
    try:
        record = json.loads((folder / OUTPUT_RECORD).read_text(encoding="utf-8"))
        ours = set(record["files"]) if record.get("software") == "groupmodel" else None
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        ours = _indexed_files(folder) if _generated_by_groupmodel(folder) else None
    if ours is None:
        return "it is not a groupmodel output folder (no groupmodel record in it)"
    others = sorted(str(p.relative_to(folder)) for p in folder.rglob("*")
                    if p.is_file() and p.name != OUTPUT_RECORD and str(p.relative_to(folder)) not in ours)
    if others:
        more = f" and {len(others) - _SHOWN} more" if len(others) > _SHOWN else ""
        return f"it holds files groupmodel did not write ({', '.join(others[:_SHOWN])}{more})"
    return None


def _contains(folder: Path, path: Path) -> bool:
    """Whether ``path`` is ``folder`` or inside it (symbolic links resolved)."""
    try:
        f, p = folder.resolve(), path.resolve()
    except OSError:
        return False
    return p == f or f in p.parents


def check_target(target: Path, force: bool, inputs: Iterable[Path | str | None] = ()) -> None:
    """Refuse a ``--out`` that would replace the working directory, an input, or a folder that is not a
    groupmodel output (see the module docstring); nothing is written."""
    if _contains(target, Path(os.getcwd())):
        raise OutputError(
            f"--out {target}: this is the working directory or a folder holding it; replacing it is refused; "
            "choose a new folder, e.g. --out results/"
        )
    for path in inputs:
        if path is not None and _contains(target, Path(path)):
            raise OutputError(
                f"--out {target}: the folder holds an input of this run ({path}); replacing it would delete it; "
                "choose a new folder, e.g. --out results/"
            )
    if not target.exists():
        return
    if not target.is_dir():
        raise OutputError(f"--out {target}: expected a folder, found a file; choose another path")
    if not any(target.iterdir()):
        return
    if not force:
        raise OutputError(
            f"--out {target}: the folder exists and is not empty; choose another path or add --force to replace it"
        )
    reason = why_not_replaceable(target)
    if reason is not None:
        raise OutputError(
            f"--out {target}: --force replaces only a groupmodel output folder, and {reason}; choose another path "
            "or empty the folder yourself"
        )
