"""Variance groups (spec key ``variance_groups``): which design rows share a residual variance, and whether each
group keeps residual degrees of freedom for a variance of its own.

A group's residual df is ``rho_g``, the sum of the diagonal of ``R = I - X X^+`` over its rows (``n_g - 1`` for a
group that is one cell of the design).  A group whose rows the design fits exactly (one observation, or cells of
one observation each) has none: it is refused here, with the JSON path, before any fit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..engine.linalg import rank_tolerance
from ..engine.welch import GROUP_DF_MIN, group_residual_df
from ..text import number_text
from .checks import Finding
from .design import Design
from .spec import ModelSpec

__all__ = ["VarianceGroups", "variance_group_findings", "variance_groups_of"]


@dataclass(frozen=True, eq=False)
class VarianceGroups:
    """The factor, its groups (levels with observations, in declared order) and each design row's group."""

    factor: str
    names: tuple[str, ...]
    labels: np.ndarray

    def as_dict(self) -> dict[str, object]:
        sizes = np.bincount(self.labels, minlength=len(self.names))
        return {"factor": self.factor, "groups": {n: int(s) for n, s in zip(self.names, sizes, strict=True)}}


def variance_groups_of(spec: ModelSpec, design: Design) -> VarianceGroups | None:
    """The variance groups of a built design (None without ``variance_groups``)."""
    factor = spec.variance_groups
    if factor is None:
        return None
    values = design.observations[factor].astype(str).to_numpy()
    names = tuple(lv for lv in design.factors[factor].levels if np.any(values == lv))
    index = {n: i for i, n in enumerate(names)}
    return VarianceGroups(factor, names, np.array([index[v] for v in values], dtype=np.int64))


def variance_group_findings(spec: ModelSpec, design: Design) -> list[Finding]:
    """An error for every variance group without residual degrees of freedom of its own."""
    groups = variance_groups_of(spec, design)
    if groups is None or design.n_observations == 0:
        return []
    u, s, _ = np.linalg.svd(design.matrix, full_matrices=False)
    r = int(np.sum(s > rank_tolerance(design.matrix, s)))
    rho = group_residual_df(u[:, :r], groups.labels, len(groups.names))
    sizes = np.bincount(groups.labels, minlength=len(groups.names))
    out = []
    for name, n_g, rho_g in zip(groups.names, sizes, rho, strict=True):
        if n_g < 2 or rho_g < GROUP_DF_MIN:
            out.append(Finding(
                "error", "variance_group_df",
                f"{spec.name} $.variance_groups: group {name!r} of {groups.factor!r} has {int(n_g)} observation(s) "
                f"and {number_text(round(float(rho_g), 3))} residual df after the design's fit, too few for a "
                "variance of its own; add observations, merge levels, or remove variance_groups"))
    return out
