"""Orthonormal univariate polynomials of the two reference families.

``legendre`` polynomials are orthonormal for the uniform probability measure on [-1, 1],
``hermite`` (probabilists') polynomials for the standard normal. Both are evaluated by their
three-term recurrences written directly for the orthonormal polynomials, which avoids the
growth of the unnormalised Hermite values and the separate normalisation step.

References
----------
.. [1] W. Gautschi, *Orthogonal Polynomials: Computation and Approximation*, Oxford
   University Press, 2004, chapter 1.
.. [2] D. Xiu, G. E. Karniadakis, "The Wiener-Askey polynomial chaos for stochastic
   differential equations", SIAM J. Sci. Comput. 24(2):619-644, 2002 (the pairing of
   distributions with orthogonal families).
"""

from __future__ import annotations

import math
import operator

import numpy as np

from honing.engine.priors import Family

__all__ = ["evaluate", "hermite", "legendre"]


def _prepare(x: np.ndarray, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Points as floats and the output table with its constant column filled."""
    x = np.asarray(x, dtype=float)
    out = np.empty((*x.shape, _check_degree(degree) + 1))
    out[..., 0] = 1.0
    return x, out


def _check_degree(degree: int) -> int:
    try:
        value = operator.index(degree)
    except TypeError:
        raise TypeError(f"degree must be an integer, got {type(degree).__name__}") from None
    if value < 0:
        raise ValueError(f"degree must be non-negative, got {value}")
    return value


def legendre(x: np.ndarray, degree: int) -> np.ndarray:
    """Orthonormal Legendre polynomials ``sqrt(2k + 1) P_k(x)``, ``k = 0..degree``.

    Orthonormal with respect to the uniform probability density 1/2 on [-1, 1], by the
    recurrence ``x p_k = b_{k+1} p_{k+1} + b_k p_{k-1}`` with ``b_k = k / sqrt(4 k^2 - 1)``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Points; any shape is accepted and gains a trailing axis.
    degree : int
        Highest degree, at least 0.

    Returns
    -------
    ndarray, shape (n, degree + 1)
        Column ``k`` holds ``p_k(x)``.

    References
    ----------
    .. [1] W. Gautschi, *Orthogonal Polynomials: Computation and Approximation*, 2004.
    """
    x, out = _prepare(x, degree)
    if degree >= 1:
        out[..., 1] = math.sqrt(3.0) * x
    for k in range(1, degree):
        b_k = k / math.sqrt(4.0 * k * k - 1.0)
        b_next = (k + 1) / math.sqrt(4.0 * (k + 1) ** 2 - 1.0)
        out[..., k + 1] = (x * out[..., k] - b_k * out[..., k - 1]) / b_next
    return out


def hermite(x: np.ndarray, degree: int) -> np.ndarray:
    """Orthonormal probabilists' Hermite polynomials ``He_k(x) / sqrt(k!)``, ``k = 0..degree``.

    Orthonormal with respect to the standard normal density, by the recurrence
    ``x h_k = sqrt(k + 1) h_{k+1} + sqrt(k) h_{k-1}``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Points; any shape is accepted and gains a trailing axis.
    degree : int
        Highest degree, at least 0.

    Returns
    -------
    ndarray, shape (n, degree + 1)
        Column ``k`` holds ``h_k(x)``.

    References
    ----------
    .. [1] W. Gautschi, *Orthogonal Polynomials: Computation and Approximation*, 2004.
    """
    x, out = _prepare(x, degree)
    if degree >= 1:
        out[..., 1] = x
    for k in range(1, degree):
        out[..., k + 1] = (x * out[..., k] - math.sqrt(k) * out[..., k - 1]) / math.sqrt(k + 1)
    return out


def evaluate(family: Family, x: np.ndarray, degree: int) -> np.ndarray:
    """Orthonormal polynomials of `family` up to `degree`, shape ``(n, degree + 1)``.

    Parameters
    ----------
    family : {"legendre", "hermite"}
    x : ndarray, shape (n,)
    degree : int

    Returns
    -------
    ndarray, shape (n, degree + 1)
    """
    if family == "legendre":
        return legendre(x, degree)
    if family == "hermite":
        return hermite(x, degree)
    raise ValueError(f"family must be 'legendre' or 'hermite', got {family!r}")
