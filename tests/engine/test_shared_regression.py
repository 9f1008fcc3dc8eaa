from types import SimpleNamespace

import numpy as np
import pytest

from honing.engine.bases import PolynomialBasis, total_degree_indices
from honing.engine.regression import (
    _degree_search,
    fit_degree_adaptive_shared,
    fit_shared_sparse,
    loo_residuals,
)


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


def test_scored_error_matches_brute_force_over_the_scored_rows():
    rng = np.random.default_rng(6)
    phi = np.column_stack([np.ones(60), rng.normal(size=(60, 4))])
    y = phi @ rng.normal(size=(5, 2)) + 0.1 * rng.normal(size=(60, 2))
    w = rng.uniform(0.2, 1.0, 60)
    scored = np.arange(60) % 3 != 0
    fit = fit_shared_sparse(phi, y, w, scored)
    np.testing.assert_array_equal(fit.columns, np.arange(5))
    # Reference: leave-one-out by numpy.linalg.lstsq on the row-scaled system, summed over the
    # scored rows only, over their weighted spread about their own weighted mean; times the
    # same correction T(P, N) as without scoring (every row of positive weight is fitted).
    root = np.sqrt(w)
    n, p = phi.shape
    c_mat = (phi * root[:, None]).T @ (phi * root[:, None]) / w.sum()
    factor = n / (n - p) * (1 + np.trace(np.linalg.inv(c_mat)) / n)
    mean = w[scored] @ y[scored] / w[scored].sum()
    for j in range(2):
        deleted = []
        for i in np.flatnonzero(scored):
            keep = np.arange(n) != i
            b = np.linalg.lstsq(phi[keep] * root[keep, None], y[keep, j] * root[keep], rcond=None)
            deleted.append(y[i, j] - phi[i] @ b[0])
        num = np.sum(w[scored] * np.square(deleted))
        spread = np.sum(w[scored] * (y[scored, j] - mean[j]) ** 2)
        # Rounding only: both sides are least-squares solutions of condition ~ 3.
        assert fit.loo_error[j] == pytest.approx(num / spread * factor, rel=1e-8)


def _far_tethered_sample():
    """19 points in the bulk of N(0, 1) and one 12 sd out at weight 4e-4, on a smooth curve."""
    z = np.r_[np.linspace(-2.5, 2.5, 19), -12.0][:, None]
    w = np.r_[np.ones(19), 4e-4]

    def truth(x):
        return np.column_stack([np.exp(0.6 * x[:, 0]) + 0.4 * np.sin(1.5 * x[:, 0])])

    return z, truth(z), w, truth


def test_far_rows_fitted_but_not_scored_leave_the_degree_to_the_bulk():
    z, y, w, truth = _far_tethered_sample()
    grid = np.linspace(-2.5, 2.5, 201)[:, None]

    def bulk_error(scored):
        basis, fit = fit_degree_adaptive_shared(z, y, ["hermite"], 10, w, scored=scored)
        return np.max(np.abs(basis.design_matrix(grid) @ fit.coef - truth(grid))), basis.degree

    scored_error, scored_degree = bulk_error(np.r_[np.ones(19, bool), False])
    plain_error, plain_degree = bulk_error(None)
    # The curve is entire, so polynomials converge fast on [-2.5, 2.5]: numpy.polynomial's
    # least-squares fit of degree 8 to the 19 bulk points alone has a max error of 7.5e-4 on
    # the grid (degree 6: 1.1e-2). Scored on the bulk, the fit (which also carries the far
    # row) must come within a factor 10 of it, which a degree-6 fit would not.
    reference = np.polynomial.Polynomial.fit(z[:19, 0], y[:19, 0], 8)
    reference_error = np.max(np.abs(reference(grid[:, 0]) - truth(grid)[:, 0]))
    assert scored_degree >= 6
    assert scored_error < 10 * reference_error
    # Scored everywhere, the far row's extrapolation outweighs the bulk and the degree stays low.
    assert plain_degree < scored_degree
    assert plain_error > 100 * scored_error


@pytest.mark.parametrize(
    ("n_scored", "constant_there", "zero_weight_third"),
    [
        (2, False, False),  # fewer than three scored rows
        (3, False, True),  # three scored, but one has zero weight
        (5, True, False),  # the targets are constant on the scored rows: nothing to score against
    ],
)
def test_scored_rows_that_cannot_score_fall_back_to_every_row(
    n_scored, constant_there, zero_weight_third
):
    z, y, w, _ = _far_tethered_sample()
    # Uneven weights: the weighted mean of a constant then differs from it by rounding.
    w = w * np.random.default_rng(8).uniform(0.1, 1.0, w.size)
    if zero_weight_third:
        w[2] = 0.0
    phi = PolynomialBasis(total_degree_indices(1, 4), ["hermite"]).design_matrix(z)
    y = y.copy()
    if constant_there:
        y[:n_scored] = 0.1
    scored = np.arange(20) < n_scored
    a = fit_shared_sparse(phi, y, w, scored)
    b = fit_shared_sparse(phi, y, w)
    np.testing.assert_array_equal(a.columns, b.columns)
    assert a.loo_error_total == b.loo_error_total


@pytest.mark.parametrize(
    ("scored", "flat"),
    [
        (np.ones(5, bool), False),
        (np.ones(5, bool), True),  # checked before the constant-target shortcut
        (np.ones(20), False),  # weights are not a mask
    ],
)
def test_a_bad_scored_mask_is_refused(scored, flat):
    z, y, w, _ = _far_tethered_sample()
    phi = PolynomialBasis(total_degree_indices(1, 3), ["hermite"]).design_matrix(z)
    with pytest.raises(ValueError, match="scored must be a boolean array of shape"):
        fit_shared_sparse(phi, np.ones_like(y) if flat else y, w, scored)


def _scripted_search(dim, errors):
    """`_degree_search` with a fit whose error by degree is scripted: the degree it keeps."""
    sizes = [len(total_degree_indices(dim, d, 0.75)) for d in range(1, len(errors) + 1)]

    def fit(phi):
        degree = sizes.index(phi.shape[1]) + 1
        return SimpleNamespace(loo_error_total=errors[degree - 1])

    z = np.zeros((1000, dim))
    weights = np.ones(z.shape[0])
    basis, _ = _degree_search(z, ["hermite"] * dim, len(errors), weights, 0.75, 4000, fit)
    return basis.degree


def test_cheap_degrees_are_all_tried_whatever_the_patience():
    # One parameter: every candidate set has at most 9 terms, so a late drop is found.
    assert _scripted_search(1, [1.0, 0.5, 0.6, 0.7, 0.8, 0.01]) == 6


def test_patience_stops_the_search_once_sets_are_large():
    # Fifteen parameters with q = 0.75: 16, 31, 151, 376 and 1056 terms for degrees 1 to 5.
    # Degrees 3 and 4 do not improve on 2 and their sets are past the cheap size, so
    # degree 5 is never fitted.
    assert [len(total_degree_indices(15, d, 0.75)) for d in range(1, 6)] == [
        16,
        31,
        151,
        376,
        1056,
    ]
    assert _scripted_search(15, [1.0, 0.5, 0.6, 0.7, 0.01]) == 2
