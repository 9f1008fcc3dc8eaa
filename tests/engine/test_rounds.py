"""Statistical checks of the whole calibration loop against outside references."""

import dataclasses

import emcee
import numpy as np
import pytest
from scipy import integrate, stats
from scipy.spatial.distance import mahalanobis

from honing.engine import rounds
from honing.engine.diagnostics import (
    VALIDATION_TOLERANCE,
    gaussian_kl,
    kl_tolerance,
    unmet_conditions,
)
from honing.engine.errors import ConflictError, SpecError
from honing.engine.loop import CalibrationLoop
from honing.engine.rounds import (
    FINAL_ESS,
    FINAL_POOL,
    PROXIMITY_POWER,
    RETAIN_RADII,
    SCORED_RADII,
    STEERING_STEPS,
    _sorted_quantile,
    _to_reference,
    posterior_samples,
    proximity_weight,
    raise_budget,
    refit,
    retained_runs,
    start,
)
from honing.engine.sampling import MAX_POOL, MAX_STEPS, MIN_ESS, sample_posterior
from honing.engine.spec import CalibrationSpec
from honing.engine.state import state_from_bytes, state_to_bytes

# Monte Carlo error of a posterior mean from >= 1000 effective draws is <= 0.032 sd; of an sd,
# about 1/sqrt(2 ess) <= 0.022 relative. Tolerances below are about 4.5 such standard errors,
# plus what the reference itself contributes where it is sampled.
MEAN_TOL_SD = 0.15
SD_REL_TOL = 0.10


def _spec(parameters, observations, **extra):
    return CalibrationSpec.from_dict(
        {"name": "check", "parameters": parameters, "observations": observations, **extra}
    )


def _moments(loop):
    pool = loop.state.pool[:, : loop.spec.dim]
    return pool.mean(axis=0), pool.std(axis=0, ddof=1)


@pytest.mark.slow
def test_linear_gaussian_matches_conjugate_posterior():
    # y = A theta + e with independent normal priors: the posterior is Gaussian with
    # S_N^-1 = S_0^-1 + A^T A / sigma^2 and m_N = S_N (S_0^-1 m_0 + A^T y / sigma^2)
    # (Bishop, 2006, Pattern Recognition and Machine Learning, eqs. 3.50-3.51).
    rng = np.random.default_rng(11)
    d, n_out, sigma = 8, 24, 0.05
    a = rng.normal(size=(n_out, d))
    m0, s0 = rng.normal(size=d), rng.uniform(0.5, 2.0, size=d)
    truth = m0 + s0 * rng.normal(size=d)
    y = a @ truth + sigma * rng.normal(size=n_out)
    spec = _spec(
        [
            {"name": f"p{i}", "prior": {"kind": "normal", "mean": m0[i], "sd": s0[i]}}
            for i in range(d)
        ],
        [{"name": "y", "values": y.tolist(), "sd": sigma}],
        design={"initial_runs": 12, "batch_size": 6},
        budget={"max_runs": 30},
        seed=3,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"y": (a @ np.array([p[f"p{i}"] for i in range(d)])).tolist()})
    prec = np.diag(1 / s0**2) + a.T @ a / sigma**2
    cov = np.linalg.inv(prec)
    mean = cov @ (m0 / s0**2 + a.T @ y / sigma**2)
    got_mean, got_sd = _moments(loop)
    sd = np.sqrt(np.diag(cov))
    assert len(loop.finished) <= 30
    np.testing.assert_array_less(np.abs(got_mean - mean) / sd, MEAN_TOL_SD)
    np.testing.assert_allclose(got_sd, sd, rtol=SD_REL_TOL)
    # A Gaussian posterior's mode is its mean, and a linear model's surrogate is exact, so the
    # MAP lands on the conjugate mean up to the optimiser's stopping rule (a relative change
    # of f below about 2e-9, a few 1e-4 sd here); 0.01 sd is ample. The best of the 20,000
    # served draws alone lies about 0.3 sd per coordinate from it in 8 dimensions.
    summary = loop.state.summary["parameters"]
    got_map = np.array([summary[f"p{i}"]["map"] for i in range(d)])
    np.testing.assert_array_less(np.abs(got_map - mean) / sd, 0.01)
    # Correlations too: the sampled covariance against the conjugate one, in nats.
    pool = loop.state.pool
    assert gaussian_kl(pool.mean(0), np.cov(pool, rowvar=False), mean, cov) < 0.05
    # The predictive distribution of a new measurement of output j is
    # N(a_j^T m_N, sigma^2 + a_j^T S_N a_j) (Bishop, 2006, eqs. 3.58-3.59).
    band = loop.state.summary["predictive"]["y"]
    centre = a @ mean
    spread = np.sqrt(sigma**2 + np.einsum("ij,jk,ik->i", a, cov, a))
    edge = stats.norm.ppf(0.975) * spread
    # The 2.5% sample quantile of n = 400 independent draws has sd sqrt(p (1 - p) / n) /
    # phi(z_p) = 0.134 predictive sd (the asymptotic variance of a sample quantile, David and
    # Nagaraja, 2003, Order Statistics, sec. 10.3); 0.6 is 4.5 such errors. The width's
    # error per output is sqrt(2) times that over 2 z_p, 0.048 relative; averaged over 24
    # outputs it shrinks to 0.01-0.05 (the noise draws are independent across outputs, the
    # posterior draws shared), so 0.1 is at least twice the worst case, while a band
    # without the measurement noise would be half as wide here.
    np.testing.assert_array_less(np.abs(np.array(band["lo95"]) - (centre - edge)) / spread, 0.6)
    np.testing.assert_array_less(np.abs(np.array(band["hi95"]) - (centre + edge)) / spread, 0.6)
    width = (np.array(band["hi95"]) - np.array(band["lo95"])) / (2 * edge)
    assert abs(width.mean() - 1.0) < 0.1
    # The band's centre is a_j^T times the mean of 400 pool draws: off from a_j^T m_N by
    # their Monte Carlo error (sd sqrt(a_j^T S_N a_j / 400); 4.5 such errors) plus a_j^T
    # times the pool mean's error, at most MEAN_TOL_SD posterior sd per coordinate (checked
    # above).
    post = np.sqrt(np.einsum("ij,jk,ik->i", a, cov, a))
    tolerance = 4.5 * post / np.sqrt(400) + MEAN_TOL_SD * np.abs(a) @ sd
    np.testing.assert_array_less(np.abs(np.array(band["mean"]) - centre), tolerance)


def _decay(theta, t):
    return np.exp(-theta * t) + 0.5 * np.exp(-3 * theta * t)


@pytest.mark.slow
@pytest.mark.parametrize("sigma", [0.05, 0.005, 0.0005])
def test_nonlinear_1d_matches_quadrature(sigma):
    t = np.linspace(0.1, 2.0, 12)
    rng = np.random.default_rng(5)
    y = _decay(1.3, t) + sigma * rng.normal(size=t.size)
    spec = _spec(
        [{"name": "rate", "prior": {"kind": "uniform", "low": 0.2, "high": 3.0}}],
        [{"name": "signal", "values": y.tolist(), "sd": sigma, "coords": t.tolist()}],
        design={"initial_runs": 8, "batch_size": 4},
        budget={"max_runs": 40},
        seed=1,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"signal": _decay(p["rate"], t).tolist()})
    # Reference: the posterior on a dense grid, integrated with Simpson's rule
    # (scipy.integrate.simpson); the grid is refined around the mode so the narrowest case
    # has thousands of points across its width.
    coarse = np.linspace(0.2, 3.0, 20001)

    def loglik(th):
        return -0.5 * np.sum((_decay(th[:, None], t) - y) ** 2, axis=1) / sigma**2

    mode = coarse[np.argmax(loglik(coarse))]
    width = 12 * sigma / np.sqrt(np.sum((t * np.exp(-1.3 * t)) ** 2))
    grid = np.linspace(max(0.2, mode - width), min(3.0, mode + width), 40001)
    dens = np.exp(loglik(grid) - loglik(grid).max())
    z = integrate.simpson(dens, x=grid)
    mean = integrate.simpson(grid * dens, x=grid) / z
    sd = np.sqrt(integrate.simpson((grid - mean) ** 2 * dens, x=grid) / z)
    got_mean, got_sd = _moments(loop)
    assert len(loop.finished) <= 40
    assert abs(got_mean[0] - mean) / sd < MEAN_TOL_SD
    assert got_sd[0] == pytest.approx(sd, rel=SD_REL_TOL)


@pytest.mark.slow
def test_curved_2d_posterior_matches_emcee_on_true_model():
    def model(th):
        th = np.atleast_2d(th)
        return np.column_stack([th[:, 0] + th[:, 1], th[:, 0] * th[:, 1], th[:, 0] ** 2])

    sigma = np.array([0.3, 0.3, 0.6])
    y = np.array([2.0, 0.8, 1.4])
    spec = _spec(
        [
            {"name": "a", "prior": {"kind": "normal", "mean": 1.0, "sd": 1.0}},
            {"name": "b", "prior": {"kind": "uniform", "low": -2.0, "high": 3.0}},
        ],
        [{"name": "obs", "values": y.tolist(), "sd": sigma.tolist()}],
        design={"initial_runs": 16, "batch_size": 8},
        budget={"max_runs": 120},
        seed=2,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"obs": model([p["a"], p["b"]])[0].tolist()})

    # Reference: emcee run directly on the true model, long enough for >> 50 tau.
    def log_prob(th):
        lp = -0.5 * (th[:, 0] - 1.0) ** 2 - 0.5 * np.sum(((model(th) - y) / sigma) ** 2, axis=1)
        return np.where((th[:, 1] > -2) & (th[:, 1] < 3), lp, -np.inf)

    ref_rng = np.random.default_rng(7)
    start = np.column_stack([ref_rng.normal(1, 0.1, 64), ref_rng.uniform(0.5, 1.5, 64)])
    sampler = emcee.EnsembleSampler(64, 2, log_prob, vectorize=True)
    sampler.random_state = np.random.RandomState(7).get_state()
    sampler.run_mcmc(start, 6000)
    tau = sampler.get_autocorr_time(discard=1000)
    ref = sampler.get_chain(discard=1000, flat=True, thin=max(1, int(tau.max() / 2)))
    ref_mean, ref_sd = ref.mean(0), ref.std(0, ddof=1)
    got_mean, got_sd = _moments(loop)
    # Both sides are sampled here (reference ess ~ 64 * 5000 / tau, in the thousands), so
    # the tolerance adds their errors in quadrature: still under MEAN_TOL_SD * sqrt(2).
    np.testing.assert_array_less(np.abs(got_mean - ref_mean) / ref_sd, MEAN_TOL_SD * np.sqrt(2))
    np.testing.assert_allclose(got_sd, ref_sd, rtol=SD_REL_TOL * np.sqrt(2))


def _small_loop(seed=4):
    t = np.linspace(0.0, 1.0, 5)
    spec = _spec(
        [
            {"name": "k", "prior": {"kind": "lognormal", "median": 1.0, "sigma_log": 0.5}},
            {"name": "c", "prior": {"kind": "uniform", "low": 0.0, "high": 2.0}},
        ],
        [{"name": "y", "values": (np.exp(-1.2 * t) + 0.8).tolist(), "sd": 0.05}],
        design={"initial_runs": 10, "batch_size": 5},
        budget={"max_runs": 30},
        seed=seed,
    )
    return spec, (lambda p: {"y": (np.exp(-p["k"] * t) + p["c"]).tolist()})


def test_same_spec_and_results_give_same_proposals():
    spec, sim = _small_loop()
    first, second = CalibrationLoop(spec), CalibrationLoop(spec)
    for loop in (first, second):
        for _ in range(3):
            for p in loop.ask(5):
                loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    assert first.state.round == second.state.round >= 1
    np.testing.assert_array_equal(first.state.proposals, second.state.proposals)
    np.testing.assert_array_equal(first.state.pool, second.state.pool)


def test_state_round_trip_then_continue_identically():
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    for p in loop.ask(10):
        loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    assert loop.state.round == 1
    blob = state_to_bytes(loop.state)
    restored = state_from_bytes(blob)
    assert state_to_bytes(restored) == blob
    for p in loop.ask(5):
        loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    runs = loop.runs()
    a = refit(spec, state_from_bytes(blob), runs)
    b = refit(spec, restored, runs)
    np.testing.assert_array_equal(a.proposals, b.proposals)
    np.testing.assert_array_equal(a.predictions, b.predictions)
    assert a.summary == b.summary


def test_duplicate_result_is_noop_and_conflict_raises():
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    p = loop.ask(1)[0]
    outputs = sim(spec.parameters_dict(p.theta))
    first = loop.tell(p.point_id, outputs=outputs)
    assert loop.tell(p.point_id, outputs=outputs) == first
    with pytest.raises(ConflictError):
        loop.tell(p.point_id, error="crashed")
    assert len(loop.finished) == 1


def test_budget_is_never_exceeded_and_reported():
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    loop.run(lambda p: sim(p), workers=3)
    assert len(loop.proposals) <= spec.max_runs
    assert loop.status in ("converged", "budget_exhausted")
    if loop.status == "budget_exhausted":
        assert len(loop.finished) == spec.max_runs


def test_only_the_stopping_round_samples_to_the_final_effective_size():
    # Rounds that go on steer the next batch from at most MAX_POOL draws; the round that
    # stops the calibration runs its chain on to FINAL_ESS and serves up to FINAL_POOL draws,
    # and its stored posterior moments are those of the served draws.
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    steering = []
    while loop.status == "collecting":
        for p in loop.ask(5):
            loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
        if loop.status == "collecting" and loop.state.round:
            steering.append(loop.state.pool.shape[0])
    assert steering and max(steering) <= MAX_POOL
    diagnostics = loop.state.summary["diagnostics"]
    assert diagnostics["ess_min"] >= FINAL_ESS, diagnostics["warnings"]
    assert MAX_POOL < loop.state.pool.shape[0] <= FINAL_POOL
    served = _to_reference(spec, loop.state.pool[:, : spec.dim])
    np.testing.assert_allclose(loop.state.arrays["post_mean"], served.mean(axis=0))


def test_steering_chains_have_their_cap_and_the_change_test_their_ess(monkeypatch):
    # A round's first chain is capped at STEERING_STEPS until the surrogate validates, and
    # its ESS sets the change tolerance in the history; the stopping round's second chain
    # (the one served) keeps the sampler's own cap and asks for FINAL_ESS.
    calls = []

    def recording(*args, **kwargs):
        result = sample_posterior(*args, **kwargs)
        calls.append((kwargs, result))
        return result

    monkeypatch.setattr(rounds, "sample_posterior", recording)
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    loop.run(lambda p: sim(p))
    assert loop.status in ("converged", "budget_exhausted")
    *steering, (served, result) = calls
    assert len(steering) == loop.state.round
    caps = []
    for (kwargs, _), entry in zip(steering, loop.state.history, strict=True):
        validated = (entry["validation_error"] or np.inf) < VALIDATION_TOLERANCE
        caps.append(kwargs.get("max_steps", MAX_STEPS))
        assert caps[-1] == (MAX_STEPS if validated else STEERING_STEPS)
        assert kwargs.get("min_ess", MIN_ESS) == MIN_ESS
    assert set(caps) == {MAX_STEPS, STEERING_STEPS}
    assert served.get("max_steps", MAX_STEPS) == MAX_STEPS
    assert served.get("min_ess", MIN_ESS) == FINAL_ESS
    last_steering = steering[-1][1]
    expected = kl_tolerance(spec.dim, float(last_steering.ess.min()))
    assert loop.state.history[-1]["kl_tolerance"] == pytest.approx(expected, rel=1e-12)
    assert loop.state.summary["diagnostics"]["ess_min"] == pytest.approx(result.ess.min())


def test_a_budget_spent_before_convergence_is_explained():
    # Two rounds (10 initial runs, one batch of 5): round 1, the first fit, had no earlier
    # surrogate to check and no earlier posterior to compare with, so the rule could not hold;
    # the served warning says so. The same problem with room to converge has no such warning.
    spec, sim = _small_loop()
    short = CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 15}})
    loop = CalibrationLoop(short)
    loop.run(sim)
    assert loop.status == "budget_exhausted" and loop.state.round == 2
    warnings = loop.state.summary["diagnostics"]["warnings"]
    (budget,) = [w for w in warnings if w.startswith("run budget spent before convergence")]
    assert "round 1 had no new runs that an earlier surrogate had predicted" in budget
    assert "round 1 had no earlier posterior to compare with" in budget
    # Round 2 passed every check, so one more passing round would do: one batch of 5.
    assert "at least 20 runs, a batch for the round the stop rule still needs" in budget
    assert "round 2" not in budget  # its surrogate validated and its change was measured
    # The same, structured: the reasons the warning joins, and the budget it names.
    diagnostics = loop.state.summary["diagnostics"]
    assert diagnostics["suggested_max_runs"] == 20
    assert diagnostics["unmet_conditions"] == unmet_conditions(loop.state.history)
    assert "; ".join(diagnostics["unmet_conditions"]) in budget
    roomy = CalibrationLoop(spec)
    roomy.run(sim)
    assert roomy.status == "converged"
    diagnostics = roomy.state.summary["diagnostics"]
    assert not any("run budget" in w for w in diagnostics["warnings"])
    assert diagnostics["unmet_conditions"] == [] and diagnostics["suggested_max_runs"] is None


def test_a_raised_budget_goes_on_from_where_the_old_one_stopped():
    spec, sim = _small_loop()
    loop = CalibrationLoop(
        CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 15}})
    )
    loop.run(sim)
    assert loop.status == "budget_exhausted" and loop.ask(5) == []
    before = loop.state
    loop.raise_budget(25)
    assert loop.spec.max_runs == 25 and loop.status == "collecting"
    assert loop.state.summary["status"] == "collecting"
    assert not any("budget" in w for w in loop.state.summary["diagnostics"]["warnings"])
    # The same posterior and proposals: the next runs are the batch the last round drew.
    np.testing.assert_array_equal(loop.state.pool, before.pool)
    batch = loop.ask(5)
    np.testing.assert_array_equal([p.theta for p in batch], before.proposals[:5])
    for p in batch:
        loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    loop.run(sim)
    assert loop.state.round >= 3 and len(loop.finished) <= 25
    assert loop.state.history[:2] == before.history


@pytest.mark.parametrize("max_runs", [14, 10, 100_001, 20.5, True])
def test_a_budget_that_is_not_larger_is_refused_and_nothing_changes(max_runs):
    spec, sim = _small_loop()
    loop = CalibrationLoop(
        CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 15}})
    )
    loop.run(sim)
    state = loop.state
    with pytest.raises(SpecError) as caught:
        loop.raise_budget(max_runs)
    assert caught.value.errors[0]["loc"] == ["budget", "max_runs"]
    assert loop.state is state and loop.spec.max_runs == 15


def test_the_current_budget_again_changes_nothing():
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    loop.run(sim)
    state = loop.state
    loop.raise_budget(spec.max_runs)  # even once converged: a repeated request is harmless
    assert loop.state is state and loop.spec is spec


def test_a_budget_must_leave_room_beyond_the_runs_already_spent():
    # Imported runs count towards the budget, so more can be spent than a budget allows.
    spec, sim = _small_loop()
    short = CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 15}})
    loop = CalibrationLoop(short)
    loop.run(sim)
    with pytest.raises(SpecError, match="than the 20 runs spent or out"):
        raise_budget(short, loop.state, 20, spent=20)
    larger, reopened = raise_budget(short, loop.state, 21, spent=20)
    assert larger.max_runs == 21 and reopened.status == "collecting"


def test_two_successful_runs_wait_for_a_third_before_the_first_fit():
    # The sparse fit needs three runs: with two, the round keeps the prior and says so.
    spec, sim = _small_loop()
    loop = CalibrationLoop(
        CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 11}})
    )
    for i, p in enumerate(loop.ask(10)):
        loop.tell(
            p.point_id,
            **({"outputs": sim(spec.parameters_dict(p.theta))} if i < 2 else {"error": "x"}),
        )
    assert loop.state.round == 0
    assert loop.state.summary["diagnostics"]["warnings"][0].startswith("fewer than 3 successful")
    loop.raise_budget(12)
    for p in loop.ask(1):
        loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    assert loop.state.round == 0  # 11 runs, 3 successful: not yet a batch since round 0
    (p,) = loop.ask(1)
    loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
    assert loop.state.round == 1 and loop.status == "budget_exhausted"


def test_a_converged_calibration_cannot_be_reopened():
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    loop.run(sim)
    assert loop.status == "converged"
    with pytest.raises(ConflictError, match="has converged"):
        loop.raise_budget(100)
    assert loop.spec.max_runs == spec.max_runs


def test_a_budget_spent_on_failed_runs_is_explained():
    # No run ever succeeds: no surrogate was fitted, and the warning says so beside the
    # fit's own.
    spec, sim = _small_loop()
    short = CalibrationSpec.from_dict({**spec.to_dict(), "budget": {"max_runs": 12}})
    loop = CalibrationLoop(short)
    while loop.status == "collecting":
        for p in loop.ask(4):
            loop.tell(p.point_id, error="solver diverged")
    assert loop.status == "budget_exhausted" and loop.state.round == 0
    warnings = loop.state.summary["diagnostics"]["warnings"]
    assert warnings[0].startswith("fewer than 3 successful runs")
    assert warnings[1].startswith("run budget spent before convergence: only 0 round(s) fitted")
    # Nothing fitted yet: 12 spent, a whole initial design (10), then two batches of 5.
    assert "raise the budget to at least 32 runs" in warnings[1]
    assert loop.state.summary["diagnostics"]["suggested_max_runs"] == 32
    # Raised to that, with a simulator that now works, the calibration fits: its
    # prior-predictive band comes from the first successful runs, as none of the initial
    # design succeeded.
    loop.raise_budget(32)
    assert loop.state.summary["diagnostics"]["suggested_max_runs"] is None
    loop.run(sim)
    assert loop.state.round >= 2 and len(loop.finished) <= 32
    band = loop.state.summary["prior_predictive"]["y"]
    assert np.all(np.array(band["lo95"]) < np.array(band["hi95"]))


def test_rounds_whose_chain_stopped_at_its_cap_never_converge(monkeypatch):
    # Every round's first chain asked for an ESS it cannot reach stops at its (shortened) cap
    # with a warning: no such round counts towards convergence, so the calibration spends its
    # budget, and the posterior it serves comes from a final chain that met its rule,
    # without the first chains' warnings.
    def unreachable(*args, **kwargs):
        if "min_ess" not in kwargs:
            kwargs.update(min_ess=10**9, max_steps=400)
        return sample_posterior(*args, **kwargs)

    monkeypatch.setattr(rounds, "sample_posterior", unreachable)
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    loop.run(lambda p: sim(p))
    assert loop.status == "budget_exhausted"
    assert all(h["chain_complete"] is False for h in loop.state.history)
    diagnostics = loop.state.summary["diagnostics"]
    assert diagnostics["ess_min"] >= FINAL_ESS
    assert not any("chain stopped" in w for w in diagnostics["warnings"])
    # The user is told why the budget ran out: the rounds' chains, not the surrogate.
    (budget,) = [w for w in diagnostics["warnings"] if w.startswith("run budget spent")]
    assert f"round {loop.state.round}'s sampler chain ran to its step cap" in budget


def test_posterior_samples_span_the_whole_pool():
    # The pool is in chain order (step by step, all walkers each step): a sample of it must
    # reach from its first rows to its last, not stop at the chain's earliest steps.
    spec, _ = _small_loop()
    state = dataclasses.replace(start(spec), pool=np.repeat(np.arange(100.0)[:, None], 2, 1))
    names, few = posterior_samples(spec, state, 5)
    assert names == ["k", "c"]
    np.testing.assert_array_equal(few[:, 0], [0, 25, 50, 74, 99])
    np.testing.assert_array_equal(posterior_samples(spec, state, 500)[1], state.pool)


def test_runs_scored_are_the_retained_runs_within_three_radii():
    # Recomputed from the previous round's posterior fit with the public weight and retention
    # rules: a run d bulk radii out has weight d^-4, so within 3 radii means >= 3^-4.
    spec, sim = _small_loop()
    loop = CalibrationLoop(spec)
    checked = 0
    while loop.status == "collecting":
        previous = loop.state
        for p in loop.ask(5):
            loop.tell(p.point_id, outputs=sim(spec.parameters_dict(p.theta)))
        if loop.state.round == previous.round or "post_mean" not in previous.arrays:
            continue
        runs = loop.runs()
        xi = _to_reference(spec, runs.theta)
        near = proximity_weight(previous.arrays["post_mean"], previous.arrays["post_cov"], xi)
        kept = retained_runs(spec, ~runs.failed, near)
        diagnostics = loop.state.summary["diagnostics"]
        expected = int(np.count_nonzero(near[kept] >= SCORED_RADII ** (-2 * PROXIMITY_POWER)))
        assert diagnostics["runs_retained"] == kept.size
        assert diagnostics["runs_scored"] == expected
        checked += expected < kept.size  # rounds where some retained runs are not scored
    assert checked >= 1


def test_proximity_weight_follows_the_previous_posterior():
    # Squared Mahalanobis distances computed independently with scipy.spatial.distance, and the
    # 99% radius of a 3-d Gaussian from the chi-square quantile (11.345, the 0.01 point for
    # 3 degrees of freedom in the handbook table, Abramowitz and Stegun 1964, table 26.8;
    # quoted from memory): weight 1 inside, (q / d^2)^2 outside.

    rng = np.random.default_rng(5)
    mean = np.array([0.5, -1.0, 2.0])
    root = rng.normal(size=(3, 3))
    cov = root @ root.T + 0.1 * np.eye(3)
    xi = mean + rng.normal(size=(200, 3)) @ np.linalg.cholesky(cov).T * 4.0
    found = proximity_weight(mean, cov, xi)
    d2 = np.array([mahalanobis(x, mean, np.linalg.inv(cov)) ** 2 for x in xi])
    q = 11.345
    inside = d2 < q - 1e-3
    outside = d2 > q + 1e-3
    assert inside.sum() > 20 and outside.sum() > 20
    np.testing.assert_array_equal(found[inside], 1.0)
    # 2e-4 relative: the table gives q to five figures, and the weight is its square.
    np.testing.assert_allclose(found[outside], (q / d2[outside]) ** 2, rtol=2e-4)


def test_retained_runs_are_the_newest_and_the_old_ones_not_far_out():
    # 40 runs, half retained by age (20 newest), runs 3 and 7 failed: the fit keeps the
    # successful newest half and, of the older runs, those whose proximity weight shows
    # them within RETAIN_RADII bulk radii (weight (1 / radii^2)^k at that distance).
    spec = _spec(
        [{"name": "a", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}}],
        [{"name": "y", "values": [0.0], "sd": 1.0}],
        design={"initial_runs": 10},
        surrogate={"retain_fraction": 0.5},
    )
    edge = RETAIN_RADII ** (-2 * PROXIMITY_POWER)
    ok = np.ones(40, dtype=bool)
    ok[[3, 7]] = False
    nearness = np.full(40, 0.5 * edge)
    nearness[[1, 3, 5, 30]] = 1.0
    nearness[8] = 2.0 * edge
    kept = retained_runs(spec, ok, nearness)
    newest = np.arange(40)[ok][-19:]  # ceil(0.5 * 38) successful runs
    np.testing.assert_array_equal(kept, np.concatenate([[1, 5, 8], newest]))


@pytest.mark.parametrize("n", [1, 2, 3, 40, 399, 400, 401])
def test_band_quantiles_equal_numpy_quantile(n):
    # Reference: numpy.quantile's default (linear) method on the same draws.
    rows = np.random.default_rng(n).normal(size=(7, n))
    ordered = np.sort(rows, axis=1)
    for q in (0.0, 0.025, 0.5, 0.975, 1.0):
        np.testing.assert_allclose(
            _sorted_quantile(ordered, q), np.quantile(rows, q, axis=1), rtol=0, atol=1e-14
        )


@pytest.mark.slow
@pytest.mark.parametrize("seed", [0, 1])
def test_two_separated_modes_are_both_found_and_weighted(seed):
    # y_i = theta^2 s_i cannot tell theta from -theta: with theta ~ U(-2, 2) and data from
    # theta = 1 the posterior has two modes near -1 and 1. Reference: the posterior on a
    # dense grid by Simpson's rule (scipy.integrate.simpson). A sampler started in one mode
    # with local moves put every draw there (share 1.0 against 0.5), and the calibration
    # still converged without a word.
    s = np.array([0.5, 1.0, 1.5])
    y = 1.0 * s + np.array([0.21, -0.13, 0.3])
    spec = _spec(
        [{"name": "theta", "prior": {"kind": "uniform", "low": -2.0, "high": 2.0}}],
        [{"name": "y", "values": y.tolist(), "sd": 0.3}],
        design={"initial_runs": 8, "batch_size": 8},
        budget={"max_runs": 120},
        seed=seed,
    )
    loop = CalibrationLoop(spec)
    loop.run(lambda p: {"y": (p["theta"] ** 2 * s).tolist()})
    grid = np.linspace(-2.0, 2.0, 400_001)
    logp = -0.5 * np.sum(((grid[:, None] ** 2 * s - y) / 0.3) ** 2, axis=1)
    dens = np.exp(logp - logp.max())
    z = integrate.simpson(dens, x=grid)
    upper = grid > 0
    share = integrate.simpson(dens[upper], x=grid[upper]) / z
    mode_mean = integrate.simpson(grid[upper] * dens[upper], x=grid[upper]) / (share * z)
    mode_sd = np.sqrt(
        integrate.simpson((grid[upper] - mode_mean) ** 2 * dens[upper], x=grid[upper]) / (share * z)
    )
    theta = loop.state.pool[:, 0]
    ess = loop.state.summary["diagnostics"]["ess_min"]
    # The share of a proportion has sd sqrt(p (1 - p) / ess); 5 such errors. Within a mode,
    # the usual mean and sd tolerances.
    assert abs(np.mean(theta > 0) - share) < 5 * np.sqrt(share * (1 - share) / ess)
    assert abs(theta[theta > 0].mean() - mode_mean) / mode_sd < MEAN_TOL_SD
    assert theta[theta > 0].std() == pytest.approx(mode_sd, rel=SD_REL_TOL)
    assert abs(-theta[theta < 0].mean() - mode_mean) / mode_sd < MEAN_TOL_SD
    warnings = loop.state.summary["diagnostics"]["warnings"]
    assert any("2 separated modes" in w for w in warnings), warnings
