"""The ``groupmodel`` command: argument parsing and printing over the Python API."""

from .main import main

__all__ = ["main"]
