"""Trust-weighted sparse least squares for polynomial chaos coefficients.

The runs of a calibration carry trust weights ``w_i >= 0``: every fit here minimises
``sum_i w_i (y_i - phi_i @ b)**2``, done as ordinary least squares on rows scaled by
``sqrt(w_i)``. Sparse fits follow the hybrid least angle regression of Blatman and Sudret:
least angle regression orders the candidate columns, every prefix of that order is refitted by
least squares, and the prefix with the smallest corrected leave-one-out error wins. The
refits share one Gram-Schmidt QR factorisation grown a column at a time, from which the
leave-one-out residuals (through the leverages, the squared row norms of ``Q``) and the
correction factor (through ``R^-1``) follow in ``O(n_samples * n_active + n_active**2)``
per step.

References
----------
.. [1] B. Efron, T. Hastie, I. Johnstone, R. Tibshirani, "Least angle regression", Ann.
   Statist. 32(2):407-499, 2004.
.. [2] G. Blatman, B. Sudret, "Adaptive sparse polynomial chaos expansion based on least
   angle regression", J. Comput. Phys. 230:2345-2367, 2011.
.. [3] O. Chapelle, V. Vapnik, Y. Bengio, "Model selection for small sample regression",
   Machine Learning 48:9-23, 2002.
.. [4] B. Sudret, "Polynomial chaos expansions and stochastic finite element methods", in
   K.-K. Phoon, J. Ching (eds.), *Risk and Reliability in Geotechnical Engineering*, CRC Press,
   2015, chapter 6, eqs. (6.42)-(6.44).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TypeVar

import numpy as np
from scipy import linalg
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import lars_path

from honing.engine.bases import PolynomialBasis, count_total_degree_indices, total_degree_indices
from honing.engine.priors import Family

__all__ = [
    "SharedFit",
    "SparseFit",
    "fit_degree_adaptive",
    "fit_degree_adaptive_shared",
    "fit_shared_sparse",
    "fit_sparse",
    "loo_residuals",
]

#: A column whose part orthogonal to the columns before it is below this fraction of its norm
#: is treated as linearly dependent on them. About sqrt(machine epsilon): a least-squares
#: solution by QR then keeps at least half of the double-precision digits.
DEPENDENCE_RTOL = 1.5e-8
#: Leverages are sums of squares of rows of an orthonormal ``Q``, exact to a few hundred ulps;
#: a point with ``1 - h`` below this has leverage 1 and no defined leave-one-out residual.
LEVERAGE_FLOOR = 1e-10
#: Relative squared errors below this are treated as an exact fit, so that among exact fits
#: the smallest set wins instead of one that also fits rounding noise: residuals of 1e-10 of
#: the spread of ``y`` are the accuracy of a least-squares solution with condition number
#: 1e6 in double precision (condition number times machine epsilon).
EXACT_FIT_FLOOR = 1e-20
#: Least angle regression steps computed first: FIRST_PATH_STEPS, or this fraction of the
#: number of samples if more. Sparse fits keep some 10-20 % as many terms as there are samples
#: (the Ishigami function on 150 runs: 20-30 terms; 500 runs in 15 dimensions: 80-90), and
#: the path goes on to about twice the best size (see PATH_PATIENCE_FRACTION), so one path
#: usually suffices. The path is recomputed with twice as many steps while it does not.
FIRST_PATH_STEPS = 32
FIRST_PATH_FRACTION = 0.4
#: Bound on the LAR steps per column the path may contribute. Steps that only turn the
#: direction (an active coefficient about to change sign) are few on a healthy path; past
#: this many the path is cycling at a degenerate end.
PATH_STEPS_PER_COLUMN = 2
#: The path is abandoned once the error has not improved for PATH_PATIENCE steps and for
#: PATH_PATIENCE_FRACTION times the size of the best set so far, whichever is more. When many
#: terms matter about equally the error can stall for a stretch as long as the set before it
#: drops again; waiting as long as the best set is big caught every such case in trials
#: (dense expansions of 56 terms on 150 points), where a fixed wait of 12 steps missed a third.
PATH_PATIENCE = 12
PATH_PATIENCE_FRACTION = 1.0
#: Degrees without a new best error after which `fit_degree_adaptive` stops, once the
#: candidate sets have grown past `CHEAP_CANDIDATES` terms.
DEGREE_PATIENCE = 2
#: Candidate sets of at most this many terms are always fitted: they cost little, and the
#: error need not fall with every degree (on B2 at weak noise, seed 2, degrees 5 to 7 added
#: nothing to the 5 terms of degree 4 and degree 8 cut the error by a factor of 46).
CHEAP_CANDIDATES = 100
#: Candidate bases with more than this many columns per sample of positive weight are not
#: tried: it bounds the cost of the path and how far the selection may be underdetermined.
CANDIDATES_PER_SAMPLE = 10


@dataclass
class SparseFit:
    """A sparse least-squares fit on a subset of candidate columns.

    Attributes
    ----------
    columns : ndarray of int, shape (n_active,)
        Sorted indices of the selected candidate columns; always contains 0, the constant.
    coef : ndarray, shape (n_active,)
        Weighted least-squares coefficients of the selected columns.
    loo_error : float
        Corrected relative leave-one-out error: the weighted mean of squared leave-one-out
        residuals over the weighted variance of ``y``, times the factor ``T(P, N)``.
    """

    columns: np.ndarray
    coef: np.ndarray
    loo_error: float

    @property
    def loo_error_total(self) -> float:
        """The error the degree search compares (for one target, `loo_error` itself)."""
        return self.loo_error


def _check_data(
    phi: np.ndarray, y: np.ndarray, sample_weight: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The design, the target and the weights as validated float arrays."""
    phi = np.asarray(phi, dtype=float)
    if phi.ndim != 2 or phi.shape[1] < 1:
        raise ValueError(
            f"phi must have shape (n_samples, n_columns) with n_columns >= 1, got {phi.shape}"
        )
    if not np.isfinite(phi).all():
        raise ValueError("phi must be finite")
    y, weights = _check_target(y, sample_weight, phi.shape[0])
    return phi, y, weights


def _check_target(
    y: np.ndarray, sample_weight: np.ndarray | None, n_samples: int
) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y, dtype=float)
    if y.shape != (n_samples,):
        raise ValueError(f"y must have shape ({n_samples},), got {y.shape}")
    if not np.isfinite(y).all():
        raise ValueError("y must be finite")
    if sample_weight is None:
        return y, np.ones(n_samples)
    weights = np.asarray(sample_weight, dtype=float)
    if weights.shape != (n_samples,):
        raise ValueError(f"sample_weight must have shape ({n_samples},), got {weights.shape}")
    if not np.isfinite(weights).all() or (weights < 0.0).any():
        raise ValueError("sample_weight must be finite and non-negative")
    return y, weights


def loo_residuals(
    phi: np.ndarray, y: np.ndarray, sample_weight: np.ndarray | None = None
) -> np.ndarray:
    """Leave-one-out residuals of a weighted least-squares fit, in closed form.

    With ``e_i = y_i - phi_i @ b`` the residuals of the weighted fit on all points and
    ``h_i`` the diagonal of the hat matrix of the row-scaled system
    ``W^1/2 phi (phi^T W phi)^-1 phi^T W^1/2``, the residual at point ``i`` of the fit without
    point ``i`` is ``e_i / (1 - h_i)``.

    Parameters
    ----------
    phi : ndarray, shape (n_samples, n_columns)
        Design matrix; with the weights it must have full column rank.
    y : ndarray, shape (n_samples,)
    sample_weight : ndarray, shape (n_samples,), optional
        Non-negative weights; equal weights by default.

    Returns
    -------
    ndarray, shape (n_samples,)
        ``+inf`` at points of leverage 1 (the others determine nothing there).

    References
    ----------
    .. [1] D. A. Belsley, E. Kuh, R. E. Welsch, *Regression Diagnostics*, Wiley, 1980.
    """
    phi, y, weights = _check_data(phi, y, sample_weight)
    root = np.sqrt(weights)
    q, r, perm = linalg.qr(phi * root[:, None], mode="economic", pivoting=True)
    pivots = np.abs(np.diag(r))
    if phi.shape[0] < phi.shape[1] or pivots[-1] <= DEPENDENCE_RTOL * pivots[0]:
        raise ValueError(
            f"phi with the weights must have full column rank {phi.shape[1]}; got shape "
            f"{phi.shape} with a column dependent on the others (or too few rows)"
        )
    coef = np.empty(phi.shape[1])
    coef[perm] = linalg.solve_triangular(r, q.T @ (root * y))
    return _deleted(y - phi @ coef, np.einsum("ij,ij->i", q, q))


def _deleted(residuals: np.ndarray, leverage: np.ndarray) -> np.ndarray:
    """``residuals / (1 - leverage)``, ``+inf`` where the leverage is 1."""
    gap = 1.0 - leverage
    defined = gap > LEVERAGE_FLOOR
    out = np.full(residuals.shape, np.inf)
    out[defined] = residuals[defined] / gap[defined]
    return out


def _path_error(
    residual: np.ndarray,
    leverage: np.ndarray,
    spread: float,
    n_active: int,
    n_samples: int,
    trace: float,
) -> float:
    """Corrected relative leave-one-out error of one active set.

    ``residual`` and ``leverage`` are those of the row-scaled system, so the sum of squared
    deleted residuals is the weighted sum ``sum_i w_i (e_i / (1 - h_i))**2``. ``trace`` is
    ``tr(C^-1) / N`` with the weighted empirical Gram matrix ``C``.
    """
    relative = float(np.sum(_deleted(residual, leverage) ** 2)) / spread
    correction = n_samples / (n_samples - n_active) * (1.0 + trace)
    return max(relative * correction, EXACT_FIT_FLOOR)


def _patience(best_size: int) -> int:
    """Steps without a new best error after which the path is abandoned."""
    return max(PATH_PATIENCE, math.ceil(PATH_PATIENCE_FRACTION * best_size))


def _scan_path(
    a: np.ndarray,
    c: np.ndarray,
    order: np.ndarray,
    n_samples: int,
    spread: float,
    weight_total: float,
) -> tuple[list[int], float, np.ndarray, bool]:
    """Score every prefix ``[0, *order[:k]]`` of the path by its corrected LOO error.

    Columns are appended to a QR factorisation ``a[:, active] = Q R`` by Gram-Schmidt with
    one reorthogonalisation, and columns dependent on the active ones are passed over. Each
    step updates the residual, the leverages ``h = sum_k Q[:, k]**2`` and ``R^-1``, whose
    squared Frobenius norm is ``tr((a^T a)^-1)``: ``O(n_rows * k + k**2)`` per step.

    Parameters
    ----------
    a : ndarray, shape (n_rows, n_columns)
        Design with rows scaled by the square roots of the weights.
    c : ndarray, shape (n_rows,)
        Target with rows scaled likewise.
    order : ndarray of int, shape (n_path,)
        Columns in the order least angle regression activated them (column 0 excluded).
    n_samples : int
        Number of rows with positive weight.
    spread : float
        Weighted sum of squares of ``y`` about its weighted mean.
    weight_total : float
        Sum of the weights.

    Returns
    -------
    active : list of int, length n_best
        The best active set, in order of activation.
    error : float
        Its corrected relative leave-one-out error.
    coef : ndarray, shape (n_best,)
        Its weighted least-squares coefficients, in the order of `active`.
    settled : bool
        Whether the error went `_patience` steps without improving or the largest
        admissible set (``n_samples - 2`` columns) was reached, so that a longer path cannot
        change the result.
    """
    n_rows = a.shape[0]
    capacity = min(1 + order.size, n_samples - 2)
    q = np.empty((n_rows, capacity))
    r = np.zeros((capacity, capacity))
    r_inv = np.zeros((capacity, capacity))
    projections = np.empty(capacity)
    residual = c.copy()
    leverage = np.zeros(n_rows)
    frobenius = 0.0
    active: list[int] = []
    best_size, best_error = 0, math.inf
    since_best = 0
    for column in (0, *order.tolist()):
        k = len(active)
        if k == capacity or since_best >= _patience(best_size):
            break
        v = a[:, column].copy()
        coeffs = np.zeros(k)
        for _ in range(2):
            step = q[:, :k].T @ v
            v -= q[:, :k] @ step
            coeffs += step
        rho = float(np.linalg.norm(v))
        if rho <= DEPENDENCE_RTOL * float(np.linalg.norm(a[:, column])):
            continue
        q[:, k] = v / rho
        r[:k, k] = coeffs
        r[k, k] = rho
        r_inv[:k, k] = -(r_inv[:k, :k] @ coeffs) / rho
        r_inv[k, k] = 1.0 / rho
        frobenius += float(r_inv[: k + 1, k] @ r_inv[: k + 1, k])
        projections[k] = q[:, k] @ residual
        residual -= projections[k] * q[:, k]
        leverage += q[:, k] ** 2
        active.append(column)
        # tr(C^-1) / N with C = a^T a / weight_total: weights normalised to mean 1.
        trace = frobenius * weight_total / n_samples
        error = _path_error(residual, leverage, spread, k + 1, n_samples, trace)
        if error < best_error:
            best_size, best_error, since_best = k + 1, error, 0
        else:
            since_best += 1
    coef = linalg.solve_triangular(r[:best_size, :best_size], projections[:best_size])
    settled = since_best >= _patience(best_size) or len(active) == n_samples - 2
    return active[:best_size], best_error, coef, settled


def _lar_order(x: np.ndarray, target: np.ndarray, steps: int) -> tuple[np.ndarray, bool]:
    """Columns of `x` in their order of activation along the first `steps` LAR steps.

    Returns the order and whether the path ended before `steps` (no correlation left, or
    every column active).
    """
    if steps == 0:
        return np.zeros(0, dtype=np.int64), True
    # Nearly collinear candidates are skipped by lars_path with a warning, and where the path
    # degenerates (an almost exact fit) its step lengths can overflow. Neither matters here:
    # the path only proposes an order, and every prefix is refitted and scored on its own,
    # with dependent columns passed over.
    with warnings.catch_warnings(), np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        warnings.simplefilter("ignore", ConvergenceWarning)
        _, active, _, n_iter = lars_path(
            x, target, method="lar", max_iter=steps, return_path=False, return_n_iter=True
        )
    return np.asarray(active, dtype=np.int64), n_iter < steps


def fit_sparse(
    phi: np.ndarray,
    y: np.ndarray,
    sample_weight: np.ndarray | None = None,
    max_active: int | None = None,
) -> SparseFit:
    """Weighted sparse least squares by hybrid least angle regression.

    Column 0 (the constant) is always active. The other columns, with the constant projected
    out and scaled to unit norm in the weighted system, are ordered by least angle regression
    (`sklearn.linear_model.lars_path`); each prefix of the order, with the constant, is refitted
    by weighted least squares and scored by the corrected leave-one-out error

    ``eps = sum_i w_i (e_i / (1 - h_i))**2 / sum_i w_i (y_i - ybar)**2 * T(P, N)``,
    ``T(P, N) = N / (N - P) * (1 + tr(C^-1) / N)``,

    with ``P`` active columns, ``N`` samples of positive weight and the empirical Gram matrix
    ``C = Psi^T W Psi / N`` for weights normalised to mean 1 (Chapelle et al.; Blatman and
    Sudret; Sudret, eqs. 6.42-6.44). Sets with ``P >= N - 1`` are not considered. The
    path is followed until the error has not improved for as many steps as the best set has
    columns (at least `PATH_PATIENCE`), and the prefix of smallest error is returned (the
    smallest among those at `EXACT_FIT_FLOOR`).

    Parameters
    ----------
    phi : ndarray, shape (n_samples, n_columns)
        Candidate design matrix; column 0 must be constant. ``n_columns`` may exceed
        ``n_samples``.
    y : ndarray, shape (n_samples,)
    sample_weight : ndarray, shape (n_samples,), optional
        Non-negative trust weights, at least 3 of them positive; equal weights by default.
    max_active : int, optional
        Largest number of active columns, the constant included.

    Returns
    -------
    SparseFit

    References
    ----------
    .. [1] G. Blatman, B. Sudret, "Adaptive sparse polynomial chaos expansion based on least
       angle regression", J. Comput. Phys. 230:2345-2367, 2011.
    .. [2] O. Chapelle, V. Vapnik, Y. Bengio, "Model selection for small sample regression",
       Machine Learning 48:9-23, 2002.
    .. [3] B. Sudret, "Polynomial chaos expansions and stochastic finite element methods",
       in *Risk and Reliability in Geotechnical Engineering*, CRC Press, 2015, chapter 6.
    """
    phi, y, weights = _check_data(phi, y, sample_weight)
    positive = weights > 0.0
    n_samples = int(np.count_nonzero(positive))
    if n_samples < 3:
        raise ValueError(f"need at least 3 samples with positive weight, got {n_samples}")
    if max_active is not None and max_active < 1:
        raise ValueError(f"max_active must be at least 1 (the constant), got {max_active}")
    constant = phi[positive, 0]
    if constant[0] == 0.0 or np.ptp(constant) != 0.0:
        raise ValueError(
            "column 0 of phi must be a nonzero constant on the samples with positive weight, "
            f"got values in [{constant.min()}, {constant.max()}]"
        )
    weight_total = float(weights.sum())
    mean = float(weights @ y) / weight_total
    if np.ptp(y[positive]) == 0.0:
        return SparseFit(np.array([0]), np.array([y[positive][0] / constant[0]]), 0.0)
    root = np.sqrt(weights)
    a = np.asfortranarray(phi * root[:, None])
    c = root * y
    centred = root * (y - mean)
    spread = float(centred @ centred)
    # Least angle regression on the other columns with the constant projected out: the
    # constant is in every active set, so only what it leaves unexplained is competed for.
    unit = root / math.sqrt(weight_total)
    x = a[:, 1:] - np.outer(unit, unit @ a[:, 1:])
    norms = np.sqrt(np.einsum("ij,ij->j", x, x))
    original = np.sqrt(np.einsum("ij,ij->j", a[:, 1:], a[:, 1:]))
    candidates = np.flatnonzero(norms > DEPENDENCE_RTOL * original)
    if candidates.size < norms.size:
        x = x[:, candidates]
    x /= norms[candidates]
    # lars_path stops once the largest correlation over the number of rows is below float32
    # epsilon; a target of norm n_rows makes that threshold relative to the spread of y.
    target = centred * (phi.shape[0] / math.sqrt(spread))
    # Columns the path may contribute. A LAR step either activates a column or, when an
    # active coefficient would change sign, only turns the direction, so a path of `limit`
    # columns can take more than `limit` steps.
    limit = min(n_samples - 3, candidates.size)
    if max_active is not None:
        limit = min(limit, max_active - 1)
    steps = min(limit, max(FIRST_PATH_STEPS, math.ceil(FIRST_PATH_FRACTION * n_samples)))
    while True:
        lar_columns, ended = _lar_order(x, target, steps)
        active, error, coef, settled = _scan_path(
            a, c, 1 + candidates[lar_columns[:limit]], n_samples, spread, weight_total
        )
        complete = lar_columns.size >= limit or steps >= PATH_STEPS_PER_COLUMN * limit
        if settled or ended or complete:
            break
        steps = min(2 * steps, PATH_STEPS_PER_COLUMN * limit)
    order = np.argsort(active)
    return SparseFit(np.asarray(active, dtype=np.int64)[order], coef[order], error)


def fit_degree_adaptive(
    z: np.ndarray,
    y: np.ndarray,
    families: Sequence[Family],
    max_degree: int,
    sample_weight: np.ndarray | None = None,
    q: float = 1.0,
    max_terms: int = 4000,
) -> tuple[PolynomialBasis, SparseFit]:
    """Sparse expansion of increasing total degree, kept at the degree of smallest error.

    Degrees ``1, 2, ..., max_degree`` are tried with the hyperbolic candidate set of
    `total_degree_indices` and fitted by `fit_sparse`; the search stops at the first degree
    whose candidate set has more than ``min(max_terms, CANDIDATES_PER_SAMPLE * N)`` terms
    (``N`` samples of positive weight; the sets grow with the degree) or once
    `DEGREE_PATIENCE` degrees in a row have not improved the corrected leave-one-out error
    and the set has more than `CHEAP_CANDIDATES` terms.

    Parameters
    ----------
    z : ndarray, shape (n_samples, dim)
        Points in the coordinates of the basis families.
    y : ndarray, shape (n_samples,)
    families : sequence of {"legendre", "hermite"}, length dim
    max_degree : int
        Largest total degree tried, at least 1.
    sample_weight : ndarray, shape (n_samples,), optional
        Non-negative trust weights; equal weights by default.
    q : float
        Exponent of the hyperbolic truncation, in (0, 1].
    max_terms : int
        Largest candidate set tried.

    Returns
    -------
    basis : PolynomialBasis
        The selected terms of the best degree, shape ``(n_active, dim)`` of indices.
    fit : SparseFit
        Its fit with ``columns = arange(n_active)`` into `basis`.

    References
    ----------
    .. [1] G. Blatman, B. Sudret, "Adaptive sparse polynomial chaos expansion based on least
       angle regression", J. Comput. Phys. 230:2345-2367, 2011.
    """
    z = np.asarray(z, dtype=float)
    if z.ndim != 2:
        raise ValueError(f"z must have shape (n_samples, dim), got {z.shape}")
    if len(families) != z.shape[1]:
        raise ValueError(f"expected one family per column of z ({z.shape[1]}), got {len(families)}")
    if max_degree < 1:
        raise ValueError(f"max_degree must be at least 1, got {max_degree}")
    _, weights = _check_target(y, sample_weight, z.shape[0])
    basis, fit = _degree_search(
        z, families, max_degree, weights, q, max_terms, lambda phi: fit_sparse(phi, y, weights)
    )
    return basis.subset(fit.columns), SparseFit(
        np.arange(fit.columns.size), fit.coef, fit.loo_error
    )


_Fit = TypeVar("_Fit", "SparseFit", "SharedFit")


def _degree_search(
    z: np.ndarray,
    families: Sequence[Family],
    max_degree: int,
    weights: np.ndarray,
    q: float,
    max_terms: int,
    fit: Callable[[np.ndarray], _Fit],
) -> tuple[PolynomialBasis, _Fit]:
    """Fit candidate bases of degree 1, 2, ... and keep the one of smallest error.

    Stops at the first degree whose candidate set exceeds the size limit, or after a fitted
    set of more than `CHEAP_CANDIDATES` terms when `DEGREE_PATIENCE` or more degrees in a row
    (cheap ones included) have not improved on the best: the first set past the cheap size
    is always fitted.
    """
    limit = min(max_terms, CANDIDATES_PER_SAMPLE * int(np.count_nonzero(weights > 0.0)))
    best: tuple[PolynomialBasis, _Fit] | None = None
    since_best = 0
    for degree in range(1, max_degree + 1):
        size = count_total_degree_indices(z.shape[1], degree, q)
        if size > limit:
            break
        basis = PolynomialBasis(total_degree_indices(z.shape[1], degree, q), families)
        result = fit(basis.design_matrix(z))
        if best is None or result.loo_error_total < best[1].loo_error_total:
            best, since_best = (basis, result), 0
        else:
            since_best += 1
            if since_best >= DEGREE_PATIENCE and size > CHEAP_CANDIDATES:
                break
    if best is None:
        raise ValueError(
            f"the degree-1 basis has {z.shape[1] + 1} terms, more than the {limit} allowed "
            f"(max_terms={max_terms}, {CANDIDATES_PER_SAMPLE} per sample of positive weight)"
        )
    return best


@dataclass
class SharedFit:
    """A sparse least-squares fit of several targets on one shared set of columns.

    Attributes
    ----------
    columns : ndarray of int, shape (n_active,)
        Sorted selected columns; always contains 0, the constant.
    coef : ndarray, shape (n_active, n_targets)
    loo_error : ndarray, shape (n_targets,)
        Corrected relative leave-one-out error of each target, over the scored samples
        (all by default) and relative to their weighted variance.
    loo_error_total : float
        The same for all targets together: summed squared leave-one-out residuals over
        summed weighted variances, the quantity the selection minimises.
    loo_residuals : ndarray, shape (n_samples, n_targets)
        Leave-one-out residuals of each sample and target, in the units of ``y`` (``inf``
        where a sample has leverage 1 or zero weight; with scoring, an unscored sample of
        leverage 1 may be in the selected fit).
    correction : float
        The factor ``T(P, N)`` of the selected set.
    """

    columns: np.ndarray
    coef: np.ndarray
    loo_error: np.ndarray
    loo_error_total: float
    loo_residuals: np.ndarray
    correction: float


def fit_shared_sparse(
    phi: np.ndarray,
    y: np.ndarray,
    sample_weight: np.ndarray | None = None,
    scored: np.ndarray | None = None,
) -> SharedFit:
    """Weighted sparse least squares of several targets on one shared support.

    Columns enter greedily by orthogonal least squares on the stacked targets: each step adds
    the column whose part orthogonal to the active span most reduces the summed residual sum
    of squares of all targets (simultaneous orthogonal matching pursuit). Every prefix is a
    weighted least-squares fit of all targets at once; its corrected leave-one-out error
    (the factor ``T(P, N)`` of `fit_sparse`) is summed over targets and the best prefix wins.
    One path and one QR factorisation serve every target, so the cost is that of a single
    fit, where `fit_sparse` per target would repeat the path for each.

    Parameters
    ----------
    phi : ndarray, shape (n_samples, n_columns)
        Candidate design; column 0 must be constant.
    y : ndarray, shape (n_samples, n_targets)
        Targets on a common scale (here: output components in noise units).
    sample_weight : ndarray, shape (n_samples,), optional
    scored : ndarray of bool, shape (n_samples,), optional
        Samples whose leave-one-out residuals (and weighted spread) make the error that
        picks the prefix; all by default. The others are fitted but not scored: a far
        sample of tiny weight still has leverage near 1 in a high-degree basis, and its
        deleted residual, an extrapolation far outside the region of interest, would
        otherwise outweigh every other sample and hold the fit at a low degree. Fewer than
        three scored samples of positive weight, or scored samples on which every target is
        constant, score all.

    Returns
    -------
    SharedFit

    References
    ----------
    .. [1] J. A. Tropp, A. C. Gilbert, M. J. Strauss, "Algorithms for simultaneous sparse
       approximation. Part I: Greedy pursuit", Signal Processing 86:572-588, 2006.
    .. [2] S. Chen, S. A. Billings, W. Luo, "Orthogonal least squares methods and their
       application to non-linear system identification", Int. J. Control 50:1873-1896, 1989.
    .. [3] G. Blatman, B. Sudret, J. Comput. Phys. 230:2345-2367, 2011 (the corrected
       leave-one-out error used to pick the prefix).
    """
    y = np.asarray(y, dtype=float)
    if y.ndim != 2:
        raise ValueError(f"y must have shape (n_samples, n_targets), got {y.shape}")
    phi, _, weights = _check_data(phi, y[:, 0], sample_weight)
    positive = weights > 0.0
    n_samples = int(np.count_nonzero(positive))
    if n_samples < 3:
        raise ValueError(f"need at least 3 samples with positive weight, got {n_samples}")
    weight_total = float(weights.sum())
    root = np.sqrt(weights)
    a = phi * root[:, None]
    c = y * root[:, None]
    score = _scored_rows(scored, positive)
    spread = _weighted_spread(y, weights, score)
    if float(spread.sum()) == 0.0:  # constant where scored: score every row
        score = positive
        spread = _weighted_spread(y, weights, score)
    spread_total = float(spread.sum())
    if spread_total == 0.0:
        # Constant wherever a row counts (outputs that do not depend on the parameters): the
        # weighted mean is the fit. Tested as the spread is, exactly: a sum of squares about
        # that mean keeps ~1e-62 of rounding, passed a test against 0 and divided by 0 below.
        coef = (((weights @ y) / weight_total) / phi[positive, 0][0])[None, :]
        zeros = np.zeros(y.shape[1])
        return SharedFit(np.array([0]), coef, zeros, 0.0, np.zeros_like(y), 1.0)
    n_cols = a.shape[1]
    limit = min(n_samples - 3, n_cols - 1)
    col_norm2 = np.einsum("ij,ij->j", a, a)
    orth_norm2 = col_norm2.copy()
    correlation = a.T @ c  # (n_cols, n_targets): columns against the current residual
    q = np.zeros((a.shape[0], limit + 1))
    r_inv = np.zeros((limit + 1, limit + 1))
    qtc = np.zeros((limit + 1, y.shape[1]))
    residual = c.copy()
    leverage = np.zeros(a.shape[0])
    available = np.ones(n_cols, dtype=bool)
    active: list[int] = []
    frobenius = 0.0
    best = (0, np.inf, np.zeros(y.shape[1]))
    best_deleted, best_factor = np.zeros_like(y), 1.0
    since_best = 0
    column = 0  # the constant enters first
    while True:
        k = len(active)
        proj = q[:, :k].T @ a[:, column]
        v = a[:, column] - q[:, :k] @ proj
        v -= q[:, :k] @ (q[:, :k].T @ v)  # re-orthogonalise (Gram-Schmidt twice)
        rho = float(np.linalg.norm(v))
        available[column] = False
        if rho <= DEPENDENCE_RTOL * math.sqrt(col_norm2[column]):
            column = _next_column(correlation, orth_norm2, available)
            if column < 0:
                break
            continue
        q[:, k] = v / rho
        # R grows by the column [proj; rho]; its inverse by [-R^-1 proj / rho; 1 / rho].
        r_inv[:k, k] = -(r_inv[:k, :k] @ proj) / rho
        r_inv[k, k] = 1.0 / rho
        frobenius += float(r_inv[: k + 1, k] @ r_inv[: k + 1, k])
        qtc[k] = q[:, k] @ c
        residual -= np.outer(q[:, k], qtc[k])
        leverage += q[:, k] ** 2
        aq = a.T @ q[:, k]
        correlation -= np.outer(aq, qtc[k])
        orth_norm2 = np.maximum(orth_norm2 - aq**2, 0.0)
        active.append(column)
        deleted = _deleted(residual, np.broadcast_to(leverage[:, None], residual.shape))
        trace = frobenius * weight_total / n_samples
        factor = n_samples / (n_samples - (k + 1)) * (1.0 + trace)
        per_target = np.maximum(np.sum(deleted[score] ** 2, axis=0) * factor, EXACT_FIT_FLOOR)
        total = max(float(per_target.sum()) / spread_total, EXACT_FIT_FLOOR)
        if total < best[1]:
            best, since_best = (k + 1, total, per_target), 0
            best_deleted, best_factor = deleted, factor
        else:
            since_best += 1
        if len(active) > limit or since_best >= _patience(best[0]):
            break
        column = _next_column(correlation, orth_norm2, available)
        if column < 0:
            break
    size, total, per_target = best
    coef = r_inv[:size, :size] @ qtc[:size]
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = np.where(spread > 0, per_target / spread, 0.0)
    order = np.argsort(active[:size])
    with np.errstate(divide="ignore", invalid="ignore"):
        unscaled = np.where(positive[:, None], best_deleted / root[:, None], np.inf)
    return SharedFit(
        np.asarray(active[:size])[order], coef[order], relative, total, unscaled, best_factor
    )


def _scored_rows(scored: np.ndarray | None, positive: np.ndarray) -> np.ndarray:
    """Rows that enter the leave-one-out error: the scored ones of positive weight, or every
    row of positive weight when that leaves fewer than three."""
    if scored is None:
        return positive
    scored = np.asarray(scored)
    if scored.dtype != bool or scored.shape != positive.shape:
        raise ValueError(
            f"scored must be a boolean array of shape {positive.shape}, got {scored.dtype} "
            f"of shape {scored.shape}"
        )
    chosen = scored & positive
    return chosen if np.count_nonzero(chosen) >= 3 else positive


def _weighted_spread(y: np.ndarray, weights: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Weighted sum of squares of each target about its weighted mean over ``rows``; exactly 0
    for a target constant on them (rounding in the weighted mean would leave ~1e-33)."""
    w = weights[rows]
    centred = y[rows] - (w @ y[rows]) / w.sum()
    spread = w @ centred**2
    spread[np.ptp(y[rows], axis=0) == 0.0] = 0.0
    return spread


def _next_column(correlation: np.ndarray, orth_norm2: np.ndarray, available: np.ndarray) -> int:
    """The available column that most reduces the summed residual sum of squares; -1 if none."""
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = np.where(
            available & (orth_norm2 > 0), np.sum(correlation**2, axis=1) / orth_norm2, -1.0
        )
    best = int(np.argmax(gain))
    return best if gain[best] > 0 else -1


def fit_degree_adaptive_shared(
    z: np.ndarray,
    y: np.ndarray,
    families: Sequence[Family],
    max_degree: int,
    sample_weight: np.ndarray | None = None,
    q: float = 1.0,
    max_terms: int = 4000,
    scored: np.ndarray | None = None,
) -> tuple[PolynomialBasis, SharedFit]:
    """`fit_shared_sparse` over candidate bases of increasing degree, as `fit_degree_adaptive`.

    Parameters
    ----------
    z : ndarray, shape (n_samples, dim)
    y : ndarray, shape (n_samples, n_targets)
    families : sequence of {"legendre", "hermite"}, length dim
    max_degree : int
    sample_weight : ndarray, shape (n_samples,), optional
    q : float
    max_terms : int
    scored : ndarray of bool, shape (n_samples,), optional
        Samples whose leave-one-out residuals pick the terms and the degree (see
        `fit_shared_sparse`); all by default.

    Returns
    -------
    basis : PolynomialBasis
        The selected terms, shape ``(n_active, dim)`` of indices.
    fit : SharedFit
        Its fit with ``columns = arange(n_active)`` into `basis`.
    """
    z = np.asarray(z, dtype=float)
    if max_degree < 1:
        raise ValueError(f"max_degree must be at least 1, got {max_degree}")
    weights = np.ones(z.shape[0]) if sample_weight is None else np.asarray(sample_weight)
    basis, fit = _degree_search(
        z,
        families,
        max_degree,
        weights,
        q,
        max_terms,
        lambda phi: fit_shared_sparse(phi, y, weights, scored),
    )
    return basis.subset(fit.columns), SharedFit(
        np.arange(fit.columns.size),
        fit.coef,
        fit.loo_error,
        fit.loo_error_total,
        fit.loo_residuals,
        fit.correction,
    )
