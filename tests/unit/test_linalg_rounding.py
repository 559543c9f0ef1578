"""Dependent columns in words without rounding noise (engine.linalg.dependent_columns with entry tolerances).

The reference: the combination computed from the exact (unrounded) orthonormal polynomial codes with numpy's
QR and least squares; the words from the rounded codes must give the same terms, each coefficient within the
rounding, and no term (such as ``-0.0016 x intercept``) that is only rounding noise.
"""

from __future__ import annotations

import re

import numpy as np

from groupmodel.engine.linalg import dependent_columns, simplest_combination

NAMES = ["intercept", "linear", "quadratic", "cubic", "quartic", "left"]


def _codes() -> tuple[np.ndarray, np.ndarray]:
    q, _ = np.linalg.qr(np.vander(np.arange(5.0) - 2, 5, increasing=True))
    q = q * np.sign(q[-1])
    return q[:, 1:], np.repeat(np.arange(5), 3)


def _terms(text: str) -> dict[str, float]:
    body = text.split(" equals ", 1)[1].split(" (within", 1)[0]
    out = {}
    for sign, coef, name in re.findall(r"(-|\+|^)\s*(?:([\d.]+) x )?(\w+)", body):
        out[name] = (-1.0 if sign == "-" else 1.0) * float(coef or 1.0)
    return out


def test_rounding_noise_dropped_and_coefficients_within_rounding() -> None:
    exact, level = _codes()
    typed = np.round(exact, 2)
    left = (level == 1).astype(float) - (level == 0)
    x = np.column_stack([np.ones(15), typed[level], left])
    tol = np.array([1e-9, *[0.00505] * 4, 1e-9])
    assert "intercept" in dependent_columns(x, NAMES)[0]  # without tolerances the noise term is there
    words = dependent_columns(x, NAMES, tol)
    assert len(words) == 1 and "within the rounding of the typed entries" in words[0]
    terms = _terms(words[0])
    want, *_ = np.linalg.lstsq(exact[level], left, rcond=None)  # numpy on the exact codes
    assert set(terms) == {"linear", "quadratic", "cubic", "quartic"}
    np.testing.assert_allclose([terms[n] for n in NAMES[1:5]], want, atol=0.02)


def test_exact_combination_unchanged() -> None:
    """Typed whole numbers: the combination is the exact one, not marked as rounded."""
    level = np.repeat(np.arange(3), 4)
    x = np.column_stack([np.ones(12), level == 0, level == 1, level == 2]).astype(float)
    tol = np.full(4, 1e-9)
    assert dependent_columns(x, ["intercept", "a", "b", "c"], tol) == ["column c equals intercept - a - b"]


def test_shortened_combination_reproduces_the_column_within_rounding() -> None:
    exact, level = _codes()
    typed = np.round(exact, 2)
    a = np.column_stack([np.ones(15), typed[level]])
    y = (level == 4).astype(float)
    tol_a = np.array([1e-9, *[0.00505] * 4])
    c = simplest_combination(a, y, tol_a, 0.0)
    assert np.abs(a @ c - y).max() <= np.abs(c) @ tol_a + 1e-12
    np.testing.assert_allclose(c[0], 0.2, atol=1e-12)  # 1/5 of the constant: a whole-level mean, kept exact
