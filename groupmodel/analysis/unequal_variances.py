"""Findings of a fit: groups of a factor whose residual variances differ (the pooled t and F assume they do not).

For every model factor (other than the ``variance_groups`` factor, whose groups already get their own variance)
the residual variance of each group is ``RSS_g / rho_g`` (:mod:`groupmodel.engine.welch`), and the check is
Levene's test as ``scipy.stats.levene`` computes it (centred on the group medians, i.e. the Brown-Forsythe
form) applied to the OLS residuals of the groups.  A factor is reported when the largest group variance exceeds
the smallest by more than :data:`VARIANCE_RATIO_WARN` and Levene's p is below :data:`LEVENE_ALPHA`; for a
voxelwise fit, when that holds in more than :data:`VOXEL_SHARE_WARN` of the voxels (vertices) in the mask.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from ..engine.welch import GROUP_DF_MIN, group_residual_df
from ..model.assembly import Model
from ..text import number_text

__all__ = ["LEVENE_ALPHA", "VARIANCE_RATIO_WARN", "VOXEL_SHARE_WARN", "UnequalVarianceTally", "residuals_of"]

#: Largest over smallest residual variance of a factor's groups above which a fit warns (with Levene's p).
VARIANCE_RATIO_WARN = 2.0
#: Levene's test (scipy.stats.levene, median-centred) must give p below this too.
LEVENE_ALPHA = 0.05
#: A voxelwise fit warns when more than this share of the voxels in the mask meet both conditions.
VOXEL_SHARE_WARN = 0.10


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

    def add(self, y: np.ndarray) -> None:
        """Count one chunk of data (n, v)."""
        resid = residuals_of(self.u, y, self.centred)
        for f in self._factors:
            variances, p = _group_variances(f, resid)
            with np.errstate(invalid="ignore", divide="ignore"):
                ratio = variances.max(axis=0) / variances.min(axis=0)
                hit = (ratio > VARIANCE_RATIO_WARN) & (p < LEVENE_ALPHA)
            self.flagged[f.name] = self.flagged.get(f.name, 0) + int(np.count_nonzero(hit))
            self.tested[f.name] = self.tested.get(f.name, 0) + int(np.count_nonzero(np.isfinite(p)))
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
            if total and hit > VOXEL_SHARE_WARN * total:
                out.append(
                    f"in {hit} of {total} {elements} ({number_text(100 * hit / total)}%) the residual variances "
                    f"of the groups of {f.name!r} differ by more than a factor of {number_text(VARIANCE_RATIO_WARN)} "
                    f"with Levene's test (scipy.stats.levene, centred on medians) p < {number_text(LEVENE_ALPHA)}; "
                    f'pooled t and F assume equal variances: consider "variance_groups": "{f.name}" in the spec')
        return out


def _group_variances(f: _Factor, resid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residual variance of each group (k, v) and Levene's p (v,), NaN where a voxel has no spread."""
    k = len(f.groups)
    onehot = np.zeros((k, resid.shape[0]))
    onehot[f.labels, np.arange(resid.shape[0])] = 1.0
    variances = (onehot @ (resid * resid)) / f.rho[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        p = stats.levene(*[resid[f.labels == g] for g in range(k)], center="median", axis=0).pvalue
    p = np.atleast_1d(np.asarray(p, dtype=float))
    return variances, np.where(np.all(variances > 0, axis=0), p, np.nan)
