"""The local frame and the surrogate's serialised form.

References: weighted means and covariances from numpy (`numpy.average`, `numpy.cov` with
``aweights``); a polynomial space of total degree p is mapped onto itself by an affine change
of variables (common practice, no source needed), so a quadratic is fitted exactly in any frame.
"""

from __future__ import annotations

import numpy as np

from honing.engine.likelihood import OutputReduction
from honing.engine.surrogate import Frame, Surrogate, fit_surrogate


def _correlated_runs(rng: np.random.Generator, n: int = 300, dim: int = 4) -> np.ndarray:
    root = rng.normal(size=(dim, dim))
    return 2.0 + rng.normal(size=(n, dim)) @ root * np.geomspace(0.01, 3.0, dim)


def test_local_frame_whitens_under_the_weights():
    rng = np.random.default_rng(0)
    xi = _correlated_runs(rng)
    weights = rng.uniform(0.01, 1.0, size=xi.shape[0])
    frame = Frame.local(xi, weights)
    z = frame.to_local(xi)
    # Weighted mean 0 and weighted covariance I, to rounding (1e-10 on unit quantities).
    np.testing.assert_allclose(np.average(z, axis=0, weights=weights), 0.0, atol=1e-10)
    cov = np.cov(z, rowvar=False, aweights=weights, bias=True)
    np.testing.assert_allclose(cov, np.eye(xi.shape[1]), atol=1e-10)
    # The scale is the per-coordinate weighted sd (numpy's), so the failure model and the
    # Laplace steps keep their axis-aligned meaning.
    sd = np.sqrt(np.diag(np.cov(xi, rowvar=False, aweights=weights, bias=True)))
    np.testing.assert_allclose(frame.scale, sd, rtol=1e-12)


def test_frame_axes_are_the_principal_axes_of_the_correlation():
    # A 2 x 2 correlation matrix [[1, r], [r, 1]] has eigenvectors (1, 1) / sqrt(2) with
    # eigenvalue 1 + r and (1, -1) / sqrt(2) with 1 - r (closed form, common practice), so
    # the frame's columns are those axes over sqrt(eigenvalue), the larger eigenvalue first.
    rng = np.random.default_rng(1)
    base = rng.normal(size=(5000, 2))
    xi = np.column_stack([base[:, 0], 0.8 * base[:, 0] + 0.6 * base[:, 1]]) * [0.3, 4.0]
    frame = Frame.local(xi, np.ones(xi.shape[0]))
    assert frame.whitening is not None
    r = np.corrcoef(xi, rowvar=False)[0, 1]
    first = np.array([1.0, 1.0]) / np.sqrt(2 * (1 + r))
    second = np.array([1.0, -1.0]) / np.sqrt(2 * (1 - r))
    # 1e-10: both sides are the same few floating-point operations on unit quantities.
    np.testing.assert_allclose(frame.whitening[:, 0], first, atol=1e-10)
    sign = np.sign(frame.whitening[0, 1])
    np.testing.assert_allclose(frame.whitening[:, 1], sign * second, atol=1e-10)


def test_frame_is_the_same_for_the_same_runs_in_any_order():
    # Each axis's sign is fixed by its largest entry, so a permutation of the runs (which
    # changes nothing a fit depends on) gives the same frame to rounding.
    rng = np.random.default_rng(4)
    xi = _correlated_runs(rng)
    weights = rng.uniform(0.1, 1.0, size=xi.shape[0])
    order = rng.permutation(xi.shape[0])
    a = Frame.local(xi, weights)
    b = Frame.local(xi[order], weights[order])
    assert a.whitening is not None and b.whitening is not None
    # 1e-9: sums in another order differ by rounding, amplified by the inverse square root
    # of the smallest eigenvalue (about 1e-4 here).
    np.testing.assert_allclose(a.whitening, b.whitening, atol=1e-9)


def test_runs_on_a_line_keep_a_finite_frame():
    t = np.linspace(-1.0, 1.0, 50)
    xi = np.column_stack([t, 2 * t, np.full_like(t, 0.3)])
    frame = Frame.local(xi, np.ones(t.size))
    assert np.all(np.isfinite(frame.to_local(xi)))


def test_quadratic_is_fitted_exactly_in_a_correlated_frame_and_survives_the_payload():
    # A quadratic in the reference coordinates is a quadratic in any affine frame, so the
    # degree-adaptive fit reproduces it to rounding (1e-8 in noise units, against outputs of
    # order 10), before and after the JSON + arrays round trip.
    rng = np.random.default_rng(2)
    xi = _correlated_runs(rng, n=200, dim=3)
    a = rng.normal(size=(3, 5))
    outputs = xi @ a + 0.5 * (xi[:, :1] * xi[:, 1:2]) - 0.2 * xi[:, 2:3] ** 2
    weights = np.ones(xi.shape[0])
    surrogate = fit_surrogate(xi, outputs, weights, Frame.local(xi, weights), max_degree=3)
    test = _correlated_runs(np.random.default_rng(3), n=50, dim=3)
    truth = test @ a + 0.5 * (test[:, :1] * test[:, 1:2]) - 0.2 * test[:, 2:3] ** 2
    np.testing.assert_allclose(surrogate.residuals(test), truth, atol=1e-8)
    meta, arrays = surrogate.to_payload()
    restored = Surrogate.from_payload(meta, arrays)
    np.testing.assert_array_equal(restored.residuals(test), surrogate.residuals(test))
    assert isinstance(restored.reduction, OutputReduction)


def test_scored_runs_choose_the_degree_of_the_surrogate():
    # One run 12 sd out at weight 4e-4 beside 19 in the bulk (as in test_shared_regression):
    # scored everywhere its extrapolation holds the fit at a low degree; scored on the bulk,
    # the fit follows the smooth curve to a high degree. Identity frame, so the local
    # coordinates are the runs' own.
    xi = np.r_[np.linspace(-2.5, 2.5, 19), -12.0][:, None]
    outputs = np.exp(0.6 * xi) + 0.4 * np.sin(1.5 * xi)
    weights = np.r_[np.ones(19), 4e-4]
    frame = Frame(np.zeros(1), np.ones(1), ("hermite",))
    bulk = np.r_[np.ones(19, bool), False]
    scored = fit_surrogate(xi, outputs, weights, frame, max_degree=10, scored=bulk)
    plain = fit_surrogate(xi, outputs, weights, frame, max_degree=10)
    assert scored.degree >= 6 > plain.degree
