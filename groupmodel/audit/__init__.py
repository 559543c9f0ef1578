"""``groupmodel check``: an audit of design and contrast files written by hand."""

from .pipeline import AuditReport, audit, run_check_cli

__all__ = ["AuditReport", "audit", "run_check_cli"]
