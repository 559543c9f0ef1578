"""The provenance header every JSON file groupmodel writes carries: which program, which version, the note.

One definition, so that the program name, the version and the research-use note are written the same way
everywhere.  The files do not all carry the same keys (and the key order follows each file's layout), so
callers name the keys their file carries:

- design.json, contrasts.json, results.json, summary.json and every map and cluster-table sidecar carry
  all three (maps and cluster tables at the end of the sidecar, the others at the start);
- mask.json carries ``software_version`` only (at the end);
- the JSON report of ``groupmodel check`` carries ``software`` and ``software_version`` (no note).

Every file of an output folder that has a provenance header also carries the run record
(:func:`run_record`): the SHA-256 of each input file, a digest of the image list, the software versions,
the start time and the wall time.
"""

from __future__ import annotations

import datetime
import hashlib
import os
import platform
import shlex
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .. import __version__
from ..runtime.digest import sha256_file
from ..text import DISCLAIMER

#: Every key of the header, in the order the files write them.
PROVENANCE_KEYS = ("software", "software_version", "note")


def provenance(keys: Sequence[str] = PROVENANCE_KEYS) -> dict[str, str]:
    """The provenance header (or the part of it that ``keys`` names, in that order)."""
    values = {"software": "groupmodel", "software_version": __version__, "note": DISCLAIMER}
    return {key: values[key] for key in keys}


# --------------------------------------------------------------------------------------------------
# The run: its inputs (with SHA-256 digests), the software versions, when it started and how long it took
# --------------------------------------------------------------------------------------------------
#: Keys of the run record that change from one run to the next with the same inputs.
TIME_KEYS = ("started", "wall_time_seconds")
#: What the digest of the image list is taken over.
IMAGE_LIST_RULE = ("SHA-256 of one line per image in design-row order: path, volume (empty for one image "
                   "per file), size in bytes, modification time in ns; tab-separated, newline-terminated")


@dataclass(frozen=True)
class RunClock:
    """When a run started: UTC wall-clock time (recorded) and a monotonic clock reading (for the wall time)."""

    started: str
    clock: float

    @classmethod
    def start(cls) -> RunClock:
        now = datetime.datetime.now(datetime.UTC)
        return cls(now.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), time.monotonic())


@dataclass(frozen=True)
class RunInputs:
    """The files a run read: the spec, the participants table and its JSON, an observations table, the mask
    and the images (path and volume, in design-row order); paths as the spec gave them."""

    spec: Path | None = None
    participants: Path | None = None
    participants_sidecar: Path | None = None
    observations: Path | None = None
    mask: Path | None = None
    images: tuple[tuple[Path, int | None], ...] = ()
    participants_sha256: str | None = None  # of the bytes the run read, when known (else the file is hashed)

    @classmethod
    def of_spec(cls, spec: Any, mask: Path | str | None = None, images: Sequence[tuple[Path, int | None]] = (),
                sample: Any = None) -> RunInputs:
        """The inputs of ``spec`` (a ModelSpec); ``observations`` only where the spec has such a key; with the
        ``sample`` read from the participants table, the SHA-256 of the bytes it was read from."""
        observations = getattr(spec, "observations", None)
        # with an observations table, sample.table is the join: the participants table as read is kept apart
        table = getattr(sample, "participants_table", None)
        table = table if table is not None else getattr(sample, "table", None)
        digest = getattr(table, "attrs", {}).get("sha256")
        return cls(spec=spec.path, participants=spec.participants, participants_sidecar=spec.participants_sidecar,
                   observations=Path(observations) if isinstance(observations, str | Path) else None,
                   mask=None if mask is None else Path(mask), images=tuple(images), participants_sha256=digest)


def _file_record(path: Path | None, digest: str | None = None) -> dict[str, str] | None:
    if path is None:
        return None
    return {"path": str(path), "sha256": digest or sha256_file(path)}


def image_list_record(images: Sequence[tuple[Path, int | None]]) -> dict[str, Any]:
    """Count, total size and the digest of the image list (see :data:`IMAGE_LIST_RULE`)."""
    lines, total, seen = [], 0, set()
    for path, volume in images:
        st = os.stat(path)
        lines.append(f"{path}\t{'' if volume is None else volume}\t{st.st_size}\t{st.st_mtime_ns}\n")
        if path not in seen:  # a 4-D file counts once
            total += st.st_size
            seen.add(path)
    return {"count": len(images), "files": len(seen), "total_bytes": total,
            # surrogateescape: a path undecodable in the locale (POSIX locale, non-ASCII names) hashes as its bytes
            "list_sha256": hashlib.sha256("".join(lines).encode("utf-8", "surrogateescape")).hexdigest(),
            "list_rule": IMAGE_LIST_RULE}


def software_versions() -> dict[str, str]:
    """Versions of groupmodel and of the libraries its numbers depend on."""
    import nibabel
    import numpy
    import scipy

    return {"groupmodel": __version__, "numpy": numpy.__version__, "scipy": scipy.__version__,
            "nibabel": nibabel.__version__, "python": platform.python_version()}


def run_record(inputs: RunInputs, clock: RunClock) -> dict[str, Any]:
    """The ``provenance`` object of every sidecar and summary: inputs with digests, versions, start, wall time.

    Computed once per folder written; the wall time runs from the start of the run to this call.
    """
    files = {"spec": _file_record(inputs.spec),
             "participants": _file_record(inputs.participants, inputs.participants_sha256),
             "participants_sidecar": _file_record(inputs.participants_sidecar)}
    if inputs.observations is not None:
        files["observations"] = _file_record(inputs.observations)
    files["mask"] = _file_record(inputs.mask)
    out: dict[str, Any] = {"inputs": files}
    if inputs.images:
        out["images"] = image_list_record(inputs.images)
    out["software_versions"] = software_versions()
    out["started"] = clock.started
    out["wall_time_seconds"] = round(time.monotonic() - clock.clock, 3)
    return out


def command_line(argv: Sequence[str] | None = None) -> str:
    """The command line of the run, shell-quoted (``groupmodel ...`` when given the CLI's arguments)."""
    words = ["groupmodel", *argv] if argv is not None else [Path(sys.argv[0]).name, *sys.argv[1:]]
    return shlex.join(words)
