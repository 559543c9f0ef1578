"""Coding matrices: how a factor's levels become design columns.

For a factor with levels ``l_1 .. l_k`` a coding is a ``(k, m)`` matrix ``C``
whose row ``i`` is what an observation at level ``l_i`` contributes to the
factor's ``m`` columns.  Four schemes:

``effect``
    Sum-to-zero ("deviation") coding: one column per non-reference level, +1 at
    that level, -1 at the reference, 0 elsewhere.  Reference defaults to the
    **last** level (as R's ``contr.sum``).
``treatment``
    0/1 indicators of the non-reference levels.  Reference defaults to the
    **first** level (as R's ``contr.treatment``; common practice).
``polynomial``
    Orthogonal polynomial contrasts over the level scores (default 1..k), as
    R's ``contr.poly``: columns ``linear``, ``quadratic``, ``cubic``, ``degree4``...
``indicator``
    One 0/1 column per level (for cell-means models without an intercept).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .spec import Coding

_DEGREE_NAMES = {1: "linear", 2: "quadratic", 3: "cubic"}


def degree_name(d: int) -> str:
    """``1`` -> ``"linear"``, ``2`` -> ``"quadratic"``, ``3`` -> ``"cubic"``, ``4`` -> ``"degree4"``."""
    return _DEGREE_NAMES.get(d, f"degree{d}")


@dataclass(frozen=True)
class FactorCoding:
    """A factor's levels and how they are coded.

    Attributes
    ----------
    name : str
        The table column.
    levels : tuple of str
        Levels in declared order.
    scheme : str
        ``effect``, ``treatment``, ``polynomial`` or ``indicator``.
    reference : str or None
        The left-out level (effect, treatment); None otherwise.
    scores : tuple of float or None
        Level scores for polynomial coding and trends.
    matrix : ndarray, shape (k, m)
        Row i: the factor's column values at level i.
    labels : tuple of str
        Column labels, e.g. ``training=sprint`` or ``dose.linear``.
    """

    name: str
    levels: tuple[str, ...]
    scheme: Coding
    reference: str | None
    scores: tuple[float, ...] | None
    matrix: np.ndarray
    labels: tuple[str, ...]

    @property
    def n_levels(self) -> int:
        return len(self.levels)

    def row(self, level: str) -> np.ndarray:
        """The factor's column values for one level, shape (m,)."""
        return self.matrix[self.levels.index(level)]

    def describe_column(self, j: int) -> str:
        """What column ``j`` of this factor means, in words."""
        if self.scheme == "effect":
            lv = self.labels[j].split("=", 1)[1]
            return f"effect coding of {self.name}: +1 at {lv}, -1 at the reference {self.reference}, 0 elsewhere"
        if self.scheme == "treatment":
            lv = self.labels[j].split("=", 1)[1]
            return f"treatment coding of {self.name}: 1 at {lv}, 0 elsewhere (reference {self.reference})"
        if self.scheme == "indicator":
            lv = self.labels[j].split("=", 1)[1]
            return f"indicator of {self.name}={lv}"
        return f"orthogonal polynomial of {self.name}, {degree_name(j + 1)} (scores {list(self.scores or ())})"

    def as_dict(self) -> dict[str, object]:
        return {
            "levels": list(self.levels),
            "coding": self.scheme,
            "reference": self.reference,
            "scores": list(self.scores) if self.scores is not None else None,
            "matrix": self.matrix.tolist(),
            "columns": list(self.labels),
        }


def orthogonal_polynomials(scores: Sequence[float]) -> np.ndarray:
    """Orthonormal polynomial contrasts over ``scores``, shape (k, k-1).

    Same construction as R's ``contr.poly``: QR of the Vandermonde matrix of the centred scores, with each
    column's sign following the diagonal of R so the linear column increases with the score.
    """
    x = np.asarray(scores, dtype=float)
    k = x.size
    vander = np.vander(x - x.mean(), k, increasing=True)
    q, r = np.linalg.qr(vander)
    z = q * np.diag(r)  # invariant to the sign convention of the QR routine
    z /= np.sqrt((z**2).sum(axis=0))
    return z[:, 1:]


def make_coding(
    name: str,
    levels: Sequence[str],
    scheme: Coding = "effect",
    reference: str | None = None,
    scores: Sequence[float] | None = None,
) -> FactorCoding:
    """Build the coding of one factor.

    Parameters
    ----------
    name : str
        Factor (column) name, used in column labels.
    levels : sequence of str
        Levels in order; at least 2.
    scheme : {"effect", "treatment", "polynomial", "indicator"}
    reference : str, optional
        Reference level for effect (default last) and treatment (default first) coding.
    scores : sequence of float, optional
        Scores for polynomial coding (default 1..k).
    """
    levels = tuple(levels)
    k = len(levels)
    if scheme == "effect":
        ref = reference if reference is not None else levels[-1]
        keep = [lv for lv in levels if lv != ref]
        mat = np.zeros((k, k - 1))
        for j, lv in enumerate(keep):
            mat[levels.index(lv), j] = 1.0
        mat[levels.index(ref), :] = -1.0
        labels = tuple(f"{name}={lv}" for lv in keep)
        return FactorCoding(name, levels, scheme, ref, _scores(scores, k), mat, labels)
    if scheme == "treatment":
        ref = reference if reference is not None else levels[0]
        keep = [lv for lv in levels if lv != ref]
        mat = np.zeros((k, k - 1))
        for j, lv in enumerate(keep):
            mat[levels.index(lv), j] = 1.0
        labels = tuple(f"{name}={lv}" for lv in keep)
        return FactorCoding(name, levels, scheme, ref, _scores(scores, k), mat, labels)
    if scheme == "indicator":
        labels = tuple(f"{name}={lv}" for lv in levels)
        return FactorCoding(name, levels, scheme, None, _scores(scores, k), np.eye(k), labels)
    if scheme == "polynomial":
        sc = _scores(scores, k)
        mat = orthogonal_polynomials(sc)
        labels = tuple(f"{name}.{degree_name(d)}" for d in range(1, k))
        return FactorCoding(name, levels, scheme, None, sc, mat, labels)
    raise ValueError(f"unknown coding scheme {scheme!r}")


def _scores(scores: Sequence[float] | None, k: int) -> tuple[float, ...]:
    return tuple(float(s) for s in scores) if scores is not None else tuple(float(i) for i in range(1, k + 1))
