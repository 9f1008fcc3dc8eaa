"""One calibration round: from every finished run to a new surrogate, posterior and batch.

`start` opens a calibration (prior summary and the space-filling initial design); `refit`
turns the finished runs into the next state. Both are pure functions of the spec, the previous
state and the runs: the service stores what they return, and the same inputs give the same
state bit for bit.

The round, in order:

1. keep the newest `retain_fraction` of successful runs (at least `retained_floor`) and the
   older ones not far from the previous posterior's bulk, each weighted by its trust relative to
   the typical prediction error and by its proximity to the previous posterior;
2. score the previous surrogate on the runs finished since it was fitted (validation error);
3. fit the output reduction and a sparse expansion per component in a frame local to the
   retained runs, its terms chosen by the leave-one-out errors of the runs near the previous
   posterior;
4. sample the surrogate posterior with emcee, the likelihood's variance widened by the
   surrogate's honest error, and multiplied by the learned probability that the simulator
   succeeds, the chain capped at `STEERING_STEPS` while the surrogate is not validated;
5. compare with the previous posterior and decide whether the calibration stops; if it does,
   sample on to `FINAL_ESS` for the posterior it serves;
6. summarise, and draw the next batch from the pool.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
from scipy import stats

from honing.engine.design import initial_design, select_batch
from honing.engine.diagnostics import (
    VALIDATION_TOLERANCE,
    converged,
    fit_trust,
    gaussian_kl,
    kl_tolerance,
    marginal_kl,
    parameter_summary,
    rounds_to_go,
    trust_from_error,
    unmet_conditions,
)
from honing.engine.errors import ConflictError, SpecError
from honing.engine.failures import FailureModel
from honing.engine.likelihood import log_likelihood, noise_scale_draws, whiten
from honing.engine.priors import reference_logpdf
from honing.engine.sampling import (
    MAX_STEPS,
    ChainResult,
    Modes,
    find_mode,
    find_modes,
    n_walkers,
    sample_posterior,
)
from honing.engine.spec import LIMITS, NOISE_SCALE_NAME, CalibrationSpec
from honing.engine.state import EngineState, RunTable
from honing.engine.surrogate import Frame, Surrogate, fit_surrogate

__all__ = [
    "posterior_samples",
    "prediction_error",
    "proximity_weight",
    "raise_budget",
    "refit",
    "refit_due",
    "retained_floor",
    "retained_runs",
    "start",
    "suggested_budget",
    "trust_index",
]

#: Probability of the previous posterior's Gaussian region inside which runs keep their full
#: fit weight (`proximity_weight`).
BULK_PROBABILITY = 0.99
#: Power of the proximity weight ``(q / d^2)^k`` beyond that region. Above 1, so that a far
#: run's share of the weighted second moments (``~ d^(2 - 2k)``) vanishes with its distance;
#: with k = 1 every run far out adds about ``q`` to the frame's spread whatever its distance,
#: and a few hundred early runs set the frame. Measured on B3 at delta = 8, refitting the
#: runs of finished calibrations: k = 1.5 and 2 alike; k = 1 (4 seeds) 2.6 times and k = 3
#: (2 seeds) twice their surrogate error.
PROXIMITY_POWER = 2
#: Older runs are retained out to this many bulk radii from the previous posterior.
RETAIN_RADII = 100.0
#: Runs within this many bulk radii of the previous posterior score the surrogate's terms and
#: degree by their leave-one-out errors; runs beyond are fitted at their low weight but not
#: scored (`honing.engine.regression.fit_shared_sparse`). On B2 at weak noise (seed 5) one
#: initial run 7 radii out, at weight 4e-4, held the fit at 3 terms of degree 2 (relative
#: error 0.156 at the reference posterior's draws); scored within 3 radii, the same runs gave
#: 8 terms of degree 8 (0.0008). Refitting the last round of 4 finished B3 delta = 8
#: calibrations changed nothing; over whole calibrations, where it also acts on the early
#: rounds, the error at the stop went from 0.0043-0.0146 to 0.0040-0.0085 (12 seeds).
SCORED_RADII = 3.0
#: Effective sample size of the chain whose draws a calibration serves once it stops
#: (converged or out of budget), and the most draws kept from it. Rounds that go on only
#: steer the next batch and need less (`honing.engine.sampling.MIN_ESS`); what is served last
#: should have Monte Carlo errors well below its surrogate's: about 0.01 posterior sd on a
#: mean, and stable 95% interval limits (an effective size of 10,000 is the usual advice for
#: those; Kruschke, Doing Bayesian Data Analysis, 2nd ed., 2015, ch. 7, quoted from memory).
#: Thinned by half an autocorrelation time, 20,000 draws hold about that effective size. The
#: chain needs about 5 tau + 10,000 tau / 64 steps, within `sampling.MAX_STEPS` for tau up to
#: about 120 (last rounds on B3 at delta = 8: tau 10-13); beyond, it stops short and warns.
FINAL_ESS = 10_000
FINAL_POOL = 20_000
#: Longest chain of a round whose surrogate has not validated on the runs since the last fit
#: (validation error at or above `diagnostics.VALIDATION_TOLERANCE`, or none yet): such a
#: round cannot count towards convergence, and its draws only steer the next batch. Rounds
#: with a validated surrogate keep `sampling.MAX_STEPS`. A round whose chain stops at its
#: cap does not count towards convergence (`diagnostics.converged`): its ESS, and so its
#: change tolerance, is rough. Early rounds on B3 at delta = 8 ran 8,000-20,000 steps (tau
#: 160-650, acceptance 0.06-0.10), 25-47 s each, while the surrogate was poor. Over 6 seeds,
#: both variants run side by side on one 2-core machine, a cap of 4,000 on every round cut
#: whole calibrations to 0.44-0.87 of their time (median 0.61), stopped them at 320-384
#: runs (median 352) against 320-352 (median 352), and gave surrogate errors at the stop of
#: 0.0048-0.0100 (median 0.0071) against 0.0059-0.0120 (median 0.0093). Late rounds there
#: run 600-2,300 steps, so sparing validated rounds the cap changes nothing on B3.
STEERING_STEPS = 4000
#: Prior draws behind the round-0 summary.
PRIOR_DRAWS = 4000
#: Posterior draws pushed through the surrogate for the predictive bands.
PREDICTIVE_DRAWS = 400
#: Share of a channel's data points outside the prior-predictive 95% band above which the
#: prior is reported as unable to explain the data. 5% are expected outside by chance, more
#: when the band's edges are order statistics of a few tens of initial runs (the extreme
#: ones of 30 runs cover only about 94% between them), and noise adds a few near-edge points:
#: a quarter outside is well past all of that, while a prior that cannot explain the data
#: typically leaves most points outside.
PRIOR_MISS_SHARE = 0.25
#: Share of the draws a mode must hold to be named in the warning about separated modes.
MODE_SHARE_WARNED = 0.01
#: Fewest successful runs a fit needs: the sparse regression's leave-one-out errors need
#: three samples of positive weight (`honing.engine.regression.fit_shared_sparse`).
MIN_FIT_RUNS = 3
#: How the warning of a calibration that spent its budget before converging begins.
_BUDGET_WARNING = "run budget spent before convergence: "


def proximity_weight(mean: np.ndarray, cov: np.ndarray, xi: np.ndarray) -> np.ndarray:
    """Fit weight of runs by where they lie against the previous posterior.

    1 inside the `BULK_PROBABILITY` region of the previous posterior's Gaussian fit (squared
    Mahalanobis distance under the chi-square quantile ``q``), ``(q / d^2)^k`` beyond it
    (`PROXIMITY_POWER`). The surrogate only has to be accurate where the posterior has mass:
    early design points and defensive draws far out still tether the fit against wild
    extrapolation, but no longer take its terms or its frame from the bulk.

    Parameters
    ----------
    mean : ndarray, shape (dim,)
    cov : ndarray, shape (dim, dim)
        The previous posterior's Gaussian fit in reference coordinates.
    xi : ndarray, shape (n, dim)
        Runs in reference coordinates.

    Returns
    -------
    ndarray, shape (n,)
    """
    try:
        chol = np.linalg.cholesky(cov)  # `_cov` already adds a jitter
    except np.linalg.LinAlgError:  # a degenerate fit says nothing about nearness
        return np.ones(xi.shape[0])
    d2 = np.sum(np.linalg.solve(chol, (xi - mean).T) ** 2, axis=0)
    bulk = float(stats.chi2.ppf(BULK_PROBABILITY, mean.size))
    return np.minimum(1.0, bulk / np.maximum(d2, 1e-300)) ** PROXIMITY_POWER


def retained_runs(spec: CalibrationSpec, ok: np.ndarray, nearness: np.ndarray) -> np.ndarray:
    """Indices of the runs a fit keeps, in completion order.

    The newest `retain_fraction` of successful runs (at least `retained_floor`), and every
    older successful run within `RETAIN_RADII` radii of the previous posterior's bulk (see
    `proximity_weight`): a run where the posterior has its mass informs the fit as much as
    a new one there, however early it ran, and runs beyond it but not too far out keep
    the fit from extrapolating wildly at little weight; runs farther than that, such as the
    initial design once a narrow posterior has left it, only add rows whose huge polynomial
    values a low weight cannot tame.

    Parameters
    ----------
    spec : CalibrationSpec
    ok : ndarray of bool, shape (n_runs,)
        Successful runs.
    nearness : ndarray, shape (n_runs,)
        `proximity_weight` of every run (all 1 before the first fit).

    Returns
    -------
    ndarray of int
    """
    order = np.flatnonzero(ok)
    keep = max(retained_floor(spec), int(np.ceil(spec.retain_fraction * order.size)))
    newest = np.zeros(ok.shape, dtype=bool)
    newest[order[-keep:]] = True
    return np.flatnonzero(newest | (ok & _within_radii(nearness, RETAIN_RADII)))


def _within_radii(nearness: np.ndarray, radii: float) -> np.ndarray:
    """Whether runs lie within ``radii`` bulk radii of the previous posterior, from their
    `proximity_weight`: ``(q / d^2)^k`` is ``radii^(-2k)`` at ``d^2 = radii^2 q``."""
    return nearness >= radii ** (-2 * PROXIMITY_POWER)


def retained_floor(spec: CalibrationSpec) -> int:
    """Fewest successful runs a fit keeps: the initial design size, and two per parameter."""
    return max(spec.initial_runs, 2 * (spec.dim + 1))


def start(spec: CalibrationSpec) -> EngineState:
    """Round 0: the prior's summary and the initial design, with one batch of spares.

    Parameters
    ----------
    spec : CalibrationSpec

    Returns
    -------
    EngineState
    """
    rng = np.random.Generator(np.random.PCG64(spec.seed))
    families = [p.prior.family for p in spec.parameters]
    xi = initial_design(families, spec.initial_runs + spec.batch_size, rng)
    proposals = _to_physical(spec, xi)
    prior = np.column_stack([p.prior.sample(rng, PRIOR_DRAWS) for p in spec.parameters])
    # The prior's MAP: its highest-density draw, as the posterior's is (a flat prior has no
    # unique mode; any draw is one).
    mode = prior[int(np.argmax(_physical_log_prior(spec, prior)))]
    summary = {
        "round": 0,
        "runs_completed": 0,
        "status": "collecting",
        "parameters": {
            p.name: parameter_summary(prior[:, i], float(mode[i]), p.prior.sd)
            for i, p in enumerate(spec.parameters)
        },
        "correlation": np.corrcoef(prior, rowvar=False).reshape(spec.dim, spec.dim).tolist(),
        "diagnostics": _empty_diagnostics(),
        "predictive": {},
    }
    if spec.noise_scale == "estimate":
        summary["parameters"][NOISE_SCALE_NAME] = None
    return EngineState(
        round=0,
        status="collecting",
        runs_at_fit=0,
        proposals=proposals,
        predictions=np.zeros((0, spec.output_size), dtype=np.float32),
        pool=prior,
        summary=summary,
        history=[],
        rng=rng.bit_generator.state,
    )


def refit_due(
    spec: CalibrationSpec, state: EngineState, finished: int, outstanding: int, queued: int
) -> bool:
    """Whether enough has finished since the last fit to fit again.

    A round waits for a batch's worth of new results (the whole initial design before the
    first fit), or for every outstanding run once nothing is left to hand out.
    """
    if state.status not in ("collecting",):
        return False
    new = finished - state.runs_at_fit
    target = spec.initial_runs if state.round == 0 else spec.batch_size
    if new <= 0:
        return False
    return new >= target or (outstanding == 0 and queued == 0) or finished >= spec.max_runs


def prediction_error(
    spec: CalibrationSpec, predicted: np.ndarray | None, outputs: np.ndarray
) -> float:
    """Rms of (true - predicted) whitened residuals of one run; NaN with no prediction."""
    if predicted is None or np.size(predicted) == 0:
        return float("nan")
    diff = whiten(spec, outputs) - np.asarray(predicted, dtype=float)
    return float(np.sqrt(np.mean(diff**2)))


def trust_index(spec: CalibrationSpec, predicted: np.ndarray | None, outputs: np.ndarray) -> float:
    """Trust of one run (see `honing.engine.diagnostics.trust_from_error`); 1 with no
    prediction, as for the initial design and imported runs."""
    err = prediction_error(spec, predicted, outputs)
    return 1.0 if np.isnan(err) else trust_from_error(err)


def posterior_samples(
    spec: CalibrationSpec, state: EngineState, count: int
) -> tuple[list[str], np.ndarray]:
    """Up to ``count`` posterior draws (the prior's before the first fit), columns named."""
    names = list(spec.names)
    if spec.noise_scale == "estimate" and state.pool.shape[1] > spec.dim:
        names.append(NOISE_SCALE_NAME)
    n = state.pool.shape[0]
    if count >= n:
        return names, state.pool
    # Evenly spaced rows: the pool is in chain order, so its first rows are its earliest steps.
    return names, state.pool[np.linspace(0, n - 1, max(0, count)).round().astype(int)]


def raise_budget(
    spec: CalibrationSpec, state: EngineState, max_runs: int, spent: int
) -> tuple[CalibrationSpec, EngineState]:
    """The spec with a larger run budget, and the state open for more runs.

    A calibration the old budget stopped collects again from where it stood: the same
    posterior, history and proposals (the last round drew a batch even as it stopped), less
    the warning about the spent budget. The current budget again changes nothing, so a
    repeated request is harmless. A converged or failed calibration is finished and raises
    `ConflictError`; a budget that does not leave room beyond the ``spent`` runs (finished
    or out, imported ones included), or is above ``LIMITS["max_runs"]``, raises `SpecError`
    at ``budget.max_runs``.
    """
    if isinstance(max_runs, bool) or not isinstance(max_runs, int):
        raise SpecError.at(("budget", "max_runs"), "must be a whole number")
    if max_runs == spec.max_runs:
        return spec, state
    if state.status in ("converged", "failed"):
        raise ConflictError(
            f"the calibration has {state.status}; a larger budget cannot reopen it "
            "(create a new calibration and import its runs to refine it)"
        )
    limit = LIMITS["max_runs"]
    floor = max(spec.max_runs, spent)
    if not floor < max_runs <= limit:
        raise SpecError.at(
            ("budget", "max_runs"),
            f"must be larger than the current budget of {spec.max_runs} runs and than the "
            f"{spent} runs spent or out, and at most {limit}, got {max_runs}",
        )
    larger = dataclasses.replace(spec, max_runs=max_runs)
    if state.status != "budget_exhausted":
        return larger, state
    diagnostics = dict(state.summary.get("diagnostics", {}))
    diagnostics["warnings"] = [
        w for w in diagnostics.get("warnings", []) if not w.startswith(_BUDGET_WARNING)
    ]
    diagnostics["suggested_max_runs"] = None
    summary = {**state.summary, "status": "collecting", "diagnostics": diagnostics}
    return larger, dataclasses.replace(state, status="collecting", summary=summary)


def refit(
    spec: CalibrationSpec, state: EngineState, runs: RunTable, *, widen: bool = True
) -> EngineState:
    """The next round from every finished run, in completion order.

    Parameters
    ----------
    spec : CalibrationSpec
    state : EngineState
        The latest state.
    runs : RunTable
        Every finished run so far, failed ones included.
    widen : bool
        Add the surrogate's honest error to the noise variance (the default); False gives
        the plain likelihood, for comparison.

    Returns
    -------
    EngineState
    """
    rng = state.generator()
    families = [p.prior.family for p in spec.parameters]
    ok = ~runs.failed
    xi_all = _to_reference(spec, runs.theta)
    if ok.sum() < MIN_FIT_RUNS:
        return _without_fit(spec, state, runs, xi_all, rng, families)

    # After the first fit, runs follow the posterior: weight them by nearness to it and
    # decorrelate the frame; the first fit sees the initial design only.
    focused = "post_mean" in state.arrays
    nearness = np.ones(runs.n_runs)
    if focused:
        nearness = proximity_weight(state.arrays["post_mean"], state.arrays["post_cov"], xi_all)
    kept = retained_runs(spec, ok, nearness)
    residuals = whiten(spec, runs.outputs[kept])
    weights = fit_trust(runs.error[kept]) * nearness[kept]
    frame = Frame.local(xi_all[kept], weights, decorrelate=focused)
    validation = _validation_error(state, runs)

    scored = _within_radii(nearness[kept], SCORED_RADII)
    surrogate = fit_surrogate(xi_all[kept], residuals, weights, frame, spec.max_degree, scored)
    model_error = _model_error(surrogate, kept >= state.runs_at_fit)
    if not widen:
        model_error = 0.0
    failures = FailureModel.fit(xi_all, runs.failed, surrogate.frame.center, surrogate.frame.scale)
    log_post = _log_posterior(spec, surrogate, families, model_error, failures)

    initial, modes = _initial_walkers(spec, state, xi_all[kept], surrogate.frame, log_post, rng)
    validated = validation is not None and validation < VALIDATION_TOLERANCE
    cap = MAX_STEPS if validated else STEERING_STEPS
    chain = sample_posterior(log_post, initial, rng, proposal=modes, max_steps=cap)
    mean, cov = chain.draws.mean(axis=0), _cov(chain.draws)
    change = None
    if "post_mean" in state.arrays:
        change = gaussian_kl(mean, cov, state.arrays["post_mean"], state.arrays["post_cov"])
    entry = {
        "round": state.round + 1,
        "runs_completed": int(ok.sum()),
        "runs_failed": int(runs.failed.sum()),
        "validation_error": validation,
        "posterior_change": change,
        "trust_mean": float(np.mean(runs.trust[kept])),
        "surrogate_terms": surrogate.n_terms,
        "kl_tolerance": kl_tolerance(spec.dim, float(chain.ess.min())),
        "chain_complete": chain.complete,
    }
    history = [*state.history, entry]
    is_converged = converged(history)
    status = "collecting"
    if is_converged:
        status = "converged"
    elif runs.n_runs >= spec.max_runs:
        status = "budget_exhausted"
    if status != "collecting":
        chain = _final_chain(log_post, chain.draws, rng, modes)
        mean, cov = chain.draws.mean(axis=0), _cov(chain.draws)

    pool_xi = chain.draws
    theta = _to_physical(spec, pool_xi)
    misfit = surrogate.misfit(pool_xi)
    columns = [theta]
    if spec.noise_scale == "estimate":
        columns.append(noise_scale_draws(misfit, spec.output_size, rng)[:, None])
    pool = np.hstack(columns)
    diagnostics = {
        "trust_mean": entry["trust_mean"],
        "validation_error": validation,
        "posterior_change": change,
        "kl_tolerance": entry["kl_tolerance"],
        "surrogate_terms": surrogate.n_terms,
        "surrogate_degree": surrogate.degree,
        "surrogate_components": surrogate.reduction.n_components,
        "model_error": model_error,
        "ess_min": float(chain.ess.min()),
        "tau_max": float(chain.tau.max()),
        "chain_steps": chain.n_steps,
        "acceptance": chain.acceptance,
        "failed_fraction": float(runs.failed.mean()),
        "runs_retained": int(kept.size),
        "runs_scored": int(np.count_nonzero(scored)),
        "converged": is_converged,
        **_stop_diagnostics(spec, status, history, runs),
        "warnings": list(chain.warnings),
    }

    diagnostics["warnings"].extend(_mode_warnings(modes, pool_xi))
    prior_predictive = state.summary.get("prior_predictive")
    if prior_predictive is None:
        prior_predictive = _prior_predictive(spec, runs)
    diagnostics["warnings"].extend(_prior_warnings(spec, prior_predictive))
    if status == "budget_exhausted":
        diagnostics["warnings"].append(_budget_warning(spec, history, runs))

    summary = {
        "round": state.round + 1,
        "runs_completed": int(ok.sum()),
        "status": status,
        "parameters": _parameter_summaries(spec, pool, pool_xi, surrogate, model_error, failures),
        "correlation": np.corrcoef(pool, rowvar=False).reshape(pool.shape[1], -1).tolist(),
        "diagnostics": diagnostics,
        "predictive": _predictive(spec, surrogate, pool, pool_xi, rng),
        "prior_predictive": prior_predictive,
    }

    success = None if failures is None else failures.success
    batch_xi = select_batch(pool_xi, 2 * spec.batch_size, xi_all, families, rng, success=success)
    meta, arrays = surrogate.to_payload()
    return EngineState(
        round=state.round + 1,
        status=status,
        runs_at_fit=runs.n_runs,
        proposals=_to_physical(spec, batch_xi),
        predictions=surrogate.residuals(batch_xi).astype(np.float32),
        pool=pool,
        summary=_json_safe(summary),
        history=_json_safe(history),
        rng=rng.bit_generator.state,
        surrogate={**meta, "failures": failures.to_dict() if failures else None},
        arrays={**arrays, "post_mean": mean, "post_cov": cov},
    )


def _to_reference(spec: CalibrationSpec, theta: np.ndarray) -> np.ndarray:
    theta = np.atleast_2d(theta)
    return np.column_stack(
        [p.prior.to_reference(theta[:, i]) for i, p in enumerate(spec.parameters)]
    ).reshape(theta.shape[0], spec.dim)


def _to_physical(spec: CalibrationSpec, xi: np.ndarray) -> np.ndarray:
    return np.column_stack(
        [p.prior.from_reference(xi[:, i]) for i, p in enumerate(spec.parameters)]
    ).reshape(xi.shape[0], spec.dim)


def _physical_log_prior(spec: CalibrationSpec, theta: np.ndarray) -> np.ndarray:
    """Log prior density of physical points ``(n, dim)``, summed over the parameters."""
    return sum(p.prior.logpdf(theta[:, i]) for i, p in enumerate(spec.parameters))


def _bounded(spec: CalibrationSpec) -> np.ndarray:
    """Which reference coordinates are confined to [-1, 1] (uniform reference family)."""
    return np.array([p.prior.family == "legendre" for p in spec.parameters])


def _cov(x: np.ndarray) -> np.ndarray:
    d = x.shape[1]
    return np.cov(x, rowvar=False).reshape(d, d) + 1e-12 * np.eye(d)


def _empty_diagnostics() -> dict[str, Any]:
    return {
        "trust_mean": None,
        "validation_error": None,
        "posterior_change": None,
        "surrogate_terms": None,
        "surrogate_degree": None,
        "converged": False,
        "unmet_conditions": None,
        "suggested_max_runs": None,
        "warnings": [],
    }


def _validation_error(state: EngineState, runs: RunTable) -> float | None:
    """Rms prediction error in noise units over runs finished since the last fit, each scored
    against the prediction made before it ran (runs without one are left out)."""
    recent = runs.error[state.runs_at_fit :][~runs.failed[state.runs_at_fit :]]
    recent = recent[np.isfinite(recent)]
    return float(np.sqrt(np.mean(recent**2))) if recent.size else None


def _model_error(surrogate: Surrogate, newest: np.ndarray) -> float:
    """Typical out-of-sample error of the new surrogate near the posterior, in noise units.

    Each retained run's leave-one-out error (the fit without it predicting it) is honest out
    of sample and refers to the surrogate about to be sampled, where the previous
    surrogate's validation error lags a round behind and keeps early posteriors wide for
    longer than needed. Taken over the runs finished since the last fit (the ones drawn from
    the latest posterior; all retained runs at the first fit), as the root of the median
    squared error, so that the defensive draws, far out by design, do not set it.
    """
    errors = surrogate.loo_rms[newest] if newest.any() else surrogate.loo_rms
    errors = errors[np.isfinite(errors)]
    return float(np.sqrt(np.median(errors**2))) if errors.size else 0.0


def _log_posterior(
    spec: CalibrationSpec,
    surrogate: Surrogate,
    families: list[Any],
    model_error: float,
    failures: FailureModel | None,
) -> Any:
    """Vectorised log posterior in reference coordinates: the reference prior plus
    `_log_likelihood`."""
    log_prior = _reference_log_prior(families)
    log_like = _log_likelihood(spec, surrogate, model_error, failures)

    def log_post(xi: np.ndarray) -> np.ndarray:
        lp = log_prior(xi)
        inside = np.isfinite(lp)
        out = np.full(xi.shape[0], -np.inf)
        if inside.any():
            out[inside] = lp[inside] + log_like(xi[inside])
        return out

    return log_post


def _log_likelihood(
    spec: CalibrationSpec,
    surrogate: Surrogate,
    model_error: float,
    failures: FailureModel | None,
) -> Any:
    """Vectorised log likelihood of the data at reference points, with the log probability
    that the simulator succeeds there.

    With a fixed sd, the surrogate's error variance (``model_error^2`` per value, in noise
    units) is added to the noise variance, so the misfit is divided by ``1 + model_error^2``:
    an early, poor surrogate gives a wider posterior rather than a wrong one.
    """
    inflation = 1.0 + model_error**2
    estimate = spec.noise_scale == "estimate"

    def log_like(xi: np.ndarray) -> np.ndarray:
        misfit = surrogate.misfit(xi)
        ll = log_likelihood(misfit if estimate else misfit / inflation, spec.output_size, estimate)
        if failures is not None:
            ll = ll + failures.log_success(xi)
        return np.asarray(ll)

    return log_like


def _reference_log_prior(families: list[Any]) -> Any:
    """Vectorised log prior in reference coordinates (a product of U[-1, 1] and N(0, 1)).

    Same values as summing `reference_logpdf` over dimensions, in one pass over the array.
    """
    bounded = np.array([f == "legendre" for f in families])
    const = float(sum(reference_logpdf(f, np.zeros(1))[0] for f in families))

    def log_prior(xi: np.ndarray) -> np.ndarray:
        lp = const - 0.5 * np.sum(np.square(xi[:, ~bounded]), axis=1)
        outside = np.any(np.abs(xi[:, bounded]) > 1.0, axis=1) | np.isnan(xi).any(axis=1)
        return np.where(outside, -np.inf, lp)

    return log_prior


def _initial_walkers(
    spec: CalibrationSpec,
    state: EngineState,
    kept_xi: np.ndarray,
    frame: Frame,
    log_post: Any,
    rng: np.random.Generator,
) -> tuple[np.ndarray, Modes | None]:
    """Starting walkers, and the Laplace fits at the modes when there are.

    Laplace balls at the modes (`find_modes`), searched from the best of the previous pool
    and the retained runs, walkers shared by the modes' weights; failing that, those
    candidates resampled with tempered weights ``exp((lp - max) / T)``, T raised until the
    weights' effective size is at least three walkers' worth, which keeps the ensemble
    spread out."""
    walkers = n_walkers(spec.dim)
    previous = _to_reference(spec, state.pool[:, : spec.dim])
    take = min(previous.shape[0], 4000)
    candidates = np.vstack([previous[rng.choice(previous.shape[0], take, replace=False)], kept_xi])
    lp = log_post(candidates)
    finite = np.isfinite(lp)
    candidates, lp = candidates[finite], lp[finite]
    modes = None
    if candidates.shape[0]:
        modes = find_modes(log_post, candidates, lp, frame.scale, _bounded(spec))
    if modes is not None:
        ball = np.empty((0, spec.dim))
        for _ in range(50):
            x = modes.draw(rng, 2 * walkers)
            ball = np.vstack([ball, x[np.isfinite(log_post(x))]])
            if ball.shape[0] >= walkers:
                return ball[:walkers], modes
    if candidates.shape[0] < walkers:
        raise ValueError(
            f"only {candidates.shape[0]} starting points have a finite posterior; "
            f"{walkers} walkers are needed"
        )
    z = lp - lp.max()
    temperature = 1.0
    for _ in range(200):
        p = np.exp(z / temperature)
        p /= p.sum()
        if 1.0 / np.sum(p**2) >= 3 * walkers:
            break
        temperature *= 1.5
    p = np.maximum(p, 1e-300)
    p /= p.sum()
    idx = rng.choice(candidates.shape[0], walkers, replace=False, p=p)
    return candidates[idx], None


def _final_chain(
    log_post: Any, draws: np.ndarray, rng: np.random.Generator, modes: Modes | None
) -> ChainResult:
    """The posterior the calibration serves once it stops: a chain run to `FINAL_ESS`,
    started from the round's own draws, which are already in the posterior's bulk."""
    walkers = n_walkers(draws.shape[1])
    initial = draws[rng.choice(draws.shape[0], walkers, replace=False)]
    return sample_posterior(
        log_post, initial, rng, proposal=modes, min_ess=FINAL_ESS, max_pool=FINAL_POOL
    )


def _parameter_summaries(
    spec: CalibrationSpec,
    pool: np.ndarray,
    pool_xi: np.ndarray,
    surrogate: Surrogate,
    model_error: float,
    failures: FailureModel | None,
) -> dict[str, Any]:
    """Per-parameter summaries; the MAP is the mode of the physical posterior density,
    climbed to from the draw where that density is highest."""
    map_xi = _physical_mode(spec, pool_xi, surrogate, model_error, failures)
    map_theta = _to_physical(spec, map_xi[None, :])[0]
    out: dict[str, Any] = {}
    for i, p in enumerate(spec.parameters):
        entry = parameter_summary(pool[:, i], map_theta[i], p.prior.sd)
        entry["kl_prior"] = marginal_kl(pool_xi[:, i], p.prior.family)
        out[p.name] = entry
    if spec.noise_scale == "estimate":
        # The mode of s given the MAP parameters: s^-(N+1) exp(-misfit / (2 s^2)) under the
        # 1/s prior (see `noise_scale_draws`) peaks at s^2 = misfit / (N + 1).
        misfit = max(float(surrogate.misfit(map_xi[None, :])[0]), 0.0)
        s_map = np.sqrt(misfit / (spec.output_size + 1))
        out[NOISE_SCALE_NAME] = parameter_summary(pool[:, spec.dim], s_map, float("nan"))
    return out


def _physical_mode(
    spec: CalibrationSpec,
    pool_xi: np.ndarray,
    surrogate: Surrogate,
    model_error: float,
    failures: FailureModel | None,
) -> np.ndarray:
    """Reference coordinates of the mode of the posterior density in physical coordinates.

    The best pool draw alone is a poor mode in many dimensions (in 20, the best of 20,000
    draws lay 0.47 posterior sd per coordinate from the exact mode), so it only starts an
    uphill search on the surrogate posterior."""
    log_like = _log_likelihood(spec, surrogate, model_error, failures)

    def log_density(xi: np.ndarray) -> np.ndarray:
        return log_like(xi) + _physical_log_prior(spec, _to_physical(spec, xi))

    best = pool_xi[int(np.argmax(log_density(pool_xi)))]
    scale = np.maximum(pool_xi.std(axis=0), 1e-12)
    return find_mode(log_density, best, scale, _bounded(spec))


def _predictive(
    spec: CalibrationSpec,
    surrogate: Surrogate,
    pool: np.ndarray,
    pool_xi: np.ndarray,
    rng: np.random.Generator,
) -> dict[str, Any]:
    """Posterior-predictive mean and 95% band of a new measurement, per channel."""
    n = min(PREDICTIVE_DRAWS, pool_xi.shape[0])
    idx = rng.choice(pool_xi.shape[0], n, replace=False)
    # In noise units, one row per output value, single precision: a new measurement is the
    # surrogate's whitened residual plus a standard normal (times the noise scale when it
    # is estimated). The draws only feed 400-draw quantiles, whose Monte Carlo error (~10%
    # of the band's width in its tails) dwarfs float32 rounding of values of order one, and
    # each value's draws sorted as one contiguous row cost a fraction of a strided quantile
    # (3 x 5000 values: 0.23 s -> 0.08 s for the bands).
    sim = surrogate.reduction.reconstruct_by_output(surrogate.scores(pool_xi[idx]))
    measured = rng.standard_normal(sim.shape, dtype=np.float32)
    if spec.noise_scale == "estimate":
        measured *= pool[idx, spec.dim].astype(np.float32)[None, :]
    measured += sim
    return _bands(spec, sim, measured)


def _bands(spec: CalibrationSpec, sim: np.ndarray, measured: np.ndarray) -> dict[str, Any]:
    """Mean of ``sim`` and the 95% band of ``measured`` per output value, per channel.

    Both arrays are whitened residuals ``(y - data) / sd`` with one row per output value,
    ``(output_size, n_draws)``. The band edges are the 2.5% and 97.5% sample quantiles,
    interpolated linearly between order statistics as `numpy.quantile` does by default,
    then mapped back to output units in double precision (quantiles commute with the
    increasing map ``data + sd * w``); ``measured`` is sorted in place.
    """
    measured.sort(axis=1)
    lo, hi = (spec.data + spec.sd * _sorted_quantile(measured, q) for q in (0.025, 0.975))
    mean = spec.data + spec.sd * sim.mean(axis=1, dtype=np.float64)
    out, start = {}, 0
    for obs in spec.observations:
        cols = slice(start, start + obs.size)
        out[obs.name] = {"mean": mean[cols], "lo95": lo[cols], "hi95": hi[cols]}
        start += obs.size
    return out


def _sorted_quantile(rows: np.ndarray, q: float) -> np.ndarray:
    """The ``q`` quantile of each row of an already sorted array (linear interpolation)."""
    position = q * (rows.shape[1] - 1)
    below = int(np.floor(position))
    above = min(below + 1, rows.shape[1] - 1)
    frac = position - below
    low, high = rows[:, below].astype(float), rows[:, above].astype(float)
    return low + frac * (high - low)


def _prior_predictive(spec: CalibrationSpec, runs: RunTable) -> dict[str, Any]:
    """95% prediction band of a new measurement under the prior, from the initial design's
    runs, and the count of data points outside it per channel.

    Per output value, the normal-theory prediction interval for one more draw from the n
    runs, ``mean ± t(0.975, n - 1) sqrt(s^2 (1 + 1/n) + 1)`` in noise units: the textbook
    interval for a single future observation (Hahn and Meeker, 1991, Statistical Intervals;
    cited from memory) with the noise's known unit variance added. The 2.5% and 97.5%
    sample quantiles of 8-16 runs covered 0.74 to 0.90, and the check below would then flag
    data a prior explains well.
    """
    # The initial design's successful runs; when too few of them succeeded, the earliest
    # successful runs (a fit needs MIN_FIT_RUNS, so there are that many).
    first = runs.outputs[: spec.initial_runs][~runs.failed[: spec.initial_runs]]
    if first.shape[0] < MIN_FIT_RUNS:
        first = runs.outputs[~runs.failed][: spec.initial_runs]
    sim = whiten(spec, first)
    n = sim.shape[0]
    centre = sim.mean(axis=0)
    half = stats.t.ppf(0.975, n - 1) * np.sqrt(sim.var(axis=0, ddof=1) * (1 + 1 / n) + 1.0)
    lo, hi = spec.data + spec.sd * (centre - half), spec.data + spec.sd * (centre + half)
    out, begin = {}, 0
    for obs in spec.observations:
        cols = slice(begin, begin + obs.size)
        outside = (obs.values < lo[cols]) | (obs.values > hi[cols])
        out[obs.name] = {"lo95": lo[cols], "hi95": hi[cols], "uncovered": int(outside.sum())}
        begin += obs.size
    return out


def _mode_warnings(modes: Modes | None, pool_xi: np.ndarray) -> list[str]:
    """A warning when the draws fall into separated modes, each holding at least
    `MODE_SHARE_WARNED` of them: a mean and sd then describe none of the modes."""
    if modes is None or len(modes.fits) < 2:
        return []
    shares = np.bincount(modes.nearest(pool_xi), minlength=len(modes.fits)) / pool_xi.shape[0]
    held = sorted((float(s) for s in shares if s >= MODE_SHARE_WARNED), reverse=True)
    if len(held) < 2:
        return []
    parts = ", ".join(f"{s:.0%}" for s in held)
    return [
        f"the posterior has {len(held)} separated modes, holding {parts} of the draws: means, "
        "sds and intervals describe them together; read the marginal and pair plots, and the "
        "posterior samples, to see each"
    ]


def _prior_warnings(spec: CalibrationSpec, prior_predictive: dict[str, Any]) -> list[str]:
    out = []
    for obs in spec.observations:
        band = prior_predictive.get(obs.name)
        if band and band["uncovered"] > PRIOR_MISS_SHARE * obs.size:
            out.append(
                f"prior check: {band['uncovered']} of {obs.size} points of {obs.name!r} lie "
                "outside the prior-predictive 95% band; the prior ranges may not be able to "
                "explain the data, and the calibration answer would then be meaningless"
            )
    return out


def suggested_budget(spec: CalibrationSpec, history: list[dict[str, Any]], runs: RunTable) -> int:
    """The smallest run budget that lets a calibration stopped by its budget converge.

    It leaves a batch for each round the stop rule still needs (`diagnostics.rounds_to_go`),
    and a whole initial design first when nothing has been fitted yet: that first fit waits
    for one, and cannot count. Workers that run several batches between refits fold them into
    one round, so this is a floor, not a promise.
    """
    first = 0 if history else spec.initial_runs
    return runs.n_runs + first + rounds_to_go(history) * spec.batch_size


def _budget_warning(spec: CalibrationSpec, history: list[dict[str, Any]], runs: RunTable) -> str:
    """Why a calibration that spent its budget had not converged, and how to go on."""
    to_go = rounds_to_go(history)
    room = (
        "a batch for the round the stop rule still needs if it passes"
        if to_go == 1
        else f"a batch for each of the {to_go} rounds the stop rule still needs if they pass"
    )
    return (
        _BUDGET_WARNING
        + "; ".join(unmet_conditions(history))
        + ". Treat the posterior as provisional. To go on, raise the budget to at least "
        f"{suggested_budget(spec, history, runs)} runs, {room}: the calibration keeps its "
        "runs and posterior"
    )


def _stop_diagnostics(
    spec: CalibrationSpec, status: str, history: list[dict[str, Any]], runs: RunTable
) -> dict[str, Any]:
    """The stop rule's standing: the conditions it still misses (empty once converged) and,
    when the budget stopped the calibration, the budget that would let it go on."""
    spent = status == "budget_exhausted"
    return {
        "unmet_conditions": unmet_conditions(history),
        "suggested_max_runs": suggested_budget(spec, history, runs) if spent else None,
    }


def _without_fit(
    spec: CalibrationSpec,
    state: EngineState,
    runs: RunTable,
    xi_all: np.ndarray,
    rng: np.random.Generator,
    families: list[Any],
) -> EngineState:
    """Fewer than `MIN_FIT_RUNS` successful runs: keep the prior, hand out fresh space-filling
    points."""
    fresh = initial_design(families, spec.initial_runs + runs.n_runs, rng)[runs.n_runs :]
    status = "budget_exhausted" if runs.n_runs >= spec.max_runs else state.status
    warnings = [f"fewer than {MIN_FIT_RUNS} successful runs: the surrogate cannot be fitted yet"]
    if status == "budget_exhausted":
        warnings.append(_budget_warning(spec, state.history, runs))
    summary = dict(state.summary)
    summary["diagnostics"] = {
        **_empty_diagnostics(),
        "failed_fraction": float(runs.failed.mean()) if runs.n_runs else 0.0,
        **_stop_diagnostics(spec, status, state.history, runs),
        "warnings": warnings,
    }
    summary["status"] = status
    return EngineState(
        round=state.round,
        status=status,
        runs_at_fit=runs.n_runs,
        proposals=_to_physical(spec, fresh),
        predictions=np.zeros((0, spec.output_size), dtype=np.float32),
        pool=state.pool,
        summary=summary,
        history=state.history,
        rng=rng.bit_generator.state,
        surrogate=state.surrogate,
        arrays=state.arrays,
    )


def _json_safe(value: Any) -> Any:
    """Arrays to lists and non-finite floats to None, so the summary is strict JSON."""
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        if set(map(type, value)) == {float} and all(map(math.isfinite, value)):
            return list(value)  # a band carried over from an earlier round: checked at C speed
        return [_json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        if value.dtype.kind == "f" and np.isfinite(value).all():
            return value.tolist()  # the common case, without a pass per element
        return _json_safe(value.tolist())
    if isinstance(value, np.floating | float):
        f = float(value)
        return f if np.isfinite(f) else None
    if isinstance(value, np.integer):
        return int(value)
    return value
