"""groupmodel: group-level design matrices, hypotheses over cell means, design audits and voxelwise OLS.

For research use; not a clinical or diagnostic tool.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .model import Model, build  # noqa: E402

__all__ = ["Model", "build", "__version__"]
