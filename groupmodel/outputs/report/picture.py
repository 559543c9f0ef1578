"""An embedded figure of the report (kept apart from the drawing, so that a report without figures never
imports matplotlib)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Picture:
    """An embedded figure: a data URI and its size in pixels."""

    uri: str
    width: int
    height: int


__all__ = ["Picture"]
