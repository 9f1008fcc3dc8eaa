import numpy as np
import pytest

from honing.engine.bases import PolynomialBasis, total_degree_indices
from honing.engine.regression import fit_degree_adaptive_shared, fit_shared_sparse, loo_residuals


@pytest.mark.parametrize("seed", range(6))
def test_planted_shared_support_recovered(seed):
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(300, 6))
    phi = PolynomialBasis(total_degree_indices(6, 4), ["hermite"] * 6).design_matrix(z)
    support = np.sort(np.r_[0, rng.choice(np.arange(1, phi.shape[1]), 5, replace=False)])
    coef = rng.normal(size=(support.size, 3))
    fit = fit_shared_sparse(phi, phi[:, support] @ coef)
    np.testing.assert_array_equal(fit.columns, support)
    # Noiseless data: the least-squares refit is exact to rounding (condition ~ 10).
    np.testing.assert_allclose(fit.coef, coef, atol=1e-10)


def test_determined_fit_equals_weighted_least_squares():
    rng = np.random.default_rng(3)
    phi = np.column_stack([np.ones(200), rng.normal(size=(200, 7))])
    y = phi @ rng.normal(size=(8, 2)) + 0.01 * rng.normal(size=(200, 2))
    w = rng.uniform(0.2, 1.0, 200)
    fit = fit_shared_sparse(phi, y, w)
    # Reference: numpy.linalg.lstsq on the row-scaled system.
    root = np.sqrt(w)[:, None]
    ref = np.linalg.lstsq(phi * root, y * root, rcond=None)[0]
    np.testing.assert_array_equal(fit.columns, np.arange(8))
    np.testing.assert_allclose(fit.coef, ref, rtol=1e-9, atol=1e-12)


def test_per_target_error_matches_brute_force_leave_one_out():
    rng = np.random.default_rng(4)
    phi = np.column_stack([np.ones(60), rng.normal(size=(60, 4))])
    y = phi @ rng.normal(size=(5, 2)) + 0.1 * rng.normal(size=(60, 2))
    fit = fit_shared_sparse(phi, y)
    cols = phi[:, fit.columns]
    n, p = cols.shape
    # Correction T(P, N) = N / (N - P) (1 + tr(C^-1) / N), C = Phi^T Phi / N (Chapelle et al.).
    factor = n / (n - p) * (1 + np.trace(np.linalg.inv(cols.T @ cols / n)) / n)
    for j in range(2):
        brute = []
        for i in range(n):
            keep = np.arange(n) != i
            b = np.linalg.lstsq(cols[keep], y[keep, j], rcond=None)[0]
            brute.append(y[i, j] - cols[i] @ b)
        np.testing.assert_allclose(loo_residuals(cols, y[:, j]), brute, rtol=1e-8)
        expected = np.sum(np.square(brute)) / np.sum((y[:, j] - y[:, j].mean()) ** 2) * factor
        assert fit.loo_error[j] == pytest.approx(expected, rel=1e-8)


def test_degree_search_finds_a_cubic():
    rng = np.random.default_rng(5)
    z = rng.normal(size=(120, 2))
    y = np.column_stack([z[:, 0] ** 3 - z[:, 1], z[:, 0] * z[:, 1]])
    basis, fit = fit_degree_adaptive_shared(z, y, ["hermite", "hermite"], 6)
    assert basis.degree == 3
    assert fit.loo_error_total < 1e-12
