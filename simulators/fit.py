"""The deployed model: a polynomial in standardised features, fitted by numpy least squares."""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations_with_replacement

import numpy as np


def monomials(n_features: int, degree: int) -> list[tuple[int, ...]]:
    """Every product of at most ``degree`` features, the empty product (intercept) first.

    >>> len(monomials(3, 2))  # 1 + 3 + 6
    10
    """
    out: list[tuple[int, ...]] = [()]
    for d in range(1, degree + 1):
        out.extend(combinations_with_replacement(range(n_features), d))
    return out


@dataclass(frozen=True)
class PolynomialModel:
    """A fitted model; ``predict`` takes a (rows, features) array in the features' real units."""

    features: tuple[str, ...]
    degree: int
    center: np.ndarray
    scale: np.ndarray
    terms: tuple[tuple[int, ...], ...]
    coef: np.ndarray

    @property
    def parameters(self) -> int:
        return len(self.coef)

    def design(self, x: np.ndarray) -> np.ndarray:
        z = (np.asarray(x, dtype=float) - self.center) / self.scale
        cols = [np.prod(z[:, list(term)], axis=1) if term else np.ones(len(z)) for term in self.terms]
        return np.column_stack(cols)

    def predict(self, x: np.ndarray) -> np.ndarray:
        return self.design(x) @ self.coef


def fit_polynomial(features: list[str], x: np.ndarray, y: np.ndarray, degree: int) -> PolynomialModel:
    """Least-squares fit of a polynomial of ``degree`` (numpy.linalg.lstsq).

    >>> x = np.array([[0.0], [1.0], [2.0], [3.0]]); y = 1.0 + 2.0 * x[:, 0]
    >>> m = fit_polynomial(["a"], x, y, 1)
    >>> [round(float(v), 6) for v in m.predict(np.array([[10.0]]))]
    [21.0]
    """
    x = np.asarray(x, dtype=float)
    center = x.mean(axis=0)
    scale = x.std(axis=0)
    scale[scale == 0] = 1.0
    terms = tuple(monomials(x.shape[1], degree))
    model = PolynomialModel(tuple(features), degree, center, scale, terms, np.zeros(len(terms)))
    coef, *_ = np.linalg.lstsq(model.design(x), np.asarray(y, dtype=float), rcond=None)
    return PolynomialModel(tuple(features), degree, center, scale, terms, coef)
