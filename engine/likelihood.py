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
    return (outputs - spec.data) / spec.sd


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
        """Fit the components from the eigenvectors of the smaller of the weighted, centred
        residuals' two cross-product matrices.

        With fewer outputs than runs, the components are the eigenvectors of the ``(output_size,
        output_size)`` matrix ``X^T X``. Otherwise the ``(n_runs, n_runs)`` Gram matrix ``X X^T``
        (one matrix product, ``O(n_runs^2 output_size)`` at BLAS-3 speed) gives them as
        ``V = X^T U / s``: the thin SVD of ``X`` without an output-by-output matrix, so memory
        stays linear in the output length. Both are exact; eigenvalues are accurate to about
        machine epsilon times the largest, far below `MIN_COMPONENT_VAR` at the scales met here.

        Components are kept until they hold `energy` of the variance, and every component
        whose variance reaches `MIN_COMPONENT_VAR` is kept too, up to `MAX_COMPONENTS`.
        """
        w = np.asarray(weights, dtype=float) / np.sum(weights)
        mean = w @ residuals
        centred = (residuals - mean) * np.sqrt(w)[:, None]
        by_outputs = centred.shape[1] <= centred.shape[0]
        var, u = np.linalg.eigh(centred.T @ centred if by_outputs else centred @ centred.T)
        var, u = np.maximum(var[::-1], 0.0), u[:, ::-1]
        total = var.sum()
        k = 1
        if total > 0.0:
            k = int(np.searchsorted(np.cumsum(var) / total, energy) + 1)
            k = max(k, int(np.count_nonzero(var >= MIN_COMPONENT_VAR)))
        k = max(1, min(k, MAX_COMPONENTS, int(np.count_nonzero(var > 0.0)) or 1))
        if by_outputs:
            components = u[:, :k]
        else:
            scale = np.sqrt(np.maximum(var[:k], np.finfo(float).tiny))
            components = centred.T @ (u[:, :k] / scale)
        return cls(mean=mean, components=components, residual_energy=float(var[k:].sum()))

    def project(self, residuals: np.ndarray) -> np.ndarray:
        """Component scores, shape ``(n_runs, n_components)``."""
        return (residuals - self.mean) @ self.components

    def reconstruct(self, scores: np.ndarray) -> np.ndarray:
        """Residuals rebuilt from scores, shape ``(n_points, output_size)``."""
        return self.mean + scores @ self.components.T

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
    return np.sqrt(np.asarray(misfit) / rng.chisquare(n_values, size=np.shape(misfit)))
