"""The posterior sampler against targets whose moments are known exactly.

Reference: a Gaussian target N(m, S) has mean m and covariance S (exact). Tolerances are
Monte Carlo errors from the chain's own effective sample size: the sd of a sample mean is
``sd / sqrt(ess)`` and that of a sample sd about ``sd / sqrt(2 ess)`` (common practice, the
large-sample variance of a normal sample's sd).
"""

from __future__ import annotations

import numpy as np
import pytest

from honing.engine import sampling
from honing.engine.rounds import FINAL_ESS, FINAL_POOL
from honing.engine.sampling import (
    Laplace,
    laplace_fit,
    n_walkers,
    sample_posterior,
)

DIM = 15


def _gaussian(mean: np.ndarray, cov: np.ndarray):
    precision = np.linalg.inv(cov)

    def log_prob(x: np.ndarray) -> np.ndarray:
        r = x - mean
        return -0.5 * np.einsum("ij,jk,ik->i", r, precision, r)

    return log_prob


def _correlated_cov(rng: np.random.Generator) -> np.ndarray:
    """A 15-d covariance with sds from 0.01 to 3 and strong correlations."""
    q, _ = np.linalg.qr(rng.normal(size=(DIM, DIM)))
    sds = np.geomspace(0.01, 3.0, DIM)
    return (q * sds**2) @ q.T


def _check_moments(draws: np.ndarray, ess: np.ndarray, mean: np.ndarray, cov: np.ndarray):
    sd = np.sqrt(np.diag(cov))
    # Per coordinate: 5 Monte Carlo sd, so 15 coordinates pass together by chance ~1e-5 short.
    z_mean = (draws.mean(axis=0) - mean) / (sd / np.sqrt(ess))
    assert np.abs(z_mean).max() < 5.0, z_mean
    ratio = draws.std(axis=0, ddof=1) / sd
    assert np.abs(ratio - 1).max() < 5.0 / np.sqrt(2 * ess.min()), ratio
    # Averaged over coordinates the sd ratio is sharper (errors of 15 coordinates average
    # out; treated as independent, which the whitened target makes nearly so): a sampler
    # that shrinks every coordinate by 8% fails here.
    assert abs(ratio.mean() - 1) < 4.0 / np.sqrt(2 * ess.min() * DIM), ratio.mean()


@pytest.mark.parametrize("seed", [0, 1])
def test_standard_normal_from_a_poor_start(seed):
    # Exact target N(0, I_15); walkers start in a ball 10 times too small, so burn-in and
    # the stopping rule are exercised, not just the invariant distribution.
    rng = np.random.default_rng(seed)
    mean, cov = np.zeros(DIM), np.eye(DIM)
    initial = 0.1 * rng.normal(size=(n_walkers(DIM), DIM))
    chain = sample_posterior(_gaussian(mean, cov), initial, rng)
    assert chain.warnings == []
    assert chain.ess.min() >= 1000
    _check_moments(chain.draws, chain.ess, mean, cov)


def test_correlated_gaussian():
    # Exact target N(m, S) with sds over 2.5 decades and strong correlations: DE moves are
    # affine invariant, so the ill-conditioning must not bias the draws.
    rng = np.random.default_rng(2)
    mean, cov = rng.normal(size=DIM), _correlated_cov(rng)
    initial = rng.multivariate_normal(mean, cov, size=n_walkers(DIM))
    chain = sample_posterior(_gaussian(mean, cov), initial, rng)
    _check_moments(chain.draws, chain.ess, mean, cov)
    # Correlations: the Monte Carlo sd of a sample correlation is (1 - r^2) / sqrt(n)
    # (Fisher's large-sample result); 5 of them, with the smallest ess for n.
    sd = np.sqrt(np.diag(cov))
    exact = cov / np.outer(sd, sd)
    found = np.corrcoef(chain.draws, rowvar=False)
    assert np.all(np.abs(found - exact) < 5 * (1 - exact**2) / np.sqrt(chain.ess.min()) + 1e-9)


def test_independence_proposal_keeps_the_target():
    # With a Laplace proposal that is deliberately off (shifted by 0.5 sd, 30% too narrow),
    # the Metropolis-Hastings correction must still give the exact Gaussian moments.
    rng = np.random.default_rng(3)
    mean, cov = rng.normal(size=DIM), _correlated_cov(rng)
    chol = np.linalg.cholesky(cov)
    proposal = Laplace(mean + 0.5 * np.sqrt(np.diag(cov)), 0.7 * chol)
    initial = rng.multivariate_normal(mean, cov, size=n_walkers(DIM))
    chain = sample_posterior(_gaussian(mean, cov), initial, rng, proposal=proposal)
    _check_moments(chain.draws, chain.ess, mean, cov)


@pytest.mark.slow
def test_served_pool_holds_the_final_effective_size():
    # A stopped calibration serves a pool of up to `FINAL_POOL` draws from a chain run to
    # `FINAL_ESS` (honing.engine.rounds). Over 20 such chains on N(0, I_2), 40 pooled means
    # with an effective size n scatter with sd 1/sqrt(n), so n times their mean square is
    # chi-square(40) / 40, and the bound 1.3 / sqrt(FINAL_ESS) on their rms means
    # chi-square(40) < 67.6 n / 10,000 (scipy.stats.chi2): it holds with probability 0.996
    # if the pool keeps 10,000, 0.99 at the 9,400 measured over 30 chains, and half the
    # time at 5,900. The steering pool (MIN_ESS, MAX_POOL) keeps about 3,300 (see
    # sampling.MIN_ESS) and passes with probability 0.01; on these seeds its rms is 0.0146.
    target = _gaussian(np.zeros(2), np.eye(2))
    proposal = Laplace(np.zeros(2), np.eye(2))
    means = []
    for seed in range(20):
        rng = np.random.default_rng(seed)
        initial = rng.normal(size=(n_walkers(2), 2))
        chain = sample_posterior(
            target, initial, rng, proposal=proposal, min_ess=FINAL_ESS, max_pool=FINAL_POOL
        )
        assert chain.ess.min() >= FINAL_ESS and chain.draws.shape[0] == FINAL_POOL
        means.append(chain.draws.mean(axis=0))
    rms = np.sqrt(np.mean(np.square(means)))
    assert rms < 1.3 / np.sqrt(FINAL_ESS), rms


def test_laplace_fit_recovers_a_gaussian():
    # For a quadratic log density the central-difference Hessian is exact up to rounding at
    # any point, so the covariance must match to 1e-5 (rounding of ~1e-16 over steps of 1e-4
    # squared). The mode only centres the independence proposal, whose Metropolis-Hastings
    # correction absorbs any offset; L-BFGS-B's default tolerances on this 9e4-conditioned
    # target stop within about 1e-3 sd of it, so 1e-2 sd is asked.
    rng = np.random.default_rng(4)
    mean = 0.3 * rng.normal(size=DIM)
    cov = _correlated_cov(rng) / 10
    sd = np.sqrt(np.diag(cov))
    fit = laplace_fit(_gaussian(mean, cov), np.zeros(DIM), sd, np.zeros(DIM, dtype=bool))
    assert fit is not None
    np.testing.assert_allclose((fit.mode - mean) / sd, 0.0, atol=1e-2)
    found = fit.chol @ fit.chol.T
    np.testing.assert_allclose(found / np.outer(sd, sd), cov / np.outer(sd, sd), atol=1e-5)


def test_walker_count_rejects_too_few():
    with pytest.raises(ValueError, match="even number of walkers"):
        sample_posterior(
            _gaussian(np.zeros(DIM), np.eye(DIM)),
            np.zeros((2 * DIM - 2, DIM)),
            np.random.default_rng(0),
        )


def test_long_chain_is_checked_at_doubling_lengths(monkeypatch):
    """A chain whose tau asks for more than `max_steps` is checked at 200, 400, 800, ...
    steps and stops at the cap with a warning: 6 autocorrelation estimates for 5000 steps,
    where a check every 200 steps would make 25 (each costs an FFT of the whole chain)."""
    calls = []

    def slow_tau(chain: np.ndarray) -> np.ndarray:
        calls.append(chain.shape[0])
        return np.full(chain.shape[2], 1000.0)

    monkeypatch.setattr(sampling, "_tau", slow_tau)
    rng = np.random.default_rng(3)
    walkers = n_walkers(2)
    result = sample_posterior(
        _gaussian(np.zeros(2), np.eye(2)), rng.normal(size=(walkers, 2)), rng, max_steps=5000
    )
    assert result.n_steps == 5000
    # _tau sees the chain after its first fifth: 4/5 of 200, 400, 800, 1600, 3200, 5000 steps.
    assert calls == [160, 320, 640, 1280, 2560, 4000]
    assert any("stopped at 5000 steps" in w for w in result.warnings)


def test_short_chain_runs_to_the_length_its_tau_asks_for():
    """With tau 10 a chain needs max(50 tau, 5 tau + 1000 tau / 64) = 500 steps: from 200 the
    next chunk is capped at doubling (200), from 400 it is the missing 100 raised to the
    200-step minimum; a tau of 1000 near the cap runs only to the cap."""
    assert sampling._next_chunk(200, 10.0, 64, 1000, 20_000) == 200
    assert sampling._next_chunk(400, 10.0, 64, 1000, 20_000) == 200
    assert sampling._next_chunk(19_900, 1000.0, 64, 1000, 20_000) == 100


def test_tau_of_a_walker_that_never_moved_is_the_window_length():
    """emcee averages each walker's autocorrelation, 0 / 0 for a constant walker: NaN. The
    sampler must read that as no decorrelation seen (tau = window length), not fail."""
    rng = np.random.default_rng(5)
    chain = rng.normal(size=(400, 8, 2))
    chain[:, 3, 1] = 0.7  # walker 3 stuck in coordinate 1
    tau = sampling._tau(chain)
    assert np.isfinite(tau).all()
    assert tau[1] == 400.0
    assert tau[0] < 5.0  # independent draws: tau near 1 (emcee's estimator, a few % noise)


def test_a_stuck_walker_ends_in_a_warning_not_an_error():
    """A walker on a narrow spike 50 nats above a flat box never leaves it (every move out is
    accepted with probability e^-50) and no other walker lands on it: the chain runs to its
    cap and says so, and the pool keeps at least `MIN_DRAWS_PER_WALKER` draws per walker."""

    def spike_in_box(x: np.ndarray) -> np.ndarray:
        inside = np.all(np.abs(x) < 1.0, axis=1)
        spike = np.all(np.abs(x - 0.5) < 1e-9, axis=1)
        return np.where(inside, np.where(spike, 50.0, 0.0), -np.inf)

    rng = np.random.default_rng(9)
    walkers = n_walkers(2)
    start = rng.uniform(-0.9, 0.9, size=(walkers, 2))
    start[0] = 0.5
    result = sample_posterior(spike_in_box, start, rng, max_steps=1000)
    assert result.n_steps == 1000
    assert any("stopped at 1000 steps" in w for w in result.warnings)
    assert result.draws.shape[0] >= sampling.MIN_DRAWS_PER_WALKER * walkers


def _two_gaussians(weight: float, centre: float):
    """log density of ``weight N(-c, I) + (1 - weight) N(c, I)`` in 2-d, c on the first axis."""
    shift = np.array([centre, 0.0])

    def log_prob(x: np.ndarray) -> np.ndarray:
        a = np.log(weight) - 0.5 * np.sum((x + shift) ** 2, axis=1)
        b = np.log(1 - weight) - 0.5 * np.sum((x - shift) ** 2, axis=1)
        return np.logaddexp(a, b)

    return log_prob


def test_find_modes_finds_a_second_mode_from_a_few_points_near_it():
    # 0.7 N((-6, 0), I) + 0.3 N((6, 0), I): modes 12 sd apart, each with Laplace evidence
    # equal to its weight (the components barely overlap: exp(-18) at the midpoint). The
    # candidates are 500 draws of the first mode and three points near the second, as when
    # the sampler sits in one mode and a few runs lie in the other.
    rng = np.random.default_rng(0)
    target = _two_gaussians(0.7, 6.0)
    near_first = rng.normal(size=(500, 2)) + np.array([-6.0, 0.0])
    near_second = rng.normal(size=(3, 2)) + np.array([6.0, 0.0])
    candidates = np.vstack([near_first, near_second])
    modes = sampling.find_modes(
        target, candidates, target(candidates), np.ones(2), np.zeros(2, dtype=bool)
    )
    assert modes is not None and len(modes.fits) == 2
    # Modes to the optimiser's tolerance, weights to the finite-difference Hessian's (1e-5).
    np.testing.assert_allclose([f.mode[0] for f in modes.fits], [-6.0, 6.0], atol=1e-4)
    np.testing.assert_allclose(modes.weights, [0.7, 0.3], atol=1e-4)


def test_one_mode_is_one_mode():
    # A banana-shaped single mode: every candidate lies in one basin, so no second search
    # finds anything new, and the proposal stays the one-mode Laplace fit.
    def banana(x: np.ndarray) -> np.ndarray:
        return -0.5 * x[:, 0] ** 2 - 0.5 * (x[:, 1] - 0.5 * x[:, 0] ** 2) ** 2 / 0.25

    rng = np.random.default_rng(1)
    a = rng.normal(size=400)
    candidates = np.column_stack([a, 0.5 * a**2 + 0.5 * rng.normal(size=400)])
    modes = sampling.find_modes(
        banana, candidates, banana(candidates), np.ones(2), np.zeros(2, dtype=bool)
    )
    assert modes is not None and len(modes.fits) == 1


def test_a_chain_with_a_two_mode_proposal_shares_its_draws_by_the_modes_weights():
    # Differential-evolution moves alone rarely cross 12 sd of empty space; the mixture
    # proposal must, and the Metropolis-Hastings correction must leave the exact weights 0.7
    # and 0.3 (the target's own). The share's Monte Carlo sd is sqrt(0.21 / ess) (a
    # proportion, ess from the chain's own autocorrelation of the first coordinate, whose
    # sign tells the mode); 5 such errors.
    rng = np.random.default_rng(2)
    target = _two_gaussians(0.7, 6.0)
    fits = [Laplace(np.array([-6.0, 0.0]), np.eye(2)), Laplace(np.array([6.0, 0.0]), np.eye(2))]
    modes = sampling.Modes(fits, np.array([0.5, 0.5]))  # weights off on purpose
    initial = modes.draw(rng, n_walkers(2))
    chain = sample_posterior(target, initial, rng, proposal=modes)
    share = float(np.mean(chain.draws[:, 0] < 0))
    assert abs(share - 0.7) < 5 * np.sqrt(0.21 / chain.ess.min())
    # Within each mode the draws are N(+-6, I).
    for side, centre in ((chain.draws[:, 0] < 0, -6.0), (chain.draws[:, 0] > 0, 6.0)):
        assert abs(chain.draws[side, 0].mean() - centre) < 0.1
        assert abs(chain.draws[side, 0].std() - 1.0) < 0.1


@pytest.mark.parametrize("start", [(-0.5, 0.8), (-0.9999995, 0.8), (0.4, 0.1)])
def test_find_mode_polishes_the_free_coordinates_when_another_sits_at_its_bound(start):
    # log p = -3 xi_1 - ((xi_2 - 0.3) / 0.1)^2 / 2 on xi_1 in [-1, 1]: the mode is (-1, 0.3),
    # on the bound (as a log-uniform prior's 1/theta pushes a weakly informed parameter).
    # A difference step past the bound used to zero the whole gradient, and the search
    # stopped up to 0.45 sd short in xi_2. L-BFGS-B's stopping rule leaves ~1e-5 sd.
    def log_prob(x: np.ndarray) -> np.ndarray:
        out = -3.0 * x[:, 0] - 0.5 * ((x[:, 1] - 0.3) / 0.1) ** 2
        return np.where(np.abs(x[:, 0]) <= 1.0, out, -np.inf)

    mode = sampling.find_mode(
        log_prob, np.array(start), np.array([0.3, 0.1]), np.array([True, False])
    )
    assert mode[0] == pytest.approx(-1.0, abs=1e-6)
    assert abs(mode[1] - 0.3) / 0.1 < 1e-3
