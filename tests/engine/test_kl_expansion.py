"""The Karhunen-Loeve expansion and the solver behind benchmark B3 (`tests/benchmarks/problems.py`).

The closed-form eigenpairs of the exponential kernel (Ghanem and Spanos, 1991, Stochastic Finite
Elements: A Spectral Approach, ch. 2) are checked against a numerical eigen-decomposition of the
kernel (Nystrom with the midpoint rule), against the integral equation itself by adaptive
quadrature, and for orthonormality by Gauss-Legendre quadrature.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from problems import B3_LENGTH, B3_SIGMA, EllipticKL, kl_analytic, kl_nystrom

MODES = 15
A = 0.5


@pytest.mark.parametrize("length", [B3_LENGTH, 1.0])
def test_roots_solve_the_alternating_transcendental_equations(length):
    lam, _ = kl_analytic(MODES, length, B3_SIGMA, A)
    c = 1.0 / length
    w = np.sqrt(2 * c * B3_SIGMA**2 / lam - c**2)  # invert lam = s^2 2c / (w^2 + c^2)
    even, odd = w[0::2], w[1::2]
    # Ghanem and Spanos (1991), ch. 2: c - w tan(w a) = 0, then w + c tan(w a) = 0, alternating;
    # residuals are at the level of brentq's xtol = 1e-14 times the slope (a few tens here).
    assert_allclose(c - even * np.tan(even * A), 0.0, atol=1e-10)
    assert_allclose(odd + c * np.tan(odd * A), 0.0, atol=1e-10)
    assert np.all(np.diff(lam) < 0)


def test_nystrom_eigenvalues_converge_to_the_closed_form_at_second_order():
    lam, _ = kl_analytic(MODES, B3_LENGTH, B3_SIGMA, A)
    coarse, _, _ = kl_nystrom(MODES, B3_LENGTH, B3_SIGMA, 500, A)
    fine, _, _ = kl_nystrom(MODES, B3_LENGTH, B3_SIGMA, 1000, A)
    err_coarse, err_fine = np.abs(coarse / lam - 1), np.abs(fine / lam - 1)
    # The midpoint rule is second order in h, so halving h divides the error by 4; 3.5 to 4.5
    # leaves room for the higher-order terms (measured: 4.000 to 4.001 for these 15 modes).
    assert np.all((err_coarse / err_fine > 3.5) & (err_coarse / err_fine < 4.5)), (
        err_coarse / err_fine
    )
    # With the h^2 term removed by Richardson extrapolation only O(h^4) is left: relative
    # (1/500)^4 * 100 ~ 1.6e-9 ... measured 6e-8; 1e-6 is the bound a wrong root would break
    # (neighbouring eigenvalues differ by more than 10%).
    assert_allclose((4 * fine - coarse) / 3, lam, rtol=1e-6)


def test_nystrom_eigenvectors_match_the_closed_form_eigenfunctions():
    _, phi = kl_analytic(MODES, B3_LENGTH, B3_SIGMA, A)
    _, x, vecs = kl_nystrom(MODES, B3_LENGTH, B3_SIGMA, 1000, A)
    exact = phi(x)
    vecs = vecs * np.sign(np.sum(vecs * exact, axis=0))  # eigenvectors have arbitrary sign
    # Same second-order discretisation error as the eigenvalues: measured 1.6e-5 at h = 1e-3;
    # 1e-4 allows for the sup norm over all 15 modes.
    assert_allclose(vecs, exact, atol=1e-4)


def test_closed_form_eigenfunctions_are_orthonormal():
    _, phi = kl_analytic(MODES, B3_LENGTH, B3_SIGMA, A)
    # 200-point Gauss-Legendre is exact to degree 399; the eigenfunctions (frequencies below
    # 15 pi) are resolved to machine precision by it.
    nodes, weights = np.polynomial.legendre.leggauss(200)
    vals = phi(A * nodes)
    gram = (vals * (A * weights)[:, None]).T @ vals
    assert_allclose(gram, np.eye(MODES), atol=1e-12)


@pytest.mark.parametrize("mode", [0, 1, 6, 14])
@pytest.mark.parametrize("x0", [-0.37, 0.0, 0.21])
def test_closed_form_pairs_solve_the_integral_equation(mode, x0):
    lam, phi = kl_analytic(MODES, B3_LENGTH, B3_SIGMA, A)

    def integrand(y: float) -> float:
        return B3_SIGMA**2 * np.exp(-abs(x0 - y) / B3_LENGTH) * phi(np.array([y]))[0, mode]

    # The kernel has a kink at y = x0, so quad gets it as a break point; its default
    # tolerances (epsabs 1.5e-8) set the bound.
    value, _ = integrate.quad(integrand, -A, A, points=[x0], limit=200)
    assert_allclose(value, lam[mode] * phi(np.array([x0]))[0, mode], atol=1e-7)


@pytest.mark.parametrize("k", [1.0, 3.5])
def test_solver_is_exact_for_constant_conductivity(k):
    model = EllipticKL(MODES)
    # Constant k: u = x (1 - x) / (2 k), a quadratic, which the three-point finite-volume
    # stencil reproduces exactly; the bound is rounding in the Thomas sweep.
    model.modes = np.full_like(model.modes, np.log(k) / MODES)
    u = model.solve(np.ones((2, MODES)))
    x = np.linspace(0.0, 1.0, model.cells + 1)
    assert_allclose(u, np.broadcast_to(x * (1 - x) / (2 * k), u.shape), atol=1e-13)


def test_solver_converges_at_second_order():
    xi = np.random.default_rng(3).normal(size=(1, MODES))
    # Compare u(1/2) on 32, 64 and 128 cells with a 1024-cell solve; the finite-volume scheme
    # with face conductivities is second order for smooth k (ratio 4 per halving; k here is
    # continuous but its KL modes are only piecewise smooth, so 3 to 5 is accepted).
    fine = EllipticKL(MODES, cells=1024).solve(xi)[0, 512]
    errs = [abs(EllipticKL(MODES, cells=n).solve(xi)[0, n // 2] - fine) for n in (32, 64, 128)]
    rates = np.array(errs[:-1]) / np.array(errs[1:])
    assert np.all((rates > 3.0) & (rates < 5.0)), rates
