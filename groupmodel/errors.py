"""The exception hierarchy of groupmodel and its exit codes.

Every error that reaches the command line is one of these; the CLI prints
``str(error)`` as one line and exits with ``error.exit_code``.

Messages follow one template: what was expected, what came instead, where
(file, row, column or JSON path), and the fix.
"""

from __future__ import annotations


class GroupModelError(Exception):
    """Base class; never raised directly."""

    exit_code: int = 1


class InputError(GroupModelError):
    """Usage errors and unreadable or malformed input (exit code 2)."""

    exit_code = 2


class SpecError(InputError):
    """The JSON model spec is unreadable or fails its schema (exit code 2)."""


class TableError(InputError):
    """participants.tsv (or a design/contrast file) cannot be read as asked (exit code 2)."""


class ImageError(InputError):
    """An image is missing, unreadable, or does not match the others (exit code 2)."""


class OutputError(InputError):
    """The output folder cannot be written, or exists without --force (exit code 2)."""


class ModelError(GroupModelError):
    """The model or data has a problem: rank deficiency, empty design, ... (exit code 1)."""

    exit_code = 1


class EstimabilityError(ModelError):
    """A hypothesis is not estimable in the design (exit code 1)."""
