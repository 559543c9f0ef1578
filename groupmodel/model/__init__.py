"""From a JSON spec and the participants table to a :class:`Model`: sample, design, hypotheses, findings.

No image arrays and no files written here: :mod:`groupmodel.outputs` writes what a model holds.
"""

from ..text import DISCLAIMER
from .assembly import Model, build

__all__ = ["DISCLAIMER", "Model", "build"]
