"""Compute and store the B3 reference posteriors: long emcee runs on the full elliptic model.

Run once, and again only when a B3 problem changes (the stored `problem_hash` is checked on
load):

    .venv/bin/python tests/benchmarks/make_references.py [--only B3-delta8]

For each setting: the mode by least squares from the truth, 64 walkers started in a ball from
the Gauss-Newton covariance there, differential-evolution moves (emcee's DEMove only: its
DESnookerMove does not keep the target, see `honing.engine.sampling`), chunks of 2000 steps
until `emcee.EnsembleSampler.get_autocorr_time` accepts the chain (it raises unless the chain
is at least 50 integrated autocorrelation times long, Foreman-Mackey et al. 2013) and the
chain is at least `TAU_MULTIPLE` tau long. The first `BURN_TAU` tau are dropped, the rest
thinned by tau/2 and at most `KEEP` draws stored in ``references/<key>.npz`` (no pickles).

Each chain is then checked against an independent estimate: self-normalised importance
sampling (Owen 2013, Monte Carlo theory, methods and examples, ch. 9) from a multivariate t
around the mode, `IS_DRAWS` draws. The script refuses to store a chain whose means or sds
differ from it by more than `IS_TOLERANCE` reference sd.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import emcee
import numpy as np
from scipy import optimize, stats

sys.path.insert(0, str(Path(__file__).resolve().parent))

from problems import (
    REFERENCE_BURN_TAU,
    REFERENCE_WALKERS,
    REFERENCES,
    Problem,
    b3_elliptic,
    b3_settings,
    problem_hash,
)

WALKERS = REFERENCE_WALKERS
CHUNK = 2000
MAX_STEPS = 200_000
#: Chain length wanted in autocorrelation times: twice emcee's own minimum of 50.
TAU_MULTIPLE = 100
BURN_TAU = REFERENCE_BURN_TAU
KEEP = 8000
#: Importance-sampling check: draws, t degrees of freedom and scale inflation of the proposal
#: (heavier tails and 1.5 times the Gauss-Newton covariance keep the weights bounded), and
#: the allowed gap. The chain's own Monte Carlo error is about 1/sqrt(2 * 64 * 100) = 0.009
#: sd on an sd (64 walkers, 100 tau), and importance sampling with an effective size of tens
#: of thousands adds less; 0.05 is over five of those and far under the 10-15% shrinkage of a
#: sampler that does not keep its target.
IS_DRAWS = 1_000_000
IS_DOF = 6
IS_INFLATE = 1.5
IS_TOLERANCE = 0.05


def reference_chain(
    problem: Problem, seed: int, tau_multiple: float = TAU_MULTIPLE
) -> dict[str, np.ndarray]:
    spec = problem.spec
    data, sd = spec.data, spec.sd
    log_post = problem.log_posterior()
    truth = np.array(problem.notes["truth"])

    def residual(x: np.ndarray) -> np.ndarray:
        return np.concatenate([(problem.model(x[None, :])[0] - data) / sd, x])

    fit = optimize.least_squares(residual, truth, x_scale=1.0, xtol=1e-12, ftol=1e-12)
    cov = np.linalg.inv(fit.jac.T @ fit.jac)
    rng = np.random.default_rng(seed)
    start = rng.multivariate_normal(fit.x, cov, size=WALKERS)
    sampler = emcee.EnsembleSampler(
        WALKERS,
        problem.dim,
        log_post,
        moves=emcee.moves.DEMove(),
        vectorize=True,
    )
    state = emcee.State(start, random_state=np.random.RandomState(seed).get_state())
    while True:
        state = sampler.run_mcmc(state, CHUNK)
        try:
            tau = sampler.get_autocorr_time()  # raises below 50 tau
        except emcee.autocorr.AutocorrError:
            tau = None
        steps = sampler.iteration
        if tau is not None and steps >= tau_multiple * tau.max():
            break
        if steps >= MAX_STEPS:
            raise RuntimeError(f"{problem.key}: chain not converged after {steps} steps")
    burn = int(np.ceil(BURN_TAU * tau.max()))
    thin = max(1, int(tau.max() / 2))
    draws = sampler.get_chain(discard=burn, thin=thin, flat=True)
    if draws.shape[0] > KEEP:
        draws = draws[np.sort(rng.choice(draws.shape[0], KEEP, replace=False))]
    check = importance_check(problem, fit.x, cov, seed)
    gap_mean = np.abs(draws.mean(0) - check["mean"]) / check["sd"]
    gap_sd = np.abs(draws.std(0, ddof=1) / check["sd"] - 1.0)
    if max(gap_mean.max(), gap_sd.max()) > IS_TOLERANCE:
        raise RuntimeError(
            f"{problem.key}: chain disagrees with importance sampling (ESS {check['ess']:.0f}): "
            f"mean gap {gap_mean.max():.3f} sd, sd ratio off by {gap_sd.max():.3f}"
        )
    return {
        "is_mean": check["mean"],
        "is_sd": check["sd"],
        "is_ess": np.array(check["ess"]),
        "draws": draws,
        "tau": tau,
        "n_steps": np.array(steps),
        "tau_multiple": np.array(steps / tau.max()),
        "mode": fit.x,
        "acceptance": np.array(sampler.acceptance_fraction.mean()),
        "problem_hash": np.array(problem_hash(problem)),
    }


def importance_check(
    problem: Problem, mode: np.ndarray, cov: np.ndarray, seed: int
) -> dict[str, np.ndarray | float]:
    """Posterior mean and sd by self-normalised importance sampling, with the weights' ESS."""
    log_post = problem.log_posterior()
    proposal = stats.multivariate_t(
        loc=mode, shape=IS_INFLATE * cov, df=IS_DOF, seed=np.random.default_rng(seed + 1)
    )
    chunks = [proposal.rvs(50_000) for _ in range(IS_DRAWS // 50_000)]
    x = np.vstack(chunks)
    log_w = np.concatenate([log_post(c) - proposal.logpdf(c) for c in chunks])
    w = np.exp(log_w - log_w.max())
    w /= w.sum()
    mean = w @ x
    return {
        "mean": mean,
        "sd": np.sqrt(w @ (x - mean) ** 2),
        "ess": float(1.0 / np.sum(w**2)),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", help="one key, e.g. B3-delta8")
    parser.add_argument(
        "--missing", action="store_true", help="skip references stored for the current problem"
    )
    args = parser.parse_args(argv)
    REFERENCES.mkdir(parents=True, exist_ok=True)
    for i, (setting, delta) in enumerate(b3_settings()):
        problem = b3_elliptic(setting, delta)
        if args.only and problem.key != args.only:
            continue
        path = REFERENCES / f"{problem.key}.npz"
        if args.missing and path.exists():
            with np.load(path, allow_pickle=False) as f:
                if str(f["problem_hash"]) == problem_hash(problem):
                    continue
        t0 = time.perf_counter()
        out = reference_chain(problem, seed=1000 + i)
        np.savez(path, **out)
        print(
            f"{problem.key}: {int(out['n_steps'])} steps, {float(out['tau_multiple']):.0f} tau, "
            f"tau max {out['tau'].max():.1f}, {out['draws'].shape[0]} draws, "
            f"importance-sampling ESS {float(out['is_ess']):.0f}, "
            f"{time.perf_counter() - t0:.0f} s",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
