"""Paths written in text files (the spec, a table column) as the file system names them.

A spec or table is read as UTF-8, so a path in it is a string of characters ("cartes_é/sub-01.nii.gz").  Under a
locale whose file-system encoding is not UTF-8 (a plain POSIX/C locale without Python's UTF-8 mode), Python
would encode that string in ASCII and fail, and the file would be reported "not found".  The bytes on disk are
UTF-8 (the encoding of the text file that names them), so :func:`text_path` turns the characters back into
those bytes and decodes them as the file system does (with surrogate escapes), which names the same file.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["text_join", "text_path"]


def text_path(text: str) -> str:
    """``text`` (a path read from a UTF-8 text file) in the form the file system's encoding names it."""
    if sys.getfilesystemencoding().lower().replace("-", "") == "utf8" or text.isascii():
        return text
    try:
        return os.fsdecode(text.encode("utf-8", "surrogateescape"))
    except UnicodeError:
        return text


def text_join(base: Path, text: str) -> Path:
    """``base / text`` with ``text`` as the file system names it."""
    return base / text_path(text)
