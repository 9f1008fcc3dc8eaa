import numpy as np
import pytest
from scipy import integrate, stats

from honing.engine.likelihood import OutputReduction, log_likelihood, noise_scale_draws


def _residuals(seed, n=120, size=2000, rank=6):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, rank)) @ rng.normal(size=(rank, size)), rng.uniform(0.1, 1, n)


@pytest.mark.parametrize(
    ("n", "size"),
    # more outputs than runs (Gram route), fewer (covariance route), both long (random range)
    [(120, 2000), (400, 60), (700, 800)],
)
def test_components_match_numpy_svd(n, size):
    x, w = _residuals(0, n=n, size=size)
    red = OutputReduction.fit(x, w)
    # Reference: numpy.linalg.svd of the weighted, centred matrix.
    wn = w / w.sum()
    centred = (x - wn @ x) * np.sqrt(wn)[:, None]
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    k = red.n_components
    assert k == 6  # the rank of the planted residuals
    # Components agree up to sign; rounding of either route is ~1e-12 relative here.
    overlap = np.abs(np.sum(vt[:k] * red.components.T, axis=1))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-9)
    np.testing.assert_allclose(red.components.T @ red.components, np.eye(k), atol=1e-12)
    assert red.residual_energy == pytest.approx(np.sum(s[k:] ** 2), abs=1e-8)


def test_random_range_route_is_near_optimal_and_accounts_exactly():
    # A spectrum with a slow tail: singular values 0.7^j, j = 0..49, on random orthonormal
    # directions, so the leading components are not exactly low rank.
    rng = np.random.default_rng(3)
    n, size, r = 700, 800, 50
    left, _ = np.linalg.qr(rng.normal(size=(n, r)))
    right, _ = np.linalg.qr(rng.normal(size=(size, r)))
    x = (left * 0.7 ** np.arange(r)) @ right.T * np.sqrt(n)
    red = OutputReduction.fit(x, np.ones(n))
    centred = (x - x.mean(axis=0)) / np.sqrt(n)
    _, s, _ = np.linalg.svd(centred, full_matrices=False)
    k = red.n_components
    v = red.components
    np.testing.assert_allclose(v.T @ v, np.eye(k), atol=1e-10)
    # What the components miss is exactly what residual_energy says (the truncation is
    # accounted for, whatever the basis): rounding only.
    missed = np.sum((centred - centred @ v @ v.T) ** 2)
    assert red.residual_energy == pytest.approx(missed, rel=1e-9, abs=1e-12)
    # Near-optimal: Halko, Martinsson and Tropp (2011), Thm 10.6, bound the range error by a
    # small multiple of the singular values past k + oversampling, here 0.7^40 ~ 6e-7 of the
    # top one: the energy kept is within 1e-9 of the best rank-k energy (relative).
    kept = np.sum(centred**2) - red.residual_energy
    assert kept == pytest.approx(np.sum(s[:k] ** 2), rel=1e-9)


def test_misfit_from_scores_equals_full_sum_of_squares():
    x, w = _residuals(1)
    red = OutputReduction.fit(x, w)
    points = x[:10] + 0.1  # any residual vectors in the span, shifted off the mean
    scores, _ = red.project_with_loss(points)
    # With nothing dropped (residual_energy ~ 0), ||mean + V c||^2 is the full sum.
    expected = np.sum(red.reconstruct(scores) ** 2, axis=1)
    np.testing.assert_allclose(red.misfit(scores), expected, rtol=1e-10)


def test_projection_loss_equals_what_the_rebuilt_residuals_miss():
    # Against the direct computation with numpy: ||r - (mean + V t)||^2 per point, for points
    # off the components' span. 1e-9 relative: the norms identity subtracts sums of squares of
    # order 1e2, leaving losses of order 1, so up to ~1e-14 * 1e2 of rounding.
    x, w = _residuals(2)
    red = OutputReduction.fit(x, w, energy=0.9)
    points = x[:20] + np.random.default_rng(3).normal(size=(20, x.shape[1]))
    scores, loss = red.project_with_loss(points)
    direct = np.sum((points - red.reconstruct(scores)) ** 2, axis=1)
    assert direct.min() > 0.1
    np.testing.assert_allclose(loss, direct, rtol=1e-9)


def test_noise_scale_marginal_matches_numerical_integral():
    # ∫ s^-N exp(-m / (2 s^2)) ds / s, by scipy.integrate.quad, against m^(-N/2) up to a
    # constant: the ratio between two misfits must agree.
    n = 12

    def marginal(m):
        value, _ = integrate.quad(lambda s: s ** (-n - 1) * np.exp(-m / (2 * s**2)), 0, np.inf)
        return np.log(value)

    m1, m2 = 7.0, 19.0
    ours = log_likelihood(np.array([m1, m2]), n, estimate_noise=True)
    assert ours[0] - ours[1] == pytest.approx(marginal(m1) - marginal(m2), rel=1e-8)
    fixed = log_likelihood(np.array([m1]), n, estimate_noise=False)
    assert fixed[0] == -0.5 * m1


def test_noise_scale_draws_follow_inverse_gamma():
    # s^2 | misfit ~ InvGamma(N/2, scale misfit/2) (Gelman et al., BDA3, sect. 3.2);
    # Kolmogorov-Smirnov against scipy.stats.invgamma at a 1e-3 significance level.
    rng = np.random.default_rng(2)
    n, m = 30, 45.0
    s = noise_scale_draws(np.full(20_000, m), n, rng)
    result = stats.kstest(s**2, stats.invgamma(a=n / 2, scale=m / 2).cdf)
    assert result.pvalue > 1e-3


def test_noise_scale_draws_at_a_zero_misfit_are_zero_not_nan():
    # Where the surrogate reproduces the data exactly, the misfit's constant part
    # ||mean||^2 - ||V^T mean||^2 is 0 only up to rounding: -1.3e-15 for this seeded mean in
    # the components' span (found by search). Its noise scale was NaN (the API answered null).
    rng = np.random.default_rng(4)
    q, _ = np.linalg.qr(rng.normal(size=(5, 2)))
    red = OutputReduction(mean=q @ rng.normal(size=2), components=q, residual_energy=0.0)
    at_data = -(red.mean @ q)[None, :]  # scores that rebuild residuals of 0: the data exactly
    misfit = np.array([red.misfit(at_data)[0], 0.0, 4.0])
    assert misfit[0] < 0.0  # the rounding this guards against
    s = noise_scale_draws(misfit, 3, np.random.default_rng(5))
    assert np.all(np.isfinite(s)) and s[0] == 0.0 and s[1] == 0.0 and s[2] > 0.0
