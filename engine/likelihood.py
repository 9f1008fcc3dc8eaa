"""Whitened residuals, their reduction to a few components, and the Gaussian log-likelihood.

Every run's outputs become residuals in noise units, ``w = (y - data) / sd``. With independent
Gaussian noise the log-likelihood is ``-||w||^2 / 2`` plus a constant. Many outputs are reduced
to a few weighted principal components of the retained runs' residuals, so the surrogate fits
``k`` components whatever the output length, and evaluating the likelihood costs ``O(k)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from honing.engine.spec import CalibrationSpec

__all__ = [
    "ENERGY_FRACTION",
    "MAX_COMPONENTS",
    "OutputReduction",
    "log_likelihood",
    "noise_scale_draws",
    "whiten",
]

#: Share of the retained runs' residual variance the components keep (common practice: 0.999
#: to 0.9999 for smooth simulator outputs); what is dropped is carried as `residual_energy`.
ENERGY_FRACTION = 0.9999
#: Variance of a component's scores, in squared noise units, above which it is kept whatever
#: its share: a direction the retained runs barely vary in can still move the misfit by more
#: than 0.01 when the posterior is much narrower than the runs' spread.
MIN_COMPONENT_VAR = 1e-4
#: Cap on the number of components, which bounds the surrogate's cost for long outputs.
MAX_COMPONENTS = 30
#: Columns of the random range of the large-matrix route: `MAX_COMPONENTS` plus 10 oversamples
#: (Halko, Martinsson and Tropp, 2011, SIAM Review 53(2), sec. 4.2, suggest 5 to 10).
RANGE_SIZE = MAX_COMPONENTS + 10
#: Both sides of the residual matrix longer than this many times `RANGE_SIZE` take the random
#: range: there its four passes over the matrix cost a quarter or less of an exact
#: cross-product.
RANDOM_ROUTE_FACTOR = 16


def whiten(spec: CalibrationSpec, outputs: np.ndarray) -> np.ndarray:
    """Residuals in noise units, ``(outputs - data) / sd``.

    Parameters
    ----------
    outputs : ndarray, shape (n_runs, output_size) or (output_size,)

    Returns
    -------
    ndarray, the same shape as `outputs`
    """
    outputs = np.asarray(outputs, dtype=float)
    if outputs.shape[-1] != spec.output_size:
        raise ValueError(
            f"outputs have {outputs.shape[-1]} values per run, expected {spec.output_size}"
        )
    out = np.subtract(outputs, spec.data)
    out /= spec.sd  # in place: one array of outputs' size allocated, not two
    return out


@dataclass
class OutputReduction:
    """Weighted principal components of whitened residuals.

    Attributes
    ----------
    mean : ndarray, shape (output_size,)
        Weighted mean residual of the retained runs.
    components : ndarray, shape (output_size, n_components)
        Orthonormal columns spanning the kept share of the residuals' variation.
    residual_energy : float
        Weighted mean over runs of the squared norm of what the components miss: the part of
        ``||w||^2`` the reduced likelihood cannot see, added to it as a constant.
    """

    mean: np.ndarray
    components: np.ndarray
    residual_energy: float

    @property
    def n_components(self) -> int:
        return int(self.components.shape[1])

    @classmethod
    def fit(
        cls, residuals: np.ndarray, weights: np.ndarray, energy: float = ENERGY_FRACTION
    ) -> OutputReduction:
        """Fit the components to the weighted, centred residuals ``X``.

        Components are kept until they hold `energy` of the variance, and every component
        whose variance reaches `MIN_COMPONENT_VAR` is kept too, up to `MAX_COMPONENTS`. What
        they miss is `residual_energy`, the total sum of squares less the variance the kept
        components actually hold, so the truncation is accounted for exactly whichever route
        found them (see `_spectrum`).
        """
        w = np.asarray(weights, dtype=float) / np.sum(weights)
        mean = w @ residuals
        centred = residuals - mean
        centred *= np.sqrt(w)[:, None]  # in place: long outputs make this the largest array
        var, vectors = _spectrum(centred)
        total = float(np.vdot(centred, centred))
        k = 1
        if total > 0.0:
            k = int(np.searchsorted(np.cumsum(var) / total, energy) + 1)
            k = max(k, int(np.count_nonzero(var >= MIN_COMPONENT_VAR)))
        k = max(1, min(k, MAX_COMPONENTS, var.size, int(np.count_nonzero(var > 0.0)) or 1))
        components = vectors[:, :k]
        kept = float(np.sum((centred @ components) ** 2))  # exact for this basis, any route
        return cls(mean=mean, components=components, residual_energy=max(total - kept, 0.0))

    def project_with_loss(self, residuals: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Component scores and, per run, the squared norm of what they miss.

        With orthonormal components, ``||r - mean - V t||^2 = ||r - mean||^2 - ||t||^2`` for
        ``t = V^T (r - mean)``, so the loss needs no rebuilt residuals: on long outputs that
        saves a pass of ``n_runs x output_size``. The difference is clipped at 0 (rounding).
        """
        centred = residuals - self.mean
        scores = centred @ self.components
        loss = np.einsum("ij,ij->i", centred, centred) - np.einsum("ij,ij->i", scores, scores)
        return scores, np.maximum(loss, 0.0)

    def reconstruct(self, scores: np.ndarray) -> np.ndarray:
        """Residuals rebuilt from scores, shape ``(n_points, output_size)``."""
        return self.mean + scores @ self.components.T

    def reconstruct_by_output(self, scores: np.ndarray) -> np.ndarray:
        """Residuals rebuilt from scores in single precision, one row per output value,
        shape ``(output_size, n_points)``: the layout per-value statistics over points
        (predictive bands) read contiguously."""
        out = self.components.astype(np.float32) @ scores.T.astype(np.float32)
        out += self.mean.astype(np.float32)[:, None]
        return out

    def misfit(self, scores: np.ndarray) -> np.ndarray:
        """``||w||^2`` of each point from its scores, shape ``(n_points,)``.

        With orthonormal components, ``||mean + V c||^2 = ||V^T mean + c||^2 + ||(I - V V^T)
        mean||^2``; the energy the components miss is added as its mean over the runs.
        """
        offset, constant = self._misfit_terms
        return np.sum((scores + offset) ** 2, axis=1) + constant

    @cached_property
    def _misfit_terms(self) -> tuple[np.ndarray, float]:
        """``V^T mean`` and the constant part of the misfit, computed once: the sampler calls
        `misfit` thousands of times, and each would otherwise cost ``O(output_size)``."""
        offset = self.mean @ self.components
        outside = float(self.mean @ self.mean - offset @ offset)
        return offset, outside + self.residual_energy

    def to_payload(self, prefix: str) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return (
            {"residual_energy": self.residual_energy},
            {f"{prefix}mean": self.mean, f"{prefix}components": self.components},
        )

    @classmethod
    def from_payload(
        cls, meta: dict[str, Any], arrays: dict[str, np.ndarray], prefix: str
    ) -> OutputReduction:
        return cls(
            mean=arrays[f"{prefix}mean"],
            components=arrays[f"{prefix}components"],
            residual_energy=float(meta["residual_energy"]),
        )


def log_likelihood(misfit: np.ndarray, n_values: int, estimate_noise: bool) -> np.ndarray:
    """Gaussian log-likelihood from ``||w||^2``, up to a constant.

    With a known sd it is ``-misfit / 2``. With one unknown multiplier ``s`` on every sd and
    the scale-invariant prior ``p(s) ∝ 1/s``, ``s`` is integrated out exactly:
    ``∫ s^{-N-1} exp(-misfit / (2 s^2)) ds ∝ misfit^{-N/2}``.

    Parameters
    ----------
    misfit : ndarray, shape (n_points,)
        Sum of squared whitened residuals at each point.
    n_values : int
        Number of observed values ``N``.
    estimate_noise : bool
        Whether the noise multiplier is marginalised.

    References
    ----------
    .. [1] Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., sect. 3.2 (normal model
       with unknown variance and the noninformative prior on the scale).
    """
    misfit = np.asarray(misfit, dtype=float)
    if estimate_noise:
        return -0.5 * n_values * np.log(np.maximum(misfit, np.finfo(float).tiny))
    return -0.5 * misfit


def noise_scale_draws(misfit: np.ndarray, n_values: int, rng: np.random.Generator) -> np.ndarray:
    """Draw the noise multiplier ``s`` given each point's misfit.

    Under ``p(s) ∝ 1/s``, ``s^2 | theta, data`` is inverse-gamma with shape ``N/2`` and scale
    ``misfit/2``, so ``s = sqrt(misfit / chi2_N)``: exact, no extra sampling dimension.

    Parameters
    ----------
    misfit : ndarray, shape (n_points,)
    n_values : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n_points,)
    """
    # A misfit is a sum of squares, but its constant part (`OutputReduction.misfit`) is a
    # difference of two: where the surrogate reproduces the data exactly, rounding can leave
    # it a hair below 0 (-1.3e-15 seen), and its square root would be NaN. The log-likelihood
    # clamps it the same way; a constant offset of that size changes nothing else.
    misfit = np.maximum(np.asarray(misfit, dtype=float), 0.0)
    return np.sqrt(misfit / rng.chisquare(n_values, size=np.shape(misfit)))


def _spectrum(centred: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Variances (descending) and orthonormal output-space directions of ``centred``.

    Parameters
    ----------
    centred : ndarray, shape (n_runs, output_size)

    Returns
    -------
    var : ndarray, shape (r,)
        The leading ``r = min(MAX_COMPONENTS, n_runs, output_size)`` variances.
    vectors : ndarray, shape (output_size, r)

    Notes
    -----
    Three routes, by shape. With fewer outputs than runs: the eigenvectors of ``X^T X``. With
    fewer runs: those of the Gram matrix ``X X^T``, as ``V = X^T U / s``, so that memory stays
    linear in the output length. Both are exact, with eigenvalues accurate to about machine
    epsilon times the largest, far below `MIN_COMPONENT_VAR` at the scales met here. When
    both sides are long (many runs of long series), an exact cross-product costs
    ``O(n_runs output_size min(n_runs, output_size))``; there the directions come from the
    span of ``X`` times `RANGE_SIZE` Gaussian vectors (the randomized range finder of Halko,
    Martinsson and Tropp, 2011, Algorithm 4.1), ``O(n_runs output_size RANGE_SIZE)``: for the
    smooth, fast-decaying spectra of simulator outputs the leading components agree with the
    exact ones, and whatever the range misses is carried in `residual_energy` all the same.
    The Gaussian vectors come from a fixed seed, so a fit is reproducible.
    """
    n, m = centred.shape
    if min(n, m) > RANDOM_ROUTE_FACTOR * RANGE_SIZE:
        probe = np.random.default_rng(0).standard_normal((m, RANGE_SIZE))
        basis, _ = np.linalg.qr(centred @ probe)  # (n, RANGE_SIZE): the range of X
        projected = basis.T @ centred  # (RANGE_SIZE, m)
        return _right_vectors(projected)
    if m <= n:
        return _descending(centred.T @ centred)
    return _right_vectors(centred)


def _right_vectors(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Leading eigenpairs of ``A^T A`` from those of the smaller ``A A^T``: ``V = A^T U / s``."""
    var, u = _descending(matrix @ matrix.T)
    return var, matrix.T @ (u / np.sqrt(np.maximum(var, np.finfo(float).tiny)))


def _descending(gram: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The leading `MAX_COMPONENTS` eigenpairs of a symmetric matrix, largest first."""
    var, vectors = np.linalg.eigh(gram)
    r = min(MAX_COMPONENTS, var.size)
    return np.maximum(var[::-1][:r], 0.0), vectors[:, ::-1][:, :r]
