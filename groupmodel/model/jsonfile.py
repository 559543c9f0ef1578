"""Reading the text and JSON files of a study (model spec, participants.json) so that every fault is one message.

Not UTF-8 (with the line of the first bad byte), invalid JSON (line and column), nesting too deep for any
model spec, integers too long to read, and numbers a 64-bit float cannot hold (``1e999``, a 400-digit
integer, ``NaN``, ``Infinity``): each becomes the caller's error class naming the file and, for values, the
JSON path, instead of a ValueError, RecursionError or OverflowError.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from ..errors import GroupModelError

#: Deepest nesting of objects and arrays accepted (a model spec needs about six levels).
MAX_DEPTH = 32
#: Longest integer read as a number (a float holds at most about 1.8e308, 309 digits).
MAX_INT_DIGITS = 310


class _Unreadable(str):
    """A number as written that no float can hold: too long an integer, ``NaN`` or ``Infinity``."""


def _parse_int(text: str) -> int | _Unreadable:
    return int(text) if len(text.lstrip("-")) <= MAX_INT_DIGITS else _Unreadable(text)


def read_text(path: Path, what: str, error: type[GroupModelError]) -> str:
    """The file as UTF-8 text; ``what`` names it in messages ("model spec", "participants sidecar")."""
    if path.is_dir():
        raise error(f"{what} {path}: expected a file, found a folder; give the file")
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise error(f"{what} {path}: file not found; check the path") from None
    except OSError as exc:
        raise error(f"{what} {path}: cannot be read ({exc.strerror}); check the file and its permissions") from None
    return decode_utf8(data, f"{what} {path}", error)


def decode_utf8(data: bytes, where: str, error: type[GroupModelError], encoding: str = "utf-8") -> str:
    """``data`` decoded, or ``error`` naming the line and the first byte that is not UTF-8."""
    try:
        return data.decode(encoding)
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise error(
            f"{where} line {line}: not UTF-8 text (byte 0x{data[exc.start]:02x}, perhaps Latin-1 or Windows-1252); "
            "save the file as UTF-8"
        ) from None


def read_json(path: Path, what: str, error: type[GroupModelError], numbers: bool = True) -> Any:
    """The JSON value of the file at ``path``, checked by :func:`check_values` (numbers too when ``numbers``)."""
    text = read_text(path, what, error)
    try:
        raw = json.loads(text, parse_int=_parse_int, parse_constant=_Unreadable)
    except json.JSONDecodeError as exc:
        raise error(
            f"{what} {path} line {exc.lineno}, column {exc.colno}: invalid JSON ({exc.msg}); fix the syntax"
        ) from None
    except RecursionError:
        raise error(
            f"{what} {path}: arrays or objects nested too deeply to read; expected at most {MAX_DEPTH} "
            "levels; fix the file"
        ) from None
    check_values(raw, f"{what} {path}", error, numbers)
    return raw


def _number_problem(value: Any) -> str | None:
    """Why ``value`` is a number no float holds, or None."""
    if isinstance(value, _Unreadable):
        shown = value if len(value) <= 20 else f"a {len(value.lstrip('-'))}-digit integer"
        return f"found {shown}"
    if isinstance(value, float) and not math.isfinite(value):
        return "found a number too large for a float (such as 1e999)"
    if isinstance(value, int) and not isinstance(value, bool):
        try:
            float(value)
        except OverflowError:
            return f"found a {len(str(abs(value)))}-digit integer"
    return None


def _path_text(parts: list[str | int]) -> str:
    return "$" + "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in parts)


def check_values(raw: Any, where: str, error: type[GroupModelError], numbers: bool = True) -> None:
    """Refuse nesting deeper than :data:`MAX_DEPTH` and (with ``numbers``) numbers no float can hold, naming
    the JSON path.  Iterative, so no depth can overflow the stack."""
    stack: list[tuple[Any, list[str | int]]] = [(raw, [])]
    while stack:
        value, parts = stack.pop()
        if len(parts) > MAX_DEPTH:
            raise error(
                f"{where} {_path_text(parts[:3])}...: arrays or objects nested more than {MAX_DEPTH} levels deep; "
                "a model spec needs a few; fix the file"
            )
        if isinstance(value, dict):
            stack.extend((v, [*parts, str(k)]) for k, v in reversed(value.items()))
        elif isinstance(value, list):
            stack.extend((v, [*parts, i]) for i, v in reversed(list(enumerate(value))))
        elif numbers and (problem := _number_problem(value)) is not None:
            raise error(
                f"{where} {_path_text(parts)}: expected a number within about +-1.8e308 (a 64-bit float), "
                f"{problem}; write a smaller number"
            )
