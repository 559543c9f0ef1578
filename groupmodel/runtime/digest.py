"""The SHA-256 of a file's bytes: provenance records it, and a resumed run checks its inputs by it."""

from __future__ import annotations

import hashlib
from pathlib import Path

__all__ = ["sha256_file"]


def sha256_file(path: Path | str) -> str:
    """The SHA-256 of a file's bytes, in hexadecimal (read in 1 MiB blocks)."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
