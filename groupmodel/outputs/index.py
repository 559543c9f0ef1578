"""Where each file of an output folder goes, and the index ``outputs.json`` that lists them all.

The layout is derived mechanically from (hypothesis, statistic), so a new statistic lands in its place
without edits here:

    dataset_description.json           the folder as a BIDS derivatives dataset
    outputs.json                       this index: every other file with kind, hypothesis, statistic
    design.tsv/json/png, contrasts.*   the model
    stratum-<s>_design/transforms/contrasts.tsv   with within-participant factors: each error stratum's model
    summary.tsv/json, results.tsv/json the run as a whole (voxelwise fit / table fit)
    mask.nii.gz, residual_variance.*   maps that belong to no hypothesis
    report.html
    hypotheses/<hypothesis>/<statistic>.nii.gz (.func.gii for surface data) and <statistic>.json
    hypotheses/<hypothesis>/clusters_<kind>.tsv and .json

The index is read back with :func:`read_index` and :func:`find`, so scripts never parse file names.
"""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import asdict, dataclass
from pathlib import Path, PurePosixPath

#: The index file at the top of every output folder.
INDEX_NAME = "outputs.json"
#: The folder holding one sub-folder per hypothesis.
HYPOTHESES_DIR = "hypotheses"
#: What a file is (the ``kind`` of an index entry).
KINDS = ("map", "sidecar", "table", "design", "contrasts", "picture", "summary", "mask", "report", "dataset",
         "results", "other")
#: Endings of map files (volumes and surface data).
MAP_ENDINGS = (".nii.gz", ".nii", ".func.gii", ".gii")
#: The files of an error stratum (within-participant factors) start with this.
STRATUM_PREFIX = "stratum-"
_TOP_KINDS = {"design": "design", "contrasts": "contrasts", "summary": "summary", "results": "results",
              "dataset_description": "dataset", "report": "report"}


@dataclass(frozen=True)
class IndexEntry:
    """One file of an output folder: its path (relative, POSIX), what it is, and whose it is."""

    path: str
    kind: str
    hypothesis: str | None
    statistic: str | None

    def as_dict(self) -> dict[str, str | None]:
        return asdict(self)


def map_ending(grid_kind: str) -> str:
    """``.func.gii`` for surface data (the GIFTI name of data over vertices), else ``.nii.gz``."""
    return ".func.gii" if grid_kind == "gifti" else ".nii.gz"


def hypothesis_file(hypothesis: str | None, stem: str, ending: str) -> str:
    """The relative path of a file of ``hypothesis`` (``None``: a file of the whole run, at the top)."""
    if hypothesis is None:
        return stem + ending
    return f"{HYPOTHESES_DIR}/{hypothesis}/{stem}{ending}"


def map_path(hypothesis: str | None, statistic: str, grid_kind: str = "nifti") -> str:
    """Where the map of ``statistic`` for ``hypothesis`` goes."""
    return hypothesis_file(hypothesis, statistic, map_ending(grid_kind))


def sidecar_path(hypothesis: str | None, statistic: str) -> str:
    """Where the JSON sidecar of a map (or of a table) goes: beside it, same stem."""
    return hypothesis_file(hypothesis, statistic, ".json")


def table_path(hypothesis: str | None, statistic: str) -> str:
    """Where a table (e.g. ``clusters_tfce_fwe``) of ``hypothesis`` goes."""
    return hypothesis_file(hypothesis, statistic, ".tsv")


def _split(name: str) -> tuple[str, str]:
    for ending in (*MAP_ENDINGS, ".json", ".tsv", ".png", ".svg", ".html"):
        if name.endswith(ending):
            return name[: -len(ending)], ending
    stem, dot, ext = name.rpartition(".")
    return (stem, dot + ext) if dot else (name, "")


def _kind_of_ending(ending: str) -> str:
    if ending in MAP_ENDINGS:
        return "map"
    return {".json": "sidecar", ".tsv": "table", ".png": "picture", ".svg": "picture",
            ".html": "report"}.get(ending, "other")


def classify(path: str) -> IndexEntry:
    """The index entry of a file, from its relative path alone (the inverse of the layout above)."""
    parts = PurePosixPath(path).parts
    stem, ending = _split(parts[-1])
    if len(parts) == 3 and parts[0] == HYPOTHESES_DIR:
        return IndexEntry(path, _kind_of_ending(ending), parts[1], stem)
    if len(parts) != 1:
        return IndexEntry(path, "other", None, None)
    if ending in (".png", ".svg"):
        return IndexEntry(path, "picture", None, stem)
    if stem in _TOP_KINDS:
        return IndexEntry(path, _TOP_KINDS[stem], None, None)
    if stem.startswith(STRATUM_PREFIX) and ending == ".tsv":  # an error stratum's design, transforms, contrasts
        return IndexEntry(path, "contrasts" if stem.endswith("_contrasts") else "design", None, stem)
    if stem == "mask":
        return IndexEntry(path, "mask" if ending in MAP_ENDINGS else "sidecar", None, "mask")
    kind = _kind_of_ending(ending)
    return IndexEntry(path, kind, None, stem if kind in ("map", "sidecar", "table") else None)


def scan(folder: Path | str) -> list[IndexEntry]:
    """Every file under ``folder`` (the index itself and hidden files left out), classified, sorted by path."""
    root = Path(folder)
    paths = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = [d for d in dirnames if not d.startswith(".")]
        for name in filenames:
            if name.startswith(".") or (Path(dirpath) == root and name == INDEX_NAME):
                continue
            paths.append(Path(dirpath, name).relative_to(root).as_posix())
    return [classify(p) for p in sorted(paths)]


def index_text(entries: list[IndexEntry]) -> str:
    return json.dumps({"files": [e.as_dict() for e in entries]}, indent=2, ensure_ascii=False) + "\n"


def write_index(folder: Path | str) -> Path:
    """Write ``outputs.json`` listing every file now in ``folder`` (used while an output folder is written)."""
    path = Path(folder) / INDEX_NAME
    path.write_text(index_text(scan(folder)), encoding="utf-8")
    return path


def refresh_index(folder: Path | str) -> Path:
    """Rewrite ``outputs.json`` of a finished folder (after a file was added, e.g. a rebuilt report), atomically."""
    folder = Path(folder)
    fd, tmp = tempfile.mkstemp(prefix=f".{INDEX_NAME}.", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(index_text(scan(folder)))
        os.replace(tmp, folder / INDEX_NAME)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return folder / INDEX_NAME


def read_index(folder: Path | str) -> list[IndexEntry]:
    """The entries of ``outputs.json`` in ``folder``."""
    raw = json.loads((Path(folder) / INDEX_NAME).read_text(encoding="utf-8"))
    return [IndexEntry(f["path"], f["kind"], f.get("hypothesis"), f.get("statistic")) for f in raw["files"]]


def find(folder: Path | str, hypothesis: str | None, statistic: str | None, kind: str = "map") -> Path | None:
    """The file of ``kind`` for (``hypothesis``, ``statistic``) listed in the index, or None."""
    for entry in read_index(folder):
        if entry.kind == kind and entry.hypothesis == hypothesis and entry.statistic == statistic:
            return Path(folder) / entry.path
    return None


__all__ = ["HYPOTHESES_DIR", "INDEX_NAME", "KINDS", "IndexEntry", "classify", "find", "map_path", "read_index",
           "refresh_index", "scan", "sidecar_path", "table_path", "write_index"]
