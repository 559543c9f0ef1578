"""NIST StRD one-way ANOVA data as shipped in scipy's test data, for the reference tests.

Source: NIST Statistical Reference Datasets (public domain), files
``scipy/stats/tests/data/nist_anova/*.dat``: certified values in the header (lines 41-48), data from line 61.
The certified values are parsed from the files, never retyped.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np
import scipy.stats

NIST_DIR = Path(scipy.stats.__file__).parent / "tests" / "data" / "nist_anova"
#: The eight sets of lower and average difficulty, and the three of higher difficulty.
EASY = ("AtmWtAg", "SiRstv", "SmLs01", "SmLs02", "SmLs03", "SmLs04", "SmLs05", "SmLs06")
HARD = ("SmLs07", "SmLs08", "SmLs09")
SKIP_REASON = f"scipy's NIST StRD test data not installed ({NIST_DIR})"


@dataclass(frozen=True)
class NistSet:
    """One NIST one-way ANOVA set: group labels and responses as written in the file, certified values."""

    name: str
    group_text: tuple[str, ...]
    value_text: tuple[str, ...]
    f_certified: float
    sd_certified: float

    @property
    def groups(self) -> np.ndarray:
        return np.array([int(g) for g in self.group_text])

    @property
    def y(self) -> np.ndarray:
        return np.array([float(v) for v in self.value_text])


def read_nist(name: str) -> NistSet:
    """Parse ``name.dat``: the certified between-groups F and residual SD, and the data."""
    lines = (NIST_DIR / f"{name}.dat").read_text().splitlines()
    header = "\n".join(lines[40:48])
    f_cert = float(re.search(r"^Between \w+\s+\d+\s+\S+\s+\S+\s+(\S+)\s*$", header, re.M).group(1))
    sd_cert = float(re.search(r"Standard Deviation\s+(\S+)", header).group(1))
    rows = [ln.split() for ln in lines[60:] if len(ln.split()) == 2]
    return NistSet(name, tuple(r[0] for r in rows), tuple(r[1] for r in rows), f_cert, sd_cert)


def lre(value: float, certified: float) -> float:
    """Log relative error, the number of correct digits (NIST StRD's measure), between 0 and 15."""
    if not math.isfinite(value):
        return 0.0
    if value == certified:
        return 15.0
    return max(0.0, min(15.0, -math.log10(abs(value - certified) / abs(certified))))


def exact_oneway(groups: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """F and residual SD by exact rational arithmetic on the float64 inputs (fractions.Fraction).

    This is the best any float64 method can reach: on SmLs07-09 the inputs themselves have lost digits.
    """
    yf = [Fraction(v) for v in np.asarray(y, dtype=float).tolist()]
    groups = np.asarray(groups)
    n = len(yf)
    levels = np.unique(groups)
    grand = sum(yf, Fraction(0)) / n
    ssb = ssw = Fraction(0)
    for lv in levels:
        cell = [yf[i] for i in np.flatnonzero(groups == lv)]
        m = sum(cell, Fraction(0)) / len(cell)
        ssb += len(cell) * (m - grand) ** 2
        ssw += sum(((v - m) ** 2 for v in cell), Fraction(0))
    k = len(levels)
    return float((ssb / (k - 1)) / (ssw / (n - k))), math.sqrt(float(ssw / (n - k)))
