"""The engine on real-data troubles: unknown noise, crashing simulators, long series,
poor early surrogates and priors that cannot explain the data."""

import emcee
import numpy as np
import pytest
from scipy import integrate, optimize, stats

from honing.engine.design import DEFENSIVE_FRACTION
from honing.engine.loop import CalibrationLoop
from honing.engine.rounds import refit, start
from honing.engine.spec import CalibrationSpec
from honing.engine.state import RunTable

# As in test_rounds: >= 1000 effective draws give Monte Carlo errors of <= 0.032 sd on a mean
# and ~0.022 relative on an sd; where the reference is sampled too, errors add in quadrature.
MEAN_TOL_SD = 0.15
SD_REL_TOL = 0.10


def _spec(parameters, observations, **extra):
    return CalibrationSpec.from_dict(
        {"name": "check", "parameters": parameters, "observations": observations, **extra}
    )


def _grid_moments(logp, grid_a, grid_b):
    """Posterior means and sds on a 2-D grid by Simpson's rule (scipy.integrate.simpson)."""
    aa, bb = np.meshgrid(grid_a, grid_b, indexing="ij")
    lp = logp(aa, bb)
    dens = np.exp(lp - lp[np.isfinite(lp)].max())
    dens[~np.isfinite(lp)] = 0.0

    def integral(f):
        return integrate.simpson(integrate.simpson(f * dens, x=grid_b, axis=1), x=grid_a)

    z = integral(np.ones_like(aa))
    mean = np.array([integral(aa), integral(bb)]) / z
    var = np.array([integral((aa - mean[0]) ** 2), integral((bb - mean[1]) ** 2)]) / z
    return mean, np.sqrt(var)


def _line(theta, x):
    a, b = theta
    return a * np.exp(-b * x)


@pytest.mark.slow
def test_unknown_noise_scale_is_recovered_and_matches_emcee():
    rng = np.random.default_rng(21)
    x = np.linspace(0.0, 2.0, 30)
    stated = 0.05
    y = _line((2.0, 0.8), x) + 2.0 * stated * rng.normal(size=x.size)  # twice the stated sd
    spec = _spec(
        [
            {"name": "a", "prior": {"kind": "uniform", "low": 0.5, "high": 4.0}},
            {"name": "b", "prior": {"kind": "uniform", "low": 0.1, "high": 2.0}},
        ],
        [{"name": "y", "values": y.tolist(), "sd": stated}],
        noise={"scale": "estimate"},
        design={"initial_runs": 12, "batch_size": 6},
        budget={"max_runs": 60},
        seed=5,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"y": _line((p["a"], p["b"]), x).tolist()})
    lo, hi = loop.state.summary["parameters"]["noise_scale"]["ci95"]
    assert lo < 2.0 < hi

    # Reference: emcee on the full model with (a, b, log s) sampled, the prior p(s) ∝ 1/s
    # being flat in log s.
    def log_prob(th):
        a, b, log_s = th[:, 0], th[:, 1], th[:, 2]
        resid = (_line((a[:, None], b[:, None]), x) - y) / stated
        lp = -x.size * log_s - 0.5 * np.sum(resid**2, axis=1) * np.exp(-2 * log_s)
        inside = (a > 0.5) & (a < 4) & (b > 0.1) & (b < 2)
        return np.where(inside, lp, -np.inf)

    r = np.random.default_rng(3)
    init = np.column_stack(
        [r.normal(2, 0.05, 48), r.normal(0.8, 0.05, 48), r.normal(0.7, 0.05, 48)]
    )
    sampler = emcee.EnsembleSampler(48, 3, log_prob, vectorize=True)
    sampler.random_state = np.random.RandomState(3).get_state()
    sampler.run_mcmc(init, 6000)
    tau = sampler.get_autocorr_time(discard=1000)
    ref = sampler.get_chain(discard=1000, thin=max(1, int(tau.max() / 2)), flat=True)
    ref[:, 2] = np.exp(ref[:, 2])
    got = loop.state.pool
    tol = MEAN_TOL_SD * np.sqrt(2)
    np.testing.assert_array_less(np.abs(got.mean(0) - ref.mean(0)) / ref.std(0), tol)
    np.testing.assert_allclose(got.std(0), ref.std(0), rtol=SD_REL_TOL * np.sqrt(2))

    # The MAP of (a, b) maximises the marginal posterior Q(a, b)^(-N/2) (flat priors, s
    # integrated out under p(s) ∝ 1/s): found here by scipy's Nelder-Mead on the true model.
    # The served one comes from the surrogate, whose error at convergence is under 0.2 noise
    # sd, so it may be off by a fraction of a posterior sd; 0.05 sd is allowed.
    summary = loop.state.summary["parameters"]

    def misfit(ab):
        return np.sum(((_line(ab, x) - y) / stated) ** 2)

    exact = optimize.minimize(misfit, [2.0, 0.8], method="Nelder-Mead", options={"xatol": 1e-10})
    served = np.array([summary["a"]["map"], summary["b"]["map"]])
    np.testing.assert_array_less(np.abs(served - exact.x) / ref.std(0)[:2], 0.05)
    # The noise multiplier's MAP is its mode given those parameters: s^-(N+1)
    # exp(-Q / (2 s^2)) peaks at s^2 = Q / (N + 1). Q is taken on the true model at the
    # served MAP, so only the surrogate's misfit error (under 1% of Q here) separates them.
    s_mode = np.sqrt(misfit(served) / (x.size + 1))
    assert summary["noise_scale"]["map"] == pytest.approx(s_mode, rel=0.01)


@pytest.mark.slow
def _calibrate_with_failures(seed, x, y, sd, limit):
    """Run the loop on a simulator that fails for a > limit; the loop and its spec."""
    spec = _spec(
        [
            {"name": "a", "prior": {"kind": "uniform", "low": 0.5, "high": 4.0}},
            {"name": "b", "prior": {"kind": "uniform", "low": 0.1, "high": 2.0}},
        ],
        [{"name": "y", "values": y.tolist(), "sd": sd}],
        design={"initial_runs": 16, "batch_size": 8},
        budget={"max_runs": 100},
        seed=seed,
    )
    loop = CalibrationLoop(spec)
    while loop.status == "collecting":
        batch = loop.ask(4)
        if not batch:
            break
        for p in batch:
            values = spec.parameters_dict(p.theta)
            if values["a"] > limit:
                loop.tell(p.point_id, error="solver diverged")
            else:
                loop.tell(p.point_id, outputs={"y": _line((values["a"], values["b"]), x).tolist()})
    return loop


@pytest.mark.slow
def test_failing_region_is_avoided_and_given_no_mass():
    x = np.linspace(0.0, 2.0, 10)
    sd = 0.05
    rng = np.random.default_rng(8)
    y = _line((2.0, 0.8), x) + sd * rng.normal(size=x.size)
    # The simulator fails for a > 1.92: about 1.2 sd above the mean of the uncut posterior,
    # so the cut moves the mean by half an sd and narrows it by a quarter.
    limit = 1.92

    # Reference: quadrature of prior x likelihood with zero mass where the simulator fails.
    def logp(a, b):
        resid = (a[..., None] * np.exp(-b[..., None] * x) - y) / sd
        lp = -0.5 * np.sum(resid**2, axis=-1)
        return np.where(a > limit, -np.inf, lp)

    mean, sdev = _grid_moments(logp, np.linspace(1.6, limit, 801), np.linspace(0.5, 1.1, 801))
    spread_inside, all_inside = [], []
    # Three calibrations: one batch holds only a dozen spread points, so one point decides
    # 7%; the shares are judged over all three batches together.
    for seed in (6, 7, 8):
        loop = _calibrate_with_failures(seed, x, y, sd, limit)
        assert loop.state.summary["diagnostics"]["failed_fraction"] > 0
        got = loop.state.pool
        np.testing.assert_array_less(np.abs(got.mean(0) - mean) / sdev, MEAN_TOL_SD)
        np.testing.assert_allclose(got.std(0), sdev, rtol=SD_REL_TOL)
        # A batch is its spread part, then the defensive share (design.DEFENSIVE_FRACTION),
        # which probes the boundary on purpose.
        proposals = loop.state.proposals
        n_defensive = round(DEFENSIVE_FRACTION * proposals.shape[0])
        inside = proposals[:, 0] > limit
        spread_inside.extend(inside[:-n_defensive])
        all_inside.extend(inside)
    assert np.mean(spread_inside) < 0.05
    assert np.mean(all_inside) <= DEFENSIVE_FRACTION


@pytest.mark.slow
def test_failures_at_random_leave_the_posterior_alone():
    # Runs fail with probability 0.2 whatever the parameters (a flaky cluster): the
    # posterior is the one without failures, here Gaussian and exact for a linear model
    # (x, y ~ U(-2, 2), outputs [x, y], sd 0.3: N(data, 0.3^2) per coordinate, the prior's
    # bounds 5 sd away). Fitting a quadratic failure model to a handful of such failures
    # gave success probabilities of 0.43-0.97 across the posterior and mean errors of 0.16
    # to 0.19 sd on 4 of 6 seeds.
    data = np.array([0.5, 0.3])
    for seed in (0, 1, 2):
        spec = _spec(
            [
                {"name": "x", "prior": {"kind": "uniform", "low": -2.0, "high": 2.0}},
                {"name": "y", "prior": {"kind": "uniform", "low": -2.0, "high": 2.0}},
            ],
            [{"name": "o", "values": data.tolist(), "sd": 0.3}],
            design={"batch_size": 8},
            budget={"max_runs": 120},
            seed=seed,
        )
        loop = CalibrationLoop(spec)
        flaky = np.random.default_rng(100 + seed)
        while loop.status == "collecting":
            batch = loop.ask(8)
            if not batch:
                break
            for p in batch:
                if flaky.random() < 0.2:
                    loop.tell(p.point_id, error="node lost")
                else:
                    loop.tell(p.point_id, outputs={"o": p.theta[:2].tolist()})
        assert loop.state.summary["diagnostics"]["failed_fraction"] > 0
        got = loop.state.pool
        np.testing.assert_array_less(np.abs(got.mean(0) - data) / 0.3, MEAN_TOL_SD)
        np.testing.assert_allclose(got.std(0), 0.3, rtol=SD_REL_TOL)


def _pulses(theta, t, centres):
    a, b = theta
    return np.concatenate([a * np.exp(-((t - c * b) ** 2) / 0.02) for c in centres], axis=-1)


@pytest.mark.slow
def test_long_series_reduced_fit_matches_full_output_posterior():
    t = np.linspace(0.0, 3.0, 5000)
    centres = (0.8, 1.0, 1.2)
    sd = 0.2
    rng = np.random.default_rng(4)
    y = _pulses((1.0, 1.5), t, centres) + sd * rng.normal(size=3 * t.size)
    spec = _spec(
        [
            {"name": "a", "prior": {"kind": "uniform", "low": 0.5, "high": 1.5}},
            {"name": "b", "prior": {"kind": "uniform", "low": 1.2, "high": 1.8}},
        ],
        [
            {
                "name": f"probe_{i}",
                "values": y[i * t.size : (i + 1) * t.size].tolist(),
                "sd": sd,
                "coords": t.tolist(),
            }
            for i in range(3)
        ],
        design={"initial_runs": 16, "batch_size": 8},
        budget={"max_runs": 80},
        seed=9,
    )
    loop = CalibrationLoop(spec)

    def simulate(p):
        out = _pulses((p["a"], p["b"]), t, centres)
        return {f"probe_{i}": out[i * t.size : (i + 1) * t.size].tolist() for i in range(3)}

    loop.run(simulate)
    assert loop.state.summary["diagnostics"]["surrogate_components"] < 31

    # Reference: the full 15,000-value likelihood on a grid (no reduction).
    def logp(a, b):
        out = np.stack(
            [_pulses((ai, bi), t, centres) for ai, bi in zip(a.ravel(), b.ravel(), strict=True)]
        )
        return (-0.5 * np.sum(((out - y) / sd) ** 2, axis=1)).reshape(a.shape)

    pool = loop.state.pool
    m, s = pool.mean(0), pool.std(0)
    grid_a = np.linspace(m[0] - 7 * s[0], m[0] + 7 * s[0], 61)
    grid_b = np.linspace(m[1] - 7 * s[1], m[1] + 7 * s[1], 61)
    mean, sdev = _grid_moments(logp, grid_a, grid_b)
    np.testing.assert_array_less(np.abs(m - mean) / sdev, MEAN_TOL_SD)
    np.testing.assert_allclose(s, sdev, rtol=SD_REL_TOL)


def test_surrogate_error_widens_an_early_posterior():
    x = np.linspace(0.0, 1.0, 8)
    sd = 0.01

    def model(k):
        return np.sin(3 * k * x) + 0.3 * k**2

    y = model(1.2)
    spec = _spec(
        [{"name": "k", "prior": {"kind": "uniform", "low": 0.0, "high": 3.0}}],
        [{"name": "y", "values": y.tolist(), "sd": sd}],
        design={"initial_runs": 6, "batch_size": 4},
        surrogate={"max_degree": 3},
        seed=2,
    )
    state = start(spec)
    theta = state.proposals[: spec.initial_runs]
    runs = RunTable(
        theta,
        np.array([model(th[0]) for th in theta]),
        np.zeros(len(theta), bool),
        np.ones(len(theta)),
    )
    widened = refit(spec, state, runs)
    plain = refit(spec, state, runs, widen=False)
    # Reference: with noise-free data the posterior sits at the truth, k = 1.2, to within
    # far less than the intervals (quadrature sd ~ 1e-3).
    lo, hi = widened.summary["parameters"]["k"]["ci95"]
    assert lo < 1.2 < hi
    plo, phi = plain.summary["parameters"]["k"]["ci95"]
    assert not plo < 1.2 < phi
    assert widened.summary["diagnostics"]["model_error"] > 1


def test_prior_predictive_band_covers_95_percent_of_new_measurements():
    # y_j = k x_j with k ~ N(m, s^2) and noise sd sigma: a new measurement under the prior is
    # N(m x_j, s^2 x_j^2 + sigma^2) exactly (a normal linear model). The band from 8 initial
    # runs must hold at least 95% of that, on average over outputs and 20 designs; the sample
    # quantiles used before held 0.72-0.88 (mean 0.79). The t factor is conservative for
    # scrambled Sobol' designs, whose mean and spread are steadier than for independent
    # draws (mean 0.985 measured); 0.995 bounds it so the check keeps its power.
    x = np.linspace(0.2, 2.0, 15)
    m, s, sigma = 1.0, 0.5, 0.3
    coverage = []
    for seed in range(20):
        spec = _spec(
            [{"name": "k", "prior": {"kind": "normal", "mean": m, "sd": s}}],
            [{"name": "y", "values": (1.3 * x).tolist(), "sd": sigma}],
            design={"initial_runs": 8, "batch_size": 4},
            seed=seed,
        )
        state = start(spec)
        theta = state.proposals[:8]
        runs = RunTable(theta, theta[:, :1] * x, np.zeros(8, bool), np.ones(8))
        band = refit(spec, state, runs).summary["prior_predictive"]["y"]
        spread = np.sqrt(s**2 * x**2 + sigma**2)
        inside = stats.norm.cdf(band["hi95"], m * x, spread) - stats.norm.cdf(
            band["lo95"], m * x, spread
        )
        coverage.append(inside.mean())
    assert 0.95 <= np.mean(coverage) <= 0.995


def test_prior_check_warns_only_when_prior_cannot_explain_data():
    x = np.linspace(0.0, 1.0, 10)
    y = 5.0 * x  # needs a slope near 5

    def run_first_round(low, high):
        spec = _spec(
            [{"name": "slope", "prior": {"kind": "uniform", "low": low, "high": high}}],
            [{"name": "y", "values": y.tolist(), "sd": 0.05}],
            design={"initial_runs": 8, "batch_size": 4},
            seed=1,
        )
        state = start(spec)
        theta = state.proposals[:8]
        runs = RunTable(theta, theta[:, :1] * x, np.zeros(8, bool), np.ones(8))
        return refit(spec, state, runs).summary

    bad = run_first_round(0.0, 1.0)
    good = run_first_round(0.0, 10.0)
    assert any("prior check" in w for w in bad["diagnostics"]["warnings"])
    assert not any("prior check" in w for w in good["diagnostics"]["warnings"])
    assert bad["prior_predictive"]["y"]["uncovered"] >= 9
    assert good["prior_predictive"]["y"]["uncovered"] == 0


def test_outputs_that_do_not_depend_on_the_parameters_give_back_the_prior():
    # A sensor the parameters do not reach: the likelihood is constant, so the posterior is
    # the prior, N(0, 1) and U(0, 2) (mean 1, sd 2 / sqrt(12)). The first refit used to
    # divide by zero: the whitened outputs were constant to the last bit, but a sum of
    # squares about their weighted mean kept 3e-62 of rounding. Tolerances as in test_rounds.
    spec = _spec(
        [
            {"name": "p0", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}},
            {"name": "p1", "prior": {"kind": "uniform", "low": 0.0, "high": 2.0}},
        ],
        [{"name": "y", "values": [1.1, 1.9], "sd": 0.1}],
        design={"batch_size": 4},
        seed=0,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"y": [1.0, 2.0]})
    pool = loop.state.pool
    sd = np.array([1.0, 2.0 / np.sqrt(12.0)])
    np.testing.assert_array_less(np.abs(pool.mean(0) - [0.0, 1.0]) / sd, MEAN_TOL_SD)
    np.testing.assert_allclose(pool.std(0), sd, rtol=SD_REL_TOL)
