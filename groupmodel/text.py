"""Wording shared by every layer: numbers in messages and the research-use note.

Kept at the bottom of the package (like :mod:`groupmodel.errors`) so that any module may import it.
"""

from __future__ import annotations

import math

#: Printed under results and written into every sidecar.
DISCLAIMER = "groupmodel output supports research; it is not a clinical or diagnostic tool."


def number_text(x: float, whole_tol: float = 1e-9) -> str:
    """A number for a message: whole numbers without decimals, others to 4 significant digits.

    ``whole_tol`` is how far from a whole number a value may be and still be written as one.
    """
    if not math.isfinite(x):
        return str(x)
    if abs(x - round(x)) < whole_tol:
        return str(int(round(x)))
    return f"{x:.4g}"


def value_text(x: float) -> str:
    """A data value (a covariate mean or ``at`` value) that can be read back: as :func:`number_text` below
    10^4; from 10^4 on at least 6 significant digits and every digit of the whole part, without exponent
    (``1000123.456`` -> ``1000123``, ``12345.678`` -> ``12345.7``) below 10^15."""
    if not math.isfinite(x) or abs(x) < 1e4 or abs(x) >= 1e15 or abs(x - round(x)) < 1e-9:
        return number_text(x)
    whole_digits = len(str(int(abs(x))))
    return f"{x:.{max(6, whole_digits)}g}"
