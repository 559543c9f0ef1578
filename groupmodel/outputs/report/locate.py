"""Where the files of an output folder are: the ONE place the report knows file names.

An output folder may carry an index, ``outputs.json``::

    {"files": [{"path": "<relative posix path>", "kind": "map", "hypothesis": "age", "statistic": "z"}, ...]}

When it does, every file is found through it.  Otherwise the flat names of earlier folders are used:
``<hypothesis>_<statistic>.nii.gz`` (``.func.gii`` for surface data), ``<hypothesis>_clusters_<kind>.tsv``,
and ``design.json``, ``summary.json``, ``residual_variance.nii.gz``, ``mask.nii.gz``, ... at the top.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from ...errors import InputError

INDEX = "outputs.json"
MAP_SUFFIXES = (".nii.gz", ".nii", ".func.gii")
#: Files every groupmodel output folder has (the mark of one).
MARKERS = ("design.json", "contrasts.json")


@dataclass(frozen=True)
class Entry:
    path: str
    kind: str
    hypothesis: str | None
    statistic: str | None


@dataclass(frozen=True)
class Locations:
    """The files of one output folder."""

    root: Path
    entries: tuple[Entry, ...]
    indexed: bool

    def top(self, name: str) -> Path | None:
        """A folder-level file by its base name (``design.json``, ``participants_residuals.tsv``, ...)."""
        for e in self.entries:
            if e.hypothesis is None and Path(e.path).name == name:
                return self.root / e.path
        p = self.root / name
        return p if p.is_file() else None

    def map(self, hypothesis: str | None, statistic: str) -> Path | None:
        """The map of ``statistic`` (``z``, ``p_fwe``, ``residual_variance``, ``mean_input``, ...)."""
        for e in self.entries:
            if (e.kind == "map" and e.hypothesis == hypothesis and e.statistic == statistic
                    and e.path.endswith(MAP_SUFFIXES)):
                return self.root / e.path
        if hypothesis is None:  # folder-level maps, in an index that does not label them
            for e in self.entries:
                if e.hypothesis is None and Path(e.path).name in {statistic + s for s in MAP_SUFFIXES}:
                    return self.root / e.path
        return None

    def statistics(self, hypothesis: str) -> list[str]:
        """The statistics mapped for ``hypothesis``."""
        return [e.statistic for e in self.entries
                if e.kind == "map" and e.hypothesis == hypothesis and e.statistic and e.path.endswith(MAP_SUFFIXES)]

    def cluster_tables(self, hypothesis: str) -> dict[str, Path]:
        """Cluster-table kind (``voxel_fwe``, ``tfce_fwe``, ...) -> TSV path."""
        out: dict[str, Path] = {}
        for e in self.entries:
            if (e.hypothesis == hypothesis and e.statistic and e.statistic.startswith("clusters_")
                    and e.path.endswith(".tsv")):
                out[e.statistic.removeprefix("clusters_")] = self.root / e.path
        return out


def locate(root: Path | str) -> Locations:
    """The files of the output folder ``root`` (an InputError when it is not a groupmodel output folder)."""
    root = Path(root)
    if not root.is_dir():
        raise InputError(f"{root}: expected a groupmodel output folder, found no folder; give the --out of a run")
    index = root / INDEX
    if index.is_file():
        return Locations(root, _read_index(index), True)
    if not all((root / m).is_file() for m in MARKERS):
        raise InputError(f"{root}: expected a groupmodel output folder (with {' and '.join(MARKERS)}), "
                         "found none of its files; give the --out of a groupmodel build or fit")
    return Locations(root, _flat_entries(root), False)


def _read_index(index: Path) -> tuple[Entry, ...]:
    try:
        files = json.loads(index.read_text(encoding="utf-8"))["files"]
        return tuple(Entry(str(f["path"]), str(f.get("kind", "other")), f.get("hypothesis"), f.get("statistic"))
                     for f in files)
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"{index}: expected {{\"files\": [{{\"path\": ...}}, ...]}}, could not read it ({exc}); "
                         "rerun the fit to write it again") from None


def _flat_entries(root: Path) -> tuple[Entry, ...]:
    """Entries guessed from the flat names (hypothesis names from contrasts.json; the longest match wins)."""
    try:
        names = list(json.loads((root / "contrasts.json").read_text(encoding="utf-8")).get("hypotheses", {}))
    except (OSError, ValueError) as exc:
        raise InputError(f"{root / 'contrasts.json'}: cannot be read ({exc}); rerun the build or fit") from None
    names.sort(key=len, reverse=True)
    entries = []
    for p in sorted(root.iterdir()):
        if not p.is_file():
            continue
        entries.append(_flat_entry(p.name, names))
    return tuple(entries)


def _flat_entry(fname: str, names: list[str]) -> Entry:
    suffix = next((s for s in MAP_SUFFIXES if fname.endswith(s)), None)
    stem = fname[: -len(suffix)] if suffix else fname.rsplit(".", 1)[0]
    kind = "map" if suffix else ("table" if fname.endswith(".tsv") else "other")
    for h in names:
        if stem.startswith(h + "_"):
            return Entry(fname, kind, h, stem[len(h) + 1:])
    return Entry(fname, "mask" if stem == "mask" and suffix else kind, None, stem if suffix else None)


__all__ = ["INDEX", "Entry", "Locations", "locate"]
