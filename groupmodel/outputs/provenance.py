"""The provenance header every JSON file groupmodel writes carries: which program, which version, the note.

One definition, so that the program name, the version and the research-use note are written the same way
everywhere.  The files do not all carry the same keys (and the key order follows each file's layout), so
callers name the keys their file carries:

- design.json, contrasts.json, results.json, summary.json and every map and cluster-table sidecar carry
  all three (maps and cluster tables at the end of the sidecar, the others at the start);
- mask.json carries ``software_version`` only (at the end);
- the JSON report of ``groupmodel check`` carries ``software`` and ``software_version`` (no note).
"""

from __future__ import annotations

from collections.abc import Sequence

from .. import __version__
from ..text import DISCLAIMER

#: Every key of the header, in the order the files write them.
PROVENANCE_KEYS = ("software", "software_version", "note")


def provenance(keys: Sequence[str] = PROVENANCE_KEYS) -> dict[str, str]:
    """The provenance header (or the part of it that ``keys`` names, in that order)."""
    values = {"software": "groupmodel", "software_version": __version__, "note": DISCLAIMER}
    return {key: values[key] for key in keys}
