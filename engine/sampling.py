"""Sampling the surrogate posterior with emcee's ensemble sampler.

The chain runs in chunks until it is at least `MIN_TAU_MULTIPLE` integrated autocorrelation
times long and the effective sample size of every coordinate reaches the target, so the Monte
Carlo error of each reported mean stays below ``1/sqrt(ess)`` posterior sd. Sampling the
surrogate is cheap: the posterior's own noise should never be what limits accuracy.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import emcee
import numpy as np
from scipy import optimize, special, stats

__all__ = [
    "ChainResult",
    "Laplace",
    "Modes",
    "find_mode",
    "find_modes",
    "independence_move",
    "laplace_fit",
    "n_walkers",
    "sample_posterior",
]

LogProb = Callable[[np.ndarray], np.ndarray]

#: Effective sample size wanted per coordinate by default, enough for a round that steers the
#: next batch: Monte Carlo error of a mean under 1/sqrt(1000) ~ 0.032 posterior sd (the
#: posterior a stopped calibration serves asks for more: `honing.engine.rounds.FINAL_ESS`).
#: With 64 walkers or more the 50-tau rule asks for more than this already; the pool keeps
#: less than the chain holds (a 2-d standard normal, 150 chains with the Laplace proposal:
#: estimated ESS 5,000, and the 8,000 pooled draws' means scattered as for 3,300 independent
#: draws).
MIN_ESS = 1000
#: Chain length in autocorrelation times below which emcee's own estimate is unreliable
#: (Foreman-Mackey et al. 2013; emcee's `integrated_time` uses the same 50).
MIN_TAU_MULTIPLE = 50
#: Steps discarded at the start of the chain, in autocorrelation times (common practice: a few
#: tau when walkers start near the target, as they do from the previous round's draws).
BURN_TAU = 5
#: Fewest steps between autocorrelation checks, and the default cap on the chain. Each check
#: costs emcee's `integrated_time` over the whole chain (an FFT per walker and coordinate), so
#: the chain runs on to the length the latest estimate of tau asks for, at most doubling, and
#: checks stay few: a 20,000-step chain checked every 200 steps spent three quarters of its
#: refit in those checks (48 of 62 s, 15 dimensions, 64 walkers).
CHUNK_STEPS = 200
MAX_STEPS = 20_000
#: Default largest pool of thinned draws (`max_pool`), and the fewest draws per walker taken
#: from a chain stopped at its cap with a tau near the chain's length (thinning by tau / 2
#: would leave one or two per walker; a converged chain, at least 50 tau long, keeps ~90).
MAX_POOL = 8000
MIN_DRAWS_PER_WALKER = 8
#: Finite-difference steps of the gradient and Hessian at the mode, relative to the local
#: frame's scale: the surrogate is a low-degree polynomial on that scale, so the truncation
#: error of central differences is O((h / scale)^2) relative.
GRAD_STEP = 1e-6
HESS_STEP = 1e-4


@dataclass
class ChainResult:
    """Thinned posterior draws with the chain's diagnostics.

    Attributes
    ----------
    draws : ndarray, shape (n_draws, dim)
    log_prob : ndarray, shape (n_draws,)
    tau : ndarray, shape (dim,)
        Integrated autocorrelation time per coordinate, in steps.
    ess : ndarray, shape (dim,)
        Effective sample size per coordinate after burn-in.
    n_steps : int
    acceptance : float
    complete : bool
        Whether the chain met its length and effective-size rule; False when it stopped at
        its step cap, its tau and ESS then being rough.
    warnings : list of str
    """

    draws: np.ndarray
    log_prob: np.ndarray
    tau: np.ndarray
    ess: np.ndarray
    n_steps: int
    acceptance: float
    complete: bool = True
    warnings: list[str] = field(default_factory=list)


def n_walkers(dim: int) -> int:
    """Walkers for a ``dim``-dimensional target: at least 64, at least four per dimension, even."""
    n = max(64, 4 * dim)
    return n + n % 2


def sample_posterior(
    log_prob: LogProb,
    initial: np.ndarray,
    rng: np.random.Generator,
    proposal: Modes | Laplace | None = None,
    min_ess: int = MIN_ESS,
    max_steps: int = MAX_STEPS,
    max_pool: int = MAX_POOL,
) -> ChainResult:
    """Run emcee until the chain is long enough, then thin it to nearly independent draws.

    Parameters
    ----------
    log_prob : callable
        Vectorised log density: ``(n_points, dim) -> (n_points,)``, ``-inf`` outside support.
    initial : ndarray, shape (n_walkers, dim)
        Starting walkers, each with finite log density.
    rng : numpy.random.Generator
        Seeds emcee's own generator, so a run is reproducible.
    proposal : Modes or Laplace, optional
        Gaussian approximations of the target at its modes (one mode: a Laplace fit); when
        given, half of the moves are independence proposals from multivariate t's around
        them, which on a near-Gaussian posterior cut the autocorrelation time to a few steps
        and let walkers move between separated modes, which differential-evolution moves
        alone rarely cross.
    min_ess : int
    max_steps : int
    max_pool : int
        Most thinned draws returned; a longer thinned chain is subsampled at random.

    Returns
    -------
    ChainResult

    References
    ----------
    .. [1] Foreman-Mackey, D., Hogg, D. W., Lang, D., Goodman, J. (2013). emcee: The MCMC
       Hammer. PASP 125, 306-312.
    .. [2] ter Braak, C. J. F. (2006). A Markov chain Monte Carlo version of the genetic
       algorithm Differential Evolution. Stat. Comput. 16, 239-249.
    .. [3] Tierney, L. (1994). Markov chains for exploring posterior distributions. Ann.
       Statist. 22, 1701-1728 (independence Metropolis-Hastings).
    """
    walkers, dim = initial.shape
    if walkers < 2 * dim or walkers % 2:
        raise ValueError(f"need an even number of walkers >= {2 * dim}, got {walkers}")
    # Differential-evolution moves mix faster than the stretch move on the narrow, correlated
    # posteriors met here. emcee's DESnookerMove (3.1.6) is not used: on a 15-d standard
    # normal it gave sd 0.76 alone and 0.92 in a 0.8/0.2 mix with DEMove (64 walkers, 20,000
    # steps), so it does not leave the target invariant; tests/engine/test_sampling.py checks
    # the moves kept here against exact Gaussian moments.
    moves: list[tuple[emcee.moves.Move, float]] = [(emcee.moves.DEMove(), 1.0)]
    if isinstance(proposal, Laplace):
        proposal = Modes([proposal], np.ones(1))
    if proposal is not None:
        moves = [(independence_move(proposal), 0.5), (emcee.moves.DEMove(), 0.5)]
    sampler = emcee.EnsembleSampler(walkers, dim, log_prob, moves=moves, vectorize=True)
    seed = int(rng.integers(2**32))
    state = emcee.State(initial, random_state=np.random.RandomState(seed).get_state())
    warnings: list[str] = []
    complete = False
    tau = np.full(dim, np.inf)
    chunk = CHUNK_STEPS
    while True:
        state = sampler.run_mcmc(state, chunk)
        steps = sampler.iteration
        chain = sampler.get_chain()
        tau = _tau(chain[steps // 5 :])
        burn = min(int(np.ceil(BURN_TAU * tau.max())), steps // 2)
        ess = walkers * (steps - burn) / tau
        if steps >= MIN_TAU_MULTIPLE * tau.max() and ess.min() >= min_ess:
            complete = True
            break
        if steps >= max_steps:
            warnings.append(
                f"posterior chain stopped at {steps} steps: {steps / tau.max():.0f} "
                f"autocorrelation times (wanted {MIN_TAU_MULTIPLE}), effective sample size "
                f"{ess.min():.0f} (wanted {min_ess})"
            )
            break
        chunk = _next_chunk(steps, float(tau.max()), walkers, min_ess, max_steps)
    thin = max(1, min(int(tau.max() / 2), (steps - burn) // MIN_DRAWS_PER_WALKER))
    draws = sampler.get_chain(discard=burn, thin=thin, flat=True)
    logp = sampler.get_log_prob(discard=burn, thin=thin, flat=True)
    if draws.shape[0] > max_pool:
        keep = np.sort(rng.choice(draws.shape[0], max_pool, replace=False))
        draws, logp = draws[keep], logp[keep]
    return ChainResult(
        draws=draws,
        log_prob=logp,
        tau=tau,
        ess=ess,
        n_steps=steps,
        acceptance=float(np.mean(sampler.acceptance_fraction)),
        complete=complete,
        warnings=warnings,
    )


def _next_chunk(steps: int, tau: float, walkers: int, min_ess: int, max_steps: int) -> int:
    """Steps to run before the next check: up to the length at which a chain with this tau
    would pass both tests, at least `CHUNK_STEPS`, at most the current length (short chains
    underestimate tau) and never past `max_steps`."""
    wanted = max(MIN_TAU_MULTIPLE * tau, BURN_TAU * tau + min_ess * tau / walkers)
    chunk = min(max(int(np.ceil(wanted)) - steps, CHUNK_STEPS), max(steps, CHUNK_STEPS))
    return min(chunk, max_steps - steps)


def _tau(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time per coordinate; tol=0 because the caller checks length.

    A walker that never moved in the window has an undefined autocorrelation (0 / 0), which
    makes emcee's walker average NaN: no decorrelation was seen, so such a coordinate gets the
    window's length, and the chain runs on to its cap with a warning instead of failing.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = emcee.autocorr.integrated_time(chain, tol=0, quiet=True)
    return np.maximum(np.where(np.isfinite(tau), tau, float(chain.shape[0])), 1.0)


@dataclass
class Laplace:
    """Gaussian approximation at the mode: ``N(mode, chol chol^T)``."""

    mode: np.ndarray
    chol: np.ndarray

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return self.mode + rng.standard_normal((n, self.mode.size)) @ self.chol.T

    def distance2(self, x: np.ndarray) -> np.ndarray:
        """Squared Mahalanobis distance of each point from the mode, shape ``(n,)``."""
        return np.sum(np.linalg.solve(self.chol, (x - self.mode).T) ** 2, axis=0)


@dataclass
class Modes:
    """Laplace fits at separated modes of one target, weighted by their Laplace evidence
    ``exp(log p(mode)) sqrt(det cov)``; the first is the one climbed to from the best point."""

    fits: list[Laplace]
    weights: np.ndarray

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """``n`` draws from the Gaussian mixture (from the one Gaussian, for one mode)."""
        if len(self.fits) == 1:
            return self.fits[0].draw(rng, n)
        counts = rng.multinomial(n, self.weights)
        draws = np.vstack([f.draw(rng, c) for f, c in zip(self.fits, counts, strict=True)])
        return draws[rng.permutation(n)]

    def nearest(self, x: np.ndarray) -> np.ndarray:
        """Index of the mode each point is nearest to, in that mode's Mahalanobis metric."""
        return np.argmin([f.distance2(x) for f in self.fits], axis=0)


#: Most local searches for further modes after the first, each from the best candidate that
#: no mode found so far explains.
EXTRA_MODE_STARTS = 4
#: A candidate is explained by a mode when it lies within this many of that mode's 99% radii
#: (Mahalanobis, Laplace covariance): a draw of the same basin lies inside one radius, apart
#: from the tails of a skewed or curved basin.
MODE_RADII = 2.0
#: Candidates more than this many nats below the first mode are not searched from: a mode
#: whose climb starts there would be found only if it rose that much above its own tail.
MODE_WINDOW = 50.0
#: Modes whose Laplace evidence is below this share of the total are dropped.
MIN_MODE_WEIGHT = 1e-3


def find_modes(
    log_prob: LogProb,
    candidates: np.ndarray,
    log_probs: np.ndarray,
    scale: np.ndarray,
    bounded: np.ndarray,
) -> Modes | None:
    """Laplace fits at the separated modes a set of candidate points climbs to.

    The first search starts from the best candidate, as for one mode; each further search
    starts from the best candidate within `MODE_WINDOW` nats of the first mode that lies
    beyond `MODE_RADII` 99% radii of every mode found so far, and a mode it reaches counts
    if it too lies beyond them. One sampler started in one basin, with moves local to it,
    would otherwise never see a second mode however many runs the design put there.

    Parameters
    ----------
    log_prob : callable
        Vectorised log density.
    candidates : ndarray, shape (n, dim)
        Points with finite log density (earlier draws, runs).
    log_probs : ndarray, shape (n,)
        Their log densities.
    scale : ndarray, shape (dim,)
        Length scale of each coordinate for the finite differences.
    bounded : ndarray of bool, shape (dim,)
        Coordinates confined to [-1, 1].

    Returns
    -------
    Modes or None
        None when the first mode has no Laplace fit (a mode on a bound, a flat direction).
    """
    order = np.argsort(-log_probs, kind="stable")
    first = laplace_fit(log_prob, candidates[order[0]], scale, bounded)
    if first is None:
        return None
    fits = [first]
    top = float(log_prob(first.mode[None, :])[0])
    radius2 = (MODE_RADII**2) * float(stats.chi2.ppf(0.99, candidates.shape[1]))
    eligible = order[log_probs[order] >= top - MODE_WINDOW]

    def unexplained(x: np.ndarray) -> np.ndarray:
        """Whether points lie beyond `MODE_RADII` 99% radii of every mode found so far."""
        return np.min([f.distance2(x) for f in fits], axis=0) > radius2

    for _ in range(EXTRA_MODE_STARTS):
        eligible = eligible[unexplained(candidates[eligible])]
        if eligible.size == 0:
            break
        fit = laplace_fit(log_prob, candidates[eligible[0]], scale, bounded)
        eligible = eligible[1:]
        if fit is None:
            continue
        if unexplained(fit.mode[None, :])[0]:
            fits.append(fit)
    log_evidence = log_prob(np.array([f.mode for f in fits])) + np.array(
        [np.sum(np.log(np.diag(f.chol))) for f in fits]
    )
    weights = np.exp(log_evidence - log_evidence.max())
    keep = weights / weights.sum() >= MIN_MODE_WEIGHT
    kept = [f for f, k in zip(fits, keep, strict=True) if k]
    return Modes(kept, weights[keep] / weights[keep].sum())


#: Degrees of freedom and scale inflation of the independence proposal: heavier tails and a
#: slightly wider scale than the Laplace fit keep the importance ratio bounded when the fit
#: underestimates the posterior's spread (common practice for independence samplers).
T_DOF = 5.0
T_INFLATE = 1.2


def independence_move(fit: Modes) -> emcee.moves.MHMove:
    """An emcee Metropolis-Hastings move proposing from multivariate t's around the modes,
    a mixture with the modes' weights (one t for one mode)."""
    chols = [T_INFLATE * f.chol for f in fit.fits]
    means = np.array([f.mode for f in fit.fits])
    dim = means.shape[1]
    # Each component's log normalising constant, up to what they share; with one component it
    # cancels in the acceptance ratio and is left out.
    log_norm = np.log(fit.weights) - np.array([np.sum(np.log(np.diag(c))) for c in chols])

    def log_q(x: np.ndarray) -> np.ndarray:
        terms = []
        for chol, mean in zip(chols, means, strict=True):
            z = np.linalg.solve(chol, (x - mean).T)
            terms.append(-0.5 * (T_DOF + dim) * np.log1p(np.sum(z**2, axis=0) / T_DOF))
        if len(terms) == 1:
            return terms[0]
        return special.logsumexp(np.array(terms) + log_norm[:, None], axis=0)

    def propose(coords: np.ndarray, random: np.random.RandomState) -> tuple[np.ndarray, np.ndarray]:
        n = coords.shape[0]
        z = random.standard_normal((n, dim))
        w = random.chisquare(T_DOF, size=n) / T_DOF
        step = z / np.sqrt(w)[:, None]
        if len(chols) == 1:
            new = means[0] + step @ chols[0].T
        else:
            which = random.choice(len(chols), size=n, p=fit.weights)
            new = means[which] + np.einsum("nj,nij->ni", step, np.array(chols)[which])
        return new, log_q(coords) - log_q(new)

    return emcee.moves.MHMove(propose)


def find_mode(
    log_prob: LogProb, start: np.ndarray, scale: np.ndarray, bounded: np.ndarray
) -> np.ndarray:
    """Local maximum of a vectorised log density, climbing from `start`.

    L-BFGS-B with central-difference gradients, each taken in one vectorised call; returns
    `start` itself when the search does not end higher.

    Parameters
    ----------
    log_prob : callable
        Vectorised log density.
    start : ndarray, shape (dim,)
        A point with finite log density.
    scale : ndarray, shape (dim,)
        Length scale of each coordinate for the finite differences.
    bounded : ndarray of bool, shape (dim,)
        Coordinates confined to [-1, 1].

    Returns
    -------
    ndarray, shape (dim,)
    """
    dim = start.size
    eye = np.eye(dim)
    h = GRAD_STEP * scale

    def negative(x: np.ndarray) -> tuple[float, np.ndarray]:
        pts = np.vstack([x, x + eye * h, x - eye * h])
        f = -log_prob(pts)
        if not np.isfinite(f[0]):
            return 1e300, np.zeros(dim)
        up, down = f[1 : dim + 1], f[dim + 1 :]
        # A step that leaves the support (a coordinate at its bound) gives way to the
        # one-sided difference on the other side: a zero gradient there stopped the search
        # for every coordinate, 0.45 sd short of the mode in a free one.
        with np.errstate(invalid="ignore"):
            grad = np.where(
                np.isfinite(up) & np.isfinite(down),
                (up - down) / (2 * h),
                np.where(
                    np.isfinite(up),
                    (up - f[0]) / h,
                    np.where(np.isfinite(down), (f[0] - down) / h, 0.0),
                ),
            )
        return float(f[0]), grad

    limit = 1.0 - 1e-9
    bounds = [(-limit, limit) if b else (None, None) for b in bounded]
    result = optimize.minimize(negative, start, jac=True, method="L-BFGS-B", bounds=bounds)
    return np.asarray(result.x) if result.fun <= negative(start)[0] else start


def laplace_fit(
    log_prob: LogProb, start: np.ndarray, scale: np.ndarray, bounded: np.ndarray
) -> Laplace | None:
    """Laplace approximation of the target at its mode.

    The mode is found by `find_mode` from `start`; the covariance is the inverse of the
    negative finite-difference Hessian there. Returns None when that is not positive definite
    (a mode on a bound, a flat direction).

    Parameters
    ----------
    log_prob : callable
        Vectorised log density.
    start : ndarray, shape (dim,)
        A point with finite log density.
    scale : ndarray, shape (dim,)
        Length scale of each coordinate for the finite differences.
    bounded : ndarray of bool, shape (dim,)
        Coordinates confined to [-1, 1].

    Returns
    -------
    Laplace or None
    """
    mode = find_mode(log_prob, start, scale, bounded)
    hess = _hessian(log_prob, mode, HESS_STEP * scale)
    if hess is None:
        return None
    try:
        chol = np.linalg.cholesky(np.linalg.inv(-(hess + hess.T) / 2))
    except np.linalg.LinAlgError:
        return None
    return Laplace(mode, chol)


def _hessian(log_prob: LogProb, x: np.ndarray, h: np.ndarray) -> np.ndarray | None:
    """Central-difference Hessian of the log density in one vectorised call."""
    dim = x.size
    i, j = np.triu_indices(dim)
    ei, ej = np.eye(dim)[i] * h[i, None], np.eye(dim)[j] * h[j, None]
    pts = np.vstack([x + ei + ej, x + ei - ej, x - ei + ej, x - ei - ej])
    f = log_prob(pts)
    if not np.all(np.isfinite(f)):
        return None
    n = i.size
    vals = (f[:n] - f[n : 2 * n] - f[2 * n : 3 * n] + f[3 * n :]) / (4 * h[i] * h[j])
    hess = np.zeros((dim, dim))
    hess[i, j] = vals
    hess[j, i] = vals
    return hess
