"""groupmodel: group-level design matrices, hypotheses over cell means, design audits and voxelwise OLS.

For research use; not a clinical or diagnostic tool.
"""

from __future__ import annotations

__version__ = "0.1.0"

from typing import TYPE_CHECKING, Any

__all__ = ["Model", "build", "__version__"]

if TYPE_CHECKING:
    from .model import Model, build


def __getattr__(name: str) -> Any:
    # Imported on first use, so that a module of the package (say, in a worker process that only
    # enhances maps) does not pull in pandas, scipy.stats and the whole model layer.
    if name in ("Model", "build"):
        from . import model

        return getattr(model, name)
    raise AttributeError(f"module 'groupmodel' has no attribute {name!r}")
