"""Moments and Sobol' indices read off the coefficients of an orthonormal polynomial expansion.

For ``f = sum_alpha c_alpha Psi_alpha`` with a basis orthonormal for the input distribution,
the mean is the coefficient of the constant, the variance is the sum of the other squared
coefficients, and the variance of the part of ``f`` that depends on exactly the inputs in a set
``u`` is the sum of ``c_alpha**2`` over the multi-indices whose nonzero entries are exactly
``u``. Sobol' indices are ratios of these sums, with no sampling.

References
----------
.. [1] B. Sudret, "Global sensitivity analysis using polynomial chaos expansions", Reliab.
   Eng. Syst. Saf. 93:964-979, 2008.
.. [2] I. M. Sobol', "Global sensitivity indices for nonlinear mathematical models and their
   Monte Carlo estimates", Math. Comput. Simul. 55:271-280, 2001.
"""

from __future__ import annotations

import numpy as np

__all__ = ["pce_moments", "sobol_indices"]


def _check(indices: np.ndarray, coef: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    indices = np.asarray(indices)
    coef = np.asarray(coef, dtype=float)
    if indices.ndim != 2 or not np.issubdtype(indices.dtype, np.integer):
        raise ValueError(
            f"indices must be an integer array of shape (n_terms, dim), got shape "
            f"{indices.shape} and dtype {indices.dtype}"
        )
    if (indices < 0).any():
        raise ValueError("indices must be non-negative")
    if coef.shape != (indices.shape[0],):
        raise ValueError(f"coef must have shape ({indices.shape[0]},), got {coef.shape}")
    if np.unique(indices, axis=0).shape[0] != indices.shape[0]:
        raise ValueError("indices must not repeat a multi-index")
    return indices, coef


def pce_moments(indices: np.ndarray, coef: np.ndarray) -> tuple[float, float]:
    """Mean and variance of an orthonormal polynomial chaos expansion.

    Parameters
    ----------
    indices : ndarray of int, shape (n_terms, dim)
        Distinct multi-indices of the terms.
    coef : ndarray, shape (n_terms,)

    Returns
    -------
    mean : float
        Coefficient of the constant term (0 if there is none).
    variance : float
        Sum of the squared coefficients of the other terms.

    References
    ----------
    .. [1] B. Sudret, Reliab. Eng. Syst. Saf. 93:964-979, 2008.
    """
    indices, coef = _check(indices, coef)
    constant = ~indices.any(axis=1)
    return float(coef[constant].sum()), float(np.sum(coef[~constant] ** 2))


def sobol_indices(indices: np.ndarray, coef: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First-order and total Sobol' indices of an orthonormal polynomial chaos expansion.

    Parameters
    ----------
    indices : ndarray of int, shape (n_terms, dim)
        Distinct multi-indices of the terms.
    coef : ndarray, shape (n_terms,)

    Returns
    -------
    first : ndarray, shape (dim,)
        ``S_i``: share of the variance from terms in input ``i`` alone.
    total : ndarray, shape (dim,)
        ``S_i^T``: share of the variance from all terms that involve input ``i``.

    Raises
    ------
    ValueError
        If the expansion has zero variance, where the indices are undefined.

    References
    ----------
    .. [1] B. Sudret, Reliab. Eng. Syst. Saf. 93:964-979, 2008.
    """
    indices, coef = _check(indices, coef)
    _, variance = pce_moments(indices, coef)
    if variance == 0.0:
        raise ValueError("the expansion is constant (zero variance): Sobol' indices are undefined")
    used = indices > 0
    squared = coef**2
    alone = used & (used.sum(axis=1) == 1)[:, None]
    return squared @ alone / variance, squared @ used / variance
