"""``groupmodel check``: an audit of design and contrast files written by hand."""

from .pipeline import AuditReport, audit

__all__ = ["AuditReport", "audit"]
