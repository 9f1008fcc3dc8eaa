"""Benchmark problems for the engine's accuracy, each with its model and reference posterior.

Every problem is a `Problem`: a vectorised model ``(n, dim) -> (n, output_size)`` in physical
units, the spec handed to the engine, and a reference posterior (draws, mean and sd).

- B1, linear-Gaussian in 10 parameters: the posterior is Gaussian and known in closed form.
- B2, one parameter through a smooth nonlinear model at noise levels from weak to very
  informative: reference by dense quadrature of the one-dimensional posterior density.
- B3, the elliptic problem ``-(k u')' = 1`` on (0, 1) with ``u(0) = u(1) = 0`` and
  ``log k`` a truncated Karhunen-Loeve expansion of the exponential covariance, observed at
  sensors: reference by a long emcee run on the full model (`make_references.py`, stored in
  ``references/``).

All priors are normal, so reference coordinates are ``(x - mean) / sd``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import integrate, optimize

from honing.engine.spec import CalibrationSpec

REFERENCES = Path(__file__).resolve().parent / "references"
#: Walkers of the stored B3 reference chains, and the autocorrelation times dropped from their
#: start (`make_references.py`); `load_reference` needs them for the chains' Monte Carlo error.
REFERENCE_WALKERS = 64
REFERENCE_BURN_TAU = 5

Model = Callable[[np.ndarray], np.ndarray]


@dataclass
class Reference:
    """A reference posterior: draws in physical units, with their mean and sd.

    ``mc_error`` is the Monte Carlo sd of the reference mean in posterior sd: 0 where mean and
    sd are exact (analytic or quadrature), the chain's and the subsample's for stored draws.
    """

    draws: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    cov: np.ndarray
    source: str
    mc_error: float = 0.0


@dataclass
class Problem:
    """One benchmark setting.

    Attributes
    ----------
    key : str
        Short label, e.g. ``"B3-delta4"``.
    model : callable
        Vectorised simulator, ``(n, dim) -> (n, output_size)``.
    spec_dict : dict
        Spec for `CalibrationSpec.from_dict` (design, surrogate and budget included).
    prior_mean, prior_sd : ndarray, shape (dim,)
    reference : callable
        Returns the `Reference` (computed or loaded on demand).
    """

    key: str
    model: Model
    spec_dict: dict[str, Any]
    prior_mean: np.ndarray
    prior_sd: np.ndarray
    reference: Callable[[], Reference]
    notes: dict[str, Any] = field(default_factory=dict)

    @property
    def spec(self) -> CalibrationSpec:
        return CalibrationSpec.from_dict(self.spec_dict)

    @property
    def dim(self) -> int:
        return int(self.prior_mean.size)

    def simulator(self) -> Callable[[dict[str, float]], dict[str, list[float]]]:
        """The model as the loop's simulator: ``{name: value} -> {channel: [numbers]}``."""
        names = [p["name"] for p in self.spec_dict["parameters"]]

        def run(values: dict[str, float]) -> dict[str, list[float]]:
            theta = np.array([[values[n] for n in names]])
            return {"y": self.model(theta)[0].tolist()}

        return run

    def log_posterior(self) -> Callable[[np.ndarray], np.ndarray]:
        """Vectorised log posterior of the full model in physical units (up to a constant)."""
        spec = self.spec
        data, sd = spec.data, spec.sd
        m, s = self.prior_mean, self.prior_sd

        def log_post(theta: np.ndarray) -> np.ndarray:
            with np.errstate(all="ignore"):  # far tails: k under- or overflows
                r = (self.model(theta) - data) / sd
                lp = -0.5 * np.sum(r**2, axis=1) - 0.5 * np.sum(((theta - m) / s) ** 2, axis=1)
            return np.where(np.isfinite(lp), lp, -np.inf)

        return log_post


def _spec(
    name: str,
    dim: int,
    data: np.ndarray,
    sd: float,
    *,
    initial_runs: int,
    batch_size: int,
    max_runs: int,
    max_degree: int = 6,
    seed: int = 0,
    prefix: str = "p",
) -> dict[str, Any]:
    return {
        "name": name,
        "parameters": [
            {"name": f"{prefix}{i}", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}}
            for i in range(dim)
        ],
        "observations": [{"name": "y", "values": [float(v) for v in data], "sd": float(sd)}],
        "design": {"initial_runs": initial_runs, "batch_size": batch_size},
        "surrogate": {"max_degree": max_degree, "retain_fraction": 0.5},
        "budget": {"max_runs": max_runs},
        "seed": seed,
    }


def _gaussian_reference(mean: np.ndarray, cov: np.ndarray, n: int, seed: int, source: str):
    rng = np.random.default_rng(seed)
    draws = rng.multivariate_normal(mean, cov, size=n)
    return Reference(draws, mean, np.sqrt(np.diag(cov)), cov, source)


# --------------------------------------------------------------------------- B1


B1_DIM = 10
B1_OBS = 30
B1_SD = 0.1


def b1_linear_gaussian(max_runs: int = 200, seed: int = 0) -> Problem:
    """B1: ``y = A theta + e``, A of shape (30, 10) seeded, prior N(0, I), noise sd 0.1.

    Reference: the Gaussian posterior in closed form, Bishop (2006), Pattern Recognition and
    Machine Learning, eqs. (3.50)-(3.51) with alpha = 1 (prior precision) and beta = 1 / sd^2:
    ``S_N^-1 = alpha I + beta A^T A`` and ``m_N = beta S_N A^T y``.
    """
    rng = np.random.default_rng(101)
    a = rng.normal(size=(B1_OBS, B1_DIM)) / np.sqrt(B1_DIM)
    truth = rng.normal(size=B1_DIM)
    data = a @ truth + B1_SD * rng.normal(size=B1_OBS)

    def model(theta: np.ndarray) -> np.ndarray:
        return np.atleast_2d(theta) @ a.T

    def reference() -> Reference:
        alpha, beta = 1.0, 1.0 / B1_SD**2
        s_n = np.linalg.inv(alpha * np.eye(B1_DIM) + beta * a.T @ a)  # PRML (3.51)
        m_n = beta * s_n @ a.T @ data  # PRML (3.50)
        return _gaussian_reference(m_n, s_n, 8000, 7, "closed form, Bishop 2006 (3.50)-(3.51)")

    spec = _spec(
        "B1", B1_DIM, data, B1_SD, initial_runs=44, batch_size=22, max_runs=max_runs, seed=seed
    )
    return Problem("B1", model, spec, np.zeros(B1_DIM), np.ones(B1_DIM), reference)


# --------------------------------------------------------------------------- B2

#: Observation times of the one-parameter model.
B2_TIMES = np.array([0.25, 0.5, 0.75, 1.0])
#: True parameter, in prior sd from the prior mean.
B2_TRUTH = 1.3
#: Noise levels from weak (posterior near the prior's width) to very informative.
B2_NOISE = {"weak": 0.5, "moderate": 0.05, "strong": 5e-3, "concentrated": 5e-4}


def b2_model(theta: np.ndarray) -> np.ndarray:
    """``y(t) = exp(theta t) + 0.4 sin(3 theta t)`` at the observation times; (n, 1) -> (n, 4)."""
    th = np.atleast_2d(theta)[:, :1]
    return np.exp(th * B2_TIMES) + 0.4 * np.sin(3.0 * th * B2_TIMES)


def b2_nonlinear(level: str, max_runs: int = 60, seed: int = 0) -> Problem:
    """B2 at one noise level; reference by dense quadrature of the posterior density.

    The unnormalised density is tabulated on a grid covering +-12 Laplace sd around the mode
    (the mass outside is below 1e-30), normalised with `scipy.integrate.simpson`; draws come
    from inverting its cumulative trapezoid integral.
    """
    sd = B2_NOISE[level]
    rng = np.random.default_rng(202)
    data = b2_model(np.array([[B2_TRUTH]]))[0] + sd * rng.normal(size=B2_TIMES.size)

    def log_post(x: np.ndarray) -> np.ndarray:
        r = (b2_model(x[:, None]) - data) / sd
        return -0.5 * np.sum(r**2, axis=1) - 0.5 * x**2

    def reference() -> Reference:
        grid = np.linspace(-8.0, 8.0, 20001)
        mode = grid[np.argmax(log_post(grid))]
        mode = optimize.minimize_scalar(
            lambda t: -log_post(np.array([t]))[0], bracket=(mode - 0.01, mode, mode + 0.01)
        ).x
        h = 1e-4 * max(sd, 1e-3)
        curv = (
            -(
                log_post(np.array([mode + h]))[0]
                - 2 * log_post(np.array([mode]))[0]
                + log_post(np.array([mode - h]))[0]
            )
            / h**2
        )
        width = 12.0 / np.sqrt(max(curv, 1.0))
        x = np.linspace(mode - width, mode + width, 40001)
        lp = log_post(x)
        p = np.exp(lp - lp.max())
        z = integrate.simpson(p, x=x)
        p /= z
        mean = integrate.simpson(x * p, x=x)
        var = integrate.simpson((x - mean) ** 2 * p, x=x)
        cdf = integrate.cumulative_trapezoid(p, x, initial=0.0)
        cdf /= cdf[-1]
        u = (np.arange(8000) + np.random.default_rng(9).random(8000)) / 8000
        draws = np.interp(u, cdf, x)[:, None]
        return Reference(
            draws,
            np.array([mean]),
            np.array([np.sqrt(var)]),
            np.array([[var]]),
            "dense quadrature, scipy.integrate.simpson on 40001 points",
        )

    spec = _spec(
        f"B2-{level}",
        1,
        data,
        sd,
        initial_runs=8,
        batch_size=4,
        max_runs=max_runs,
        max_degree=8,
        seed=seed,
    )
    return Problem(f"B2-{level}", b2_model, spec, np.zeros(1), np.ones(1), reference)


# --------------------------------------------------------------------------- B3: KL expansion


def kl_analytic(n_modes: int, corr_length: float, sigma: float, half_width: float = 0.5):
    """Eigenpairs of ``C(x, y) = sigma^2 exp(-|x - y| / L)`` on ``[-a, a]`` in closed form.

    Ghanem and Spanos (1991), Stochastic Finite Elements: A Spectral Approach, ch. 2: with
    ``c = 1 / L`` the eigenvalues are ``sigma^2 2 c / (w^2 + c^2)``; ``w`` alternates between the
    roots of ``c - w tan(w a) = 0`` (even eigenfunctions ``cos(w x) / sqrt(a + sin(2 w a) /
    (2 w))``) and of ``w + c tan(w a) = 0`` (odd eigenfunctions ``sin(w x) / sqrt(a - sin(2 w a)
    / (2 w))``). The n-th root (n = 1, 2, ...) lies in ``((n - 1) pi / (2 a), n pi / (2 a))``.

    Returns
    -------
    eigenvalues : ndarray, shape (n_modes,)
        Decreasing.
    eigenfunction : callable
        ``x -> (len(x), n_modes)`` on ``[-a, a]``, orthonormal in L2.
    """
    c, a = 1.0 / corr_length, half_width
    w = np.empty(n_modes)
    even = np.zeros(n_modes, bool)
    eps = 1e-12
    for n in range(1, n_modes + 1):
        lo, hi = (n - 1) * np.pi / (2 * a) + eps, n * np.pi / (2 * a) - eps
        if n % 2:  # even eigenfunction
            f = lambda v: c * np.cos(v * a) - v * np.sin(v * a)  # noqa: E731
            even[n - 1] = True
        else:
            f = lambda v: v * np.cos(v * a) + c * np.sin(v * a)  # noqa: E731
        w[n - 1] = optimize.brentq(f, lo, hi, xtol=1e-14)
    lam = sigma**2 * 2 * c / (w**2 + c**2)
    norm = np.where(even, a + np.sin(2 * w * a) / (2 * w), a - np.sin(2 * w * a) / (2 * w))

    def phi(x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)[:, None]
        vals = np.where(even, np.cos(w * x), np.sin(w * x))
        return vals / np.sqrt(norm)

    return lam, phi


def kl_nystrom(
    n_modes: int, corr_length: float, sigma: float, n_points: int, half_width: float = 0.5
):
    """Eigenpairs of the same kernel by the Nystrom method with the midpoint rule.

    Returns eigenvalues (decreasing), the midpoints, and the eigenfunctions at them, shape
    ``(n_points, n_modes)``, normalised so that ``h sum phi_i phi_j = delta_ij``.
    """
    a = half_width
    h = 2 * a / n_points
    x = -a + h * (np.arange(n_points) + 0.5)
    k = sigma**2 * np.exp(-np.abs(x[:, None] - x[None, :]) / corr_length)
    vals, vecs = np.linalg.eigh(h * k)
    order = np.argsort(vals)[::-1][:n_modes]
    return vals[order], x, vecs[:, order] / np.sqrt(h)


# --------------------------------------------------------------------------- B3: solver

#: Cells of the finite-volume grid on (0, 1); sensors sit on its nodes.
B3_CELLS = 128
#: Sensors at x = j / 16, j = 1..15.
B3_SENSORS = np.arange(1, 16) * (B3_CELLS // 16)
#: Correlation length and sd of log k.
B3_LENGTH = 0.3
B3_SIGMA = 1.0
#: Noise sd: moderate, and small for the concentrated settings (u is of order 0.1).
B3_NOISE = {"moderate": 2e-3, "concentrated": 5e-4}


class EllipticKL:
    """``-(k u')' = 1`` on (0, 1), ``u(0) = u(1) = 0``, ``log k = sum sqrt(lam_i) phi_i xi_i``.

    Finite volumes on `B3_CELLS` cells: nodes ``x_i = i h``, ``k`` evaluated at cell faces
    (midpoints between nodes), giving a symmetric tridiagonal system for the interior nodes,
    solved by the Thomas algorithm vectorised over parameter sets (one Python loop over the
    grid, numpy over the sets). Second-order accurate in h.
    """

    def __init__(self, n_modes: int, cells: int = B3_CELLS) -> None:
        self.n_modes = n_modes
        self.cells = cells
        self.h = 1.0 / cells
        lam, phi = kl_analytic(n_modes, B3_LENGTH, B3_SIGMA)
        faces = (np.arange(cells) + 0.5) * self.h
        # On (0, 1) the eigenpairs are those on [-1/2, 1/2] shifted by 1/2.
        self.modes = phi(faces - 0.5) * np.sqrt(lam)  # (cells, n_modes)
        self.eigenvalues = lam

    def log_k(self, xi: np.ndarray) -> np.ndarray:
        """``log k`` at the cell faces, shape ``(n, cells)``."""
        return np.atleast_2d(xi) @ self.modes.T

    def solve(self, xi: np.ndarray) -> np.ndarray:
        """``u`` at every node, shape ``(n, cells + 1)`` (zeros at both ends)."""
        k = np.exp(self.log_k(xi))  # k[:, j] between nodes j and j+1
        n, m = k.shape[0], self.cells - 1
        h2 = self.h**2
        diag = (k[:, :-1] + k[:, 1:]) / h2  # interior node i = 1..m uses faces i-1, i
        off = -k[:, 1:-1] / h2  # coupling between interior nodes i and i+1
        rhs = np.ones((n, m))
        cp = np.empty((n, m))
        dp = np.empty((n, m))
        cp[:, 0] = off[:, 0] / diag[:, 0] if m > 1 else 0.0
        dp[:, 0] = rhs[:, 0] / diag[:, 0]
        for i in range(1, m):
            denom = diag[:, i] - off[:, i - 1] * cp[:, i - 1]
            if i < m - 1:
                cp[:, i] = off[:, i] / denom
            dp[:, i] = (rhs[:, i] - off[:, i - 1] * dp[:, i - 1]) / denom
        u = np.zeros((n, self.cells + 1))
        u[:, m] = dp[:, m - 1]
        for i in range(m - 2, -1, -1):
            u[:, i + 1] = dp[:, i] - cp[:, i] * u[:, i + 2]
        return u

    def __call__(self, xi: np.ndarray) -> np.ndarray:
        """``u`` at the sensors, shape ``(n, len(B3_SENSORS))``."""
        return self.solve(xi)[:, B3_SENSORS]


def b3_truth(n_modes: int, delta: float) -> np.ndarray:
    """True KL coordinates: ``delta`` times a fixed seeded unit vector, so the truth lies
    ``delta`` prior sd (Mahalanobis) from the prior mean; delta = 0 (the moderate setting)
    uses distance 1, a prior-typical point."""
    v = np.random.default_rng(303).normal(size=15)[:n_modes]
    v /= np.linalg.norm(v)
    return (delta if delta > 0 else 1.0) * v


def b3_elliptic(
    setting: str,
    delta: float = 0.0,
    n_modes: int = 15,
    max_runs: int = 400,
    seed: int = 0,
    initial_runs: int | None = None,
    batch_size: int | None = None,
) -> Problem:
    """B3: the elliptic problem at ``setting`` in {"moderate", "concentrated"}.

    Reference: draws stored by `make_references.py` (a long emcee run on the full model);
    loaded on demand. For reduced versions (other n_modes) there is no stored reference.
    """
    sd = B3_NOISE[setting]
    model = EllipticKL(n_modes)
    truth = b3_truth(n_modes, delta)
    rng = np.random.default_rng(404)
    data = model(truth[None, :])[0] + sd * rng.normal(size=B3_SENSORS.size)
    key = "B3-moderate" if setting == "moderate" else f"B3-delta{delta:g}"
    if n_modes != 15:
        key += f"-m{n_modes}"
    spec = _spec(
        key,
        n_modes,
        data,
        sd,
        initial_runs=initial_runs or 4 * (n_modes + 1),
        batch_size=batch_size or 2 * (n_modes + 1),
        max_runs=max_runs,
        max_degree=5,
        seed=seed,
        prefix="xi",
    )
    problem = Problem(key, model, spec, np.zeros(n_modes), np.ones(n_modes), lambda: None)  # type: ignore[arg-type,return-value]
    problem.notes = {"truth": truth.tolist(), "noise_sd": sd}

    def reference() -> Reference:
        return load_reference(problem)

    problem.reference = reference
    return problem


#: Significant digits of the observations in the fingerprint: the data are made by the solver
#: and a seeded noise draw, whose last bits can differ between numpy builds and CPUs (seen: a
#: stored hash that no longer matched although the least-squares mode agreed with the stored
#: one to 1e-6); 10 digits is far below the noise (sd 5e-4 on values of order 0.1) and far
#: above rounding.
HASH_DIGITS = 10


def problem_hash(problem: Problem) -> str:
    """Fingerprint of what a stored reference depends on: the data, noise and prior."""
    observations = [
        {**obs, "values": [float(f"{v:.{HASH_DIGITS}g}") for v in obs["values"]]}
        for obs in problem.spec_dict["observations"]
    ]
    blob = json.dumps(
        {
            "observations": observations,
            "prior": [p["prior"] for p in problem.spec_dict["parameters"]],
            "cells": B3_CELLS,
            "length": B3_LENGTH,
            "sigma": B3_SIGMA,
        },
        sort_keys=True,
    )
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def load_reference(problem: Problem) -> Reference:
    """The stored reference of a B3 problem; raises if missing or made for another problem."""
    path = REFERENCES / f"{problem.key}.npz"
    if not path.exists():
        raise FileNotFoundError(f"{path} is missing: run tests/benchmarks/make_references.py")
    with np.load(path, allow_pickle=False) as f:
        stored = str(f["problem_hash"])
        if stored != problem_hash(problem):
            raise ValueError(
                f"{path} was made for another version of {problem.key} "
                f"({stored} != {problem_hash(problem)}): rerun make_references.py"
            )
        draws = f["draws"]
        tau_multiple = float(f["tau_multiple"])
        source = f"long emcee run on the full model ({int(f['n_steps'])} steps, "
        source += f"{tau_multiple:.0f} tau), {path.name}"
    return Reference(
        draws,
        draws.mean(0),
        draws.std(0, ddof=1),
        np.cov(draws, rowvar=False),
        source,
        mc_error=_stored_mc_error(draws.shape[0], tau_multiple),
    )


def _stored_mc_error(n_draws: int, tau_multiple: float) -> float:
    """Monte Carlo sd, in posterior sd, of the mean of ``n_draws`` stored reference draws.

    The chain's effective size is ``walkers * (length - burn) / tau``; the stored draws are a
    random subset of its thinned draws, which adds at most the variance of a mean of
    ``n_draws`` independent draws (B3: 64 walkers, about 110 tau, 8000 draws: 0.016 sd).
    """
    chain_ess = REFERENCE_WALKERS * (tau_multiple - REFERENCE_BURN_TAU)
    return float(np.sqrt(1.0 / chain_ess + 1.0 / n_draws))


def b3_settings() -> list[tuple[str, float]]:
    return [("moderate", 0.0)] + [("concentrated", d) for d in (1.0, 2.0, 4.0, 8.0)]


def all_problems(seed: int = 0) -> list[Problem]:
    """Every benchmark setting, with the engine (and the global design) seeded by ``seed``;
    the data and references do not depend on it."""
    out = [b1_linear_gaussian(seed=seed)]
    out += [b2_nonlinear(level, seed=seed) for level in B2_NOISE]
    out += [b3_elliptic(s, d, seed=seed) for s, d in b3_settings()]
    return out
