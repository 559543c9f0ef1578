"""Whether TFCE and cluster labelling on 3-D grids use the compiled kernels (the optional extra ``fast``).

The compiled kernels (:mod:`groupmodel.inference.compiled`) need numba: ``pip install "groupmodel[fast]"``.
Without it, or with the environment variable ``GROUPMODEL_NO_COMPILED=1``, the numpy implementations run
instead; they are the reference the compiled kernels are tested against.  Meshes and other graphs always
use the numpy implementations.
"""

from __future__ import annotations

import os
from types import ModuleType

__all__ = ["ENV_NO_COMPILED", "compiled_kernels"]

#: Set to 1 (or any value but "" and "0") to use the numpy implementations even when numba is installed.
ENV_NO_COMPILED = "GROUPMODEL_NO_COMPILED"

_LOADED: dict[str, ModuleType | None] = {}


def compiled_kernels() -> ModuleType | None:
    """The compiled kernels module, or None (numba missing or unusable, or turned off by the environment)."""
    if os.environ.get(ENV_NO_COMPILED, "") not in ("", "0"):
        return None
    if "kernels" not in _LOADED:
        try:
            from . import compiled
        except Exception:  # numba not installed, or it cannot cache or compile here: use numpy
            compiled = None
        _LOADED["kernels"] = compiled
    return _LOADED["kernels"]
