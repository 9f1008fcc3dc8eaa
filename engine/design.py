"""Where to run the simulator next: a space-filling prior design, then spread posterior batches.

All points here are in reference coordinates (see `honing.engine.priors`), where the prior is a
product of U[-1, 1] and N(0, 1) factors.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from scipy.stats import qmc

from honing.engine.priors import Family, reference_ppf

__all__ = ["DEFENSIVE_FRACTION", "initial_design", "select_batch"]

#: Share of each batch drawn from a widened posterior, so that a mode the surrogate missed can
#: still be found (a defensive mixture in the sense of Hesterberg, 1995).
DEFENSIVE_FRACTION = 0.1
#: Widening of the posterior's Gaussian fit for the defensive draws, in posterior sd.
DEFENSIVE_WIDEN = 3.0
#: With a model of where the simulator fails: the success probability a pool draw needs to
#: enter the spread part of a batch, and the one a defensive draw needs. Points the model is
#: unsure of (between the two) are left to the defensive share, which so probes the boundary
#: without spending runs where failure is near certain.
LIKELY_SUCCESS = 0.9
PROBE_SUCCESS = 0.1
#: Candidates drawn from the posterior pool per point of a batch, for the max-min selection.
#: Max-min prefers whatever lies farthest from every other point, which among many candidates
#: is the pool's far tail: in 15 dimensions, with 20 candidates per point the chosen points
#: lay at 1.36 times the pool's mean radius (chi-square upper tail of about 3%), with 2 at
#: 1.13 (N(0, I) pool of 8000, 200 points placed, batches of 32, ten seeds). Two keep the
#: batch free of near-duplicates while it still follows the posterior's density, where the
#: surrogate has to be accurate (the B3 benchmark's concentrated settings gained most).
OVERSAMPLE = 2
#: Open interval the unit-cube design is clipped to before the inverse CDF.
_UNIT_EPS = 1e-12


def initial_design(families: Sequence[Family], n: int, rng: np.random.Generator) -> np.ndarray:
    """First ``n`` points of a scrambled Sobol' sequence, mapped to the reference variables.

    Parameters
    ----------
    families : sequence of {"legendre", "hermite"}
        Reference family of each dimension.
    n : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n, dim)

    References
    ----------
    .. [1] Owen, A. B. (1998). Scrambling Sobol' and Niederreiter-Xing points. J. Complexity
       14, 466-489.
    """
    dim = len(families)
    m = max(1, int(np.ceil(np.log2(n))))
    sobol = qmc.Sobol(d=dim, scramble=True, seed=rng)
    # random_base2 avoids the balance warning scipy gives for sizes that are not powers of two.
    u = np.clip(sobol.random_base2(m)[:n], _UNIT_EPS, 1.0 - _UNIT_EPS)
    return np.column_stack([reference_ppf(f, u[:, j]) for j, f in enumerate(families)])


def select_batch(
    pool: np.ndarray,
    n: int,
    existing: np.ndarray,
    families: Sequence[Family],
    rng: np.random.Generator,
    defensive_fraction: float = DEFENSIVE_FRACTION,
    success: Callable[[np.ndarray], np.ndarray] | None = None,
) -> np.ndarray:
    """A batch of ``n`` points from the posterior pool, spread out, plus defensive draws.

    Candidates are drawn from the pool and chosen greedily to maximise the smallest distance
    to every point already run and already chosen, in coordinates whitened by the pool's
    covariance; a batch therefore holds no near-duplicates and fills the posterior evenly.

    Parameters
    ----------
    pool : ndarray, shape (n_pool, dim)
        Posterior draws in reference coordinates.
    n : int
        Batch size.
    existing : ndarray, shape (n_existing, dim)
        Points already evaluated or handed out.
    families : sequence of {"legendre", "hermite"}
    rng : numpy.random.Generator
    defensive_fraction : float
    success : callable, optional
        Probability that the simulator succeeds at points, ``(n, dim) -> (n,)``. The spread
        part is chosen among pool draws with at least `LIKELY_SUCCESS`, the defensive draws
        among those with at least `PROBE_SUCCESS`.

    Returns
    -------
    ndarray, shape (n, dim)
    """
    dim = pool.shape[1]
    n_defensive = round(defensive_fraction * n) if n >= 1 / defensive_fraction else 0
    mean = pool.mean(axis=0)
    cov = np.cov(pool, rowvar=False).reshape(dim, dim) + 1e-12 * np.eye(dim)
    chol = np.linalg.cholesky(cov)
    defensive = _widened_draws(mean, chol, n_defensive, families, rng, success)
    eligible = pool
    if success is not None:
        likely = success(pool) >= LIKELY_SUCCESS
        if np.count_nonzero(likely) >= n:
            eligible = pool[likely]
    m = min(eligible.shape[0], OVERSAMPLE * n)
    candidates = eligible[rng.choice(eligible.shape[0], m, replace=False)]
    chosen = _max_min(candidates, n - n_defensive, np.vstack([existing, defensive]), chol)
    return np.vstack([chosen, defensive])


def _widened_draws(
    mean: np.ndarray,
    chol: np.ndarray,
    n: int,
    families: Sequence[Family],
    rng: np.random.Generator,
    success: Callable[[np.ndarray], np.ndarray] | None,
) -> np.ndarray:
    """Gaussian draws with `DEFENSIVE_WIDEN` times the posterior sd, inside the support, and
    not where failure is near certain; after 100 tries, whatever the failure model says."""
    bounded = np.array([f == "legendre" for f in families])
    out = np.empty((0, mean.size))
    tries = 0
    while out.shape[0] < n:
        x = mean + DEFENSIVE_WIDEN * rng.standard_normal((4 * n, mean.size)) @ chol.T
        x = x[np.all(~bounded | (np.abs(x) < 1.0), axis=1)]
        if success is not None and tries < 100:
            x = x[success(x) >= PROBE_SUCCESS]
        out = np.vstack([out, x])
        tries += 1
    return out[:n]


def _max_min(candidates: np.ndarray, n: int, fixed: np.ndarray, chol: np.ndarray) -> np.ndarray:
    """Greedy max-min choice of ``n`` candidates given points already placed."""
    white = np.linalg.solve(chol, candidates.T).T
    nearest = np.full(white.shape[0], np.inf)
    if fixed.shape[0]:
        fixed_white = np.linalg.solve(chol, fixed.T).T
        for chunk in np.array_split(fixed_white, max(1, fixed_white.shape[0] // 256)):
            d2 = ((white[:, None, :] - chunk[None, :, :]) ** 2).sum(axis=2)
            nearest = np.minimum(nearest, d2.min(axis=1))
    picks = []
    for _ in range(min(n, white.shape[0])):
        i = int(np.argmax(nearest))
        picks.append(i)
        nearest = np.minimum(nearest, ((white - white[i]) ** 2).sum(axis=1))
        nearest[i] = -np.inf
    return candidates[picks]
