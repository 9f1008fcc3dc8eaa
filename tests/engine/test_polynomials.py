import math

import numpy as np
import pytest
from numpy.polynomial import hermite_e
from numpy.polynomial import legendre as numpy_legendre
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special

from honing.engine.polynomials import evaluate, hermite, legendre
from honing.engine.priors import Family

EPS = np.finfo(float).eps
DEGREE = 30
# Each step of a three-term recurrence adds a few ulps of the size of the values, so after k
# steps both this recurrence and scipy's are within about k * eps of the bound on |p_k|:
# sqrt(2k + 1) on [-1, 1] for Legendre, and Cramer's bound K exp(x^2 / 4) (K < 1.09) for the
# orthonormal Hermite functions. We allow 8 k eps times the bound.
RECURRENCE_ULPS_PER_DEGREE = 8
# Gauss quadrature with n nodes: numpy's nodes and weights are accurate to a few ulps, and the
# rounding of a sum of n products is at most n eps times the sum of their absolute values,
# which is at most (2 * DEGREE + 1) for Legendre and 1 for Hermite (Cauchy-Schwarz on
# orthonormal polynomials). The tolerance is that bound.
N_NODES = DEGREE + 10


def test_legendre_matches_scipy() -> None:
    x = np.linspace(-1.0, 1.0, 201)
    k = np.arange(DEGREE + 1)
    # Reference: scipy.special.eval_legendre times the normalisation sqrt(2k + 1).
    expected = special.eval_legendre(k, x[:, None]) * np.sqrt(2 * k + 1)
    bound = np.sqrt(2 * k + 1)
    tolerance = RECURRENCE_ULPS_PER_DEGREE * np.maximum(k, 1) * EPS * bound
    error = np.abs(legendre(x, DEGREE) - expected)
    assert (error <= tolerance).all(), (error / tolerance).max()


def test_hermite_matches_scipy() -> None:
    x = np.linspace(-8.0, 8.0, 161)
    k = np.arange(DEGREE + 1)
    norms = np.array([math.sqrt(math.factorial(int(j))) for j in k])
    # Reference: scipy.special.eval_hermitenorm (probabilists' He_k) divided by sqrt(k!).
    expected = special.eval_hermitenorm(k, x[:, None]) / norms
    bound = np.exp(x[:, None] ** 2 / 4)
    tolerance = RECURRENCE_ULPS_PER_DEGREE * np.maximum(k, 1) * EPS * bound
    error = np.abs(hermite(x, DEGREE) - expected)
    assert (error <= tolerance).all(), (error / tolerance).max()


def test_legendre_orthonormal_by_gauss_quadrature() -> None:
    # Reference: Gauss-Legendre rule (numpy.polynomial.legendre.leggauss), exact for degree
    # up to 2 * N_NODES - 1, weights divided by 2 to integrate against U[-1, 1].
    nodes, weights = numpy_legendre.leggauss(N_NODES)
    values = legendre(nodes, DEGREE)
    gram = values.T @ (weights[:, None] / 2.0 * values)
    tolerance = N_NODES * (2 * DEGREE + 1) * EPS
    assert_allclose(gram, np.eye(DEGREE + 1), rtol=0, atol=tolerance)


def test_hermite_orthonormal_by_gauss_quadrature() -> None:
    # Reference: Gauss-Hermite rule for the weight exp(-x^2 / 2)
    # (numpy.polynomial.hermite_e.hermegauss), weights divided by their sum sqrt(2 pi).
    nodes, weights = hermite_e.hermegauss(N_NODES)
    values = hermite(nodes, DEGREE)
    gram = values.T @ (weights[:, None] / weights.sum() * values)
    assert_allclose(gram, np.eye(DEGREE + 1), rtol=0, atol=N_NODES * EPS)


@pytest.mark.parametrize("family", ["legendre", "hermite"])
def test_evaluate_dispatches(family: Family) -> None:
    x = np.linspace(-1.0, 1.0, 7)
    direct = legendre(x, 4) if family == "legendre" else hermite(x, 4)
    assert_array_equal(evaluate(family, x, 4), direct)


def test_shapes_and_low_degrees() -> None:
    x = np.array([-0.5, 0.25, 2.0])
    assert_array_equal(legendre(x, 0), np.ones((3, 1)))
    assert_array_equal(hermite(x, 0), np.ones((3, 1)))
    # p_1 = sqrt(3) x and h_1 = x (the normalisations of P_1 = He_1 = x).
    assert_allclose(legendre(x, 1)[:, 1], math.sqrt(3.0) * x, rtol=EPS)
    assert_array_equal(hermite(x, 1)[:, 1], x)
    assert hermite(np.zeros((2, 3)), 5).shape == (2, 3, 6)


def test_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="non-negative, got -1"):
        legendre(np.zeros(3), -1)
    with pytest.raises(TypeError, match="integer, got float"):
        hermite(np.zeros(3), 2.0)
    with pytest.raises(ValueError, match="'legendre' or 'hermite', got 'laguerre'"):
        evaluate("laguerre", np.zeros(3), 2)
