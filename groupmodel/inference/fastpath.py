"""Whether the compiled kernels (the optional extra ``fast``) are used: TFCE and cluster labelling on 3-D
grids (:mod:`groupmodel.inference.compiled`) and the element-wise pass of the permutation loop
(:mod:`groupmodel.inference.compiled_scan`).

The compiled kernels need numba: ``pip install "groupmodel[fast]"``.
Without it, or with the environment variable ``GROUPMODEL_NO_COMPILED=1``, the numpy implementations run
instead; they are the reference the compiled kernels are tested against.  Meshes and other graphs always
use the numpy implementations.
"""

from __future__ import annotations

import importlib
import os
from types import ModuleType

__all__ = ["ENV_NO_COMPILED", "compiled_kernels", "compiled_scan"]

#: Set to 1 (or any value but "" and "0") to use the numpy implementations even when numba is installed.
ENV_NO_COMPILED = "GROUPMODEL_NO_COMPILED"

_LOADED: dict[str, ModuleType | None] = {}


def compiled_kernels() -> ModuleType | None:
    """The compiled TFCE and cluster kernels, or None (numba missing or unusable, or turned off by the
    environment)."""
    return _load("kernels", "compiled")


def compiled_scan() -> ModuleType | None:
    """The compiled element-wise pass of the permutation loop, or None (as :func:`compiled_kernels`)."""
    return _load("scan", "compiled_scan")


def _load(key: str, module: str) -> ModuleType | None:
    if os.environ.get(ENV_NO_COMPILED, "") not in ("", "0"):
        return None
    if key not in _LOADED:
        try:
            loaded: ModuleType | None = importlib.import_module(f"{__package__}.{module}")
        except Exception:  # numba not installed, or it cannot cache or compile here: use numpy
            loaded = None
        _LOADED[key] = loaded
    return _LOADED[key]
