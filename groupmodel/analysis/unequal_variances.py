"""Findings of a fit: groups of a factor whose residual variances differ (the pooled t and F assume they do not).

For every model factor (other than the ``variance_groups`` factor, whose groups already get their own variance)
the rule of :mod:`groupmodel.engine.variance_check` (group variance ratio above ``VARIANCE_RATIO_WARN`` and
Levene's test, ``scipy.stats.levene`` centred on medians, below ``LEVENE_ALPHA``) is applied to the OLS residuals;
a voxelwise fit warns when it holds in more than :data:`VOXEL_SHARE_WARN` of the voxels (vertices) in the mask.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial

import numpy as np

from ..engine.variance_check import (
    LEVENE_ALPHA,
    VARIANCE_RATIO_WARN,
    VOXEL_SHARE_WARN,
    count_unequal,
    screen,
    unequal,
    widespread,
)
from ..engine.welch import GROUP_DF_MIN, group_residual_df
from ..model.assembly import Model
from ..text import number_text

__all__ = ["LEVENE_ALPHA", "VARIANCE_RATIO_WARN", "VOXEL_SHARE_WARN", "UnequalVarianceTally", "residuals_of"]


def residuals_of(u: np.ndarray, y: np.ndarray, centred: bool) -> np.ndarray:
    """OLS residuals (n, v) of data ``y`` against the column space ``u`` (n, r)."""
    yc = np.array(y, dtype=np.float64)
    if centred:
        yc -= yc.mean(axis=0)
    return yc - u @ (u.T @ yc)


@dataclass(frozen=True)
class _Factor:
    name: str
    groups: tuple[str, ...]
    labels: np.ndarray
    rho: np.ndarray


def chunk_counts(factors: tuple[_Factor, ...], resid: np.ndarray) -> dict[str, tuple[int, int]]:
    """Factor -> (voxels whose groups' variances differ, voxels tested) in one chunk's OLS residuals (n, v)."""
    return {f.name: count_unequal(resid, f.labels, f.rho) for f in factors}


@dataclass
class UnequalVarianceTally:
    """Counts, over the chunks of a fit, of voxels whose groups' residual variances differ (per factor)."""

    model: Model
    u: np.ndarray
    centred: bool
    flagged: dict[str, int] = field(default_factory=dict)
    tested: dict[str, int] = field(default_factory=dict)
    last: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self._factors = self._checkable()

    def _checkable(self) -> list[_Factor]:
        design = self.model.design
        out = []
        for name, coding in design.factors.items():
            if name == self.model.spec.variance_groups:
                continue
            values = design.observations[name].astype(str).to_numpy()
            groups = tuple(lv for lv in coding.levels if np.any(values == lv))
            if len(groups) < 2:
                continue
            labels = np.array([groups.index(v) for v in values], dtype=np.int64)
            rho = group_residual_df(self.u, labels, len(groups))
            sizes = np.bincount(labels, minlength=len(groups))
            if np.all(rho >= GROUP_DF_MIN) and np.all(sizes >= 2):
                out.append(_Factor(name, groups, labels, rho))
        return out

    def counter(self) -> Callable[[np.ndarray], dict[str, tuple[int, int]]]:
        """The counting of a chunk's OLS residuals (n, v) as a pure function (pickles, for a cluster worker):
        :func:`chunk_counts`."""
        return partial(chunk_counts, tuple(self._factors))

    def add_counts(self, counts: dict[str, tuple[int, int]]) -> None:
        """Add one chunk's :func:`chunk_counts` (integers: in any order)."""
        for name, (hit, tested) in counts.items():
            self.flagged[name] = self.flagged.get(name, 0) + hit
            self.tested[name] = self.tested.get(name, 0) + tested

    def add(self, y: np.ndarray) -> None:
        """Count one chunk of data (n, v)."""
        resid = residuals_of(self.u, y, self.centred)
        for f in self._factors:
            variances, p, checked = screen(resid, f.labels, f.rho)
            hit = unequal(variances, p)
            self.flagged[f.name] = self.flagged.get(f.name, 0) + int(np.count_nonzero(hit))
            self.tested[f.name] = self.tested.get(f.name, 0) + int(np.count_nonzero(checked))
            self.last[f.name] = (variances, p)

    def table_findings(self) -> list[str]:
        """Warnings of a one-column fit (call after one :meth:`add` of that column)."""
        out = []
        for f in self._factors:
            variances, p = self.last[f.name]
            if not self.flagged.get(f.name):
                continue
            hi, lo = int(np.argmax(variances[:, 0])), int(np.argmin(variances[:, 0]))
            out.append(
                f"the residual variances of the groups of {f.name!r} differ by a factor of "
                f"{number_text(variances[hi, 0] / variances[lo, 0])} ({f.groups[hi]} "
                f"{number_text(variances[hi, 0])}, {f.groups[lo]} {number_text(variances[lo, 0])}; Levene's test, "
                f"scipy.stats.levene centred on medians: p = {number_text(p[0])}), more than the factor "
                f"{number_text(VARIANCE_RATIO_WARN)} this check allows; pooled t and F assume equal variances: "
                f'consider "variance_groups": "{f.name}" in the spec')
        return out

    def voxel_findings(self, elements: str = "voxels") -> list[str]:
        """Warnings of a voxelwise fit (after :meth:`add` of every chunk)."""
        out = []
        for f in self._factors:
            hit, total = self.flagged.get(f.name, 0), self.tested.get(f.name, 0)
            if widespread(hit, total):
                out.append(
                    f"in {hit} of {total} {elements} ({number_text(100 * hit / total)}%) the residual variances "
                    f"of the groups of {f.name!r} differ by more than a factor of {number_text(VARIANCE_RATIO_WARN)} "
                    f"with Levene's test (scipy.stats.levene, centred on medians) p < {number_text(LEVENE_ALPHA)}; "
                    f'pooled t and F assume equal variances: consider "variance_groups": "{f.name}" in the spec')
        return out
