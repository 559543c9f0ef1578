"""Results of permutation inference, with fixed fields: the voxel-wise part always, and one small object
per whole-map inference that was asked for (:class:`TfceResult`, :class:`ClusterResult`)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TypeVar

import numpy as np

from .clusters import Clusters
from .kernel import at_least
from .tfce import TfceParams

__all__ = ["ClusterResult", "PermutationResult", "TfceResult", "WholeMapResult", "fwe_p"]


def fwe_p(observed: np.ndarray, maxima: np.ndarray) -> np.ndarray:
    """Fraction of maxima >= each observed value (tolerant), NaN where observed is NaN."""
    ordered = np.sort(maxima[~np.isnan(maxima)])
    J = maxima.size
    thr = at_least(observed)
    count = ordered.size - np.searchsorted(ordered, thr, side="left")
    p = count / J
    return np.where(np.isnan(observed), np.nan, p)


@dataclass(frozen=True, eq=False)
class TfceResult:
    """TFCE of one contrast.

    Attributes
    ----------
    map : ndarray, shape (V,)
        TFCE of the observed map (sign kept); NaN where the statistic is NaN (such elements count as 0
        when enhancing).
    p_fwe : ndarray, shape (V,)
        FWE p from the maximum |TFCE|.
    max_null : ndarray, shape (J,)
        Maximum |TFCE| of each rearrangement (identity first).
    params : TfceParams
        E, H, rule and the step dh used.
    """

    map: np.ndarray
    p_fwe: np.ndarray
    max_null: np.ndarray
    params: TfceParams


@dataclass(frozen=True, eq=False)
class ClusterResult:
    """Cluster-extent inference of one contrast.

    Attributes
    ----------
    z, threshold : float
        Cluster-forming threshold as z, and in units of the statistic.
    clusters : Clusters
        Observed clusters.
    cluster_p_fwe : ndarray, shape (C,)
        FWE p of each observed cluster (by size).
    p_fwe : ndarray, shape (V,)
        The FWE p of each element's cluster; 1 outside clusters, NaN where the statistic is NaN.
    max_null : ndarray, shape (J,)
        Largest cluster size of each rearrangement.
    """

    z: float
    threshold: float
    clusters: Clusters
    cluster_p_fwe: np.ndarray
    p_fwe: np.ndarray
    max_null: np.ndarray


WholeMapResult = TfceResult | ClusterResult
R = TypeVar("R", TfceResult, ClusterResult)


@dataclass(frozen=True, eq=False)
class PermutationResult:
    """Permutation inference for one contrast; maps have one value per voxel or vertex (V).

    Attributes
    ----------
    name, kind, tail : str
    df : int
        Residual degrees of freedom; ``q`` the numerator df of F.
    q : int
    stat : ndarray, shape (V,)
        Observed t or F (the identity rearrangement; equals the parametric statistic).
    p_perm : ndarray, shape (V,)
        Uncorrected permutation p of the oriented statistic (|t| two-sided, t, -t, or F).
    p_fwe : ndarray, shape (V,)
        Voxel-wise FWE p from the maximum oriented statistic over all elements.
    max_null : ndarray, shape (J,)
        Maximum oriented statistic of each rearrangement (identity first).
    n_perm : int
        J, the rearrangements used (identity included).
    exhaustive : bool
    method : str
    seed : int or None
    n_possible : int
        Distinct rearrangements that exist.
    whole_maps : tuple of TfceResult and ClusterResult
        The whole-map inferences asked for, TFCE first (empty when none was).
    """

    name: str
    kind: str
    tail: str
    df: int
    q: int
    stat: np.ndarray
    p_perm: np.ndarray
    p_fwe: np.ndarray
    max_null: np.ndarray
    n_perm: int
    exhaustive: bool
    method: str
    seed: int | None
    n_possible: int
    whole_maps: tuple[WholeMapResult, ...]

    def whole_map(self, kind: type[R]) -> R:
        """The :class:`TfceResult` or :class:`ClusterResult` of this contrast.

        Raises
        ------
        LookupError
            If that inference was not asked for.
        """
        for part in self.whole_maps:
            if isinstance(part, kind):
                return part
        raise LookupError(f"no {kind.__name__} in the result of {self.name or 'this contrast'}; it was not asked for")
