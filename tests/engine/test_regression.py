import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from honing.engine import regression
from honing.engine.bases import PolynomialBasis, total_degree_indices
from honing.engine.regression import (
    EXACT_FIT_FLOOR,
    SparseFit,
    fit_degree_adaptive,
    fit_sparse,
    loo_residuals,
)

EPS = np.finfo(float).eps
# Least-squares solutions and residuals computed two ways (QR here, numpy.linalg.lstsq's SVD
# there) differ by about cond(design) * eps relative to the size of y (Golub and Van Loan,
# Matrix Computations, 4th ed., section 5.3.8); 100 covers the constant of that bound.
LSTSQ_ULPS = 100
# Refits from the normal equations are accurate to about cond**2 * eps * |y| (below 1e-12
# for these designs, whose condition numbers are below 100) and the leave-one-out residuals
# are at least 1e-3 (noise or truncation error), so the two evaluations of the score agree to
# about 1e-9; 1e-8 leaves a factor 10.
SCORE_RTOL = 1e-8


def weighted_lstsq(phi: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    # Reference: numpy.linalg.lstsq on rows scaled by sqrt(w).
    root = np.sqrt(w)
    return np.linalg.lstsq(phi * root[:, None], y * root, rcond=None)[0]


def lstsq_tolerance(phi: np.ndarray, w: np.ndarray, scale: float) -> float:
    return LSTSQ_ULPS * float(np.linalg.cond(phi * np.sqrt(w)[:, None])) * EPS * scale


def corrected_loo_error(phi: np.ndarray, y: np.ndarray, w: np.ndarray) -> float:
    # Independent evaluation of the corrected LOO error of a full least-squares fit
    # (Blatman and Sudret 2011, J. Comput. Phys. 230:2345; Chapelle, Vapnik, Bengio 2002):
    # every leave-one-out refit solved afresh from its normal equations (one batched
    # numpy.linalg.solve), and the Gram matrix inverted by numpy.linalg.inv.
    n, p = phi.shape
    gram = phi.T @ (w[:, None] * phi)
    moment = phi.T @ (w * y)
    outer = w[:, None, None] * phi[:, :, None] * phi[:, None, :]
    refits = np.linalg.solve(gram - outer, (moment - (w * y)[:, None] * phi)[:, :, None])
    deleted = y - np.einsum("ij,ij->i", phi, refits[:, :, 0])
    mean = np.average(y, weights=w)
    relative = np.sum(w * deleted**2) / np.sum(w * (y - mean) ** 2)
    empirical = gram / w.sum()  # Psi^T W Psi / N with the weights normalised to mean 1
    return float(relative * n / (n - p) * (1 + np.trace(np.linalg.inv(empirical)) / n))


def drop(
    phi: np.ndarray, y: np.ndarray, w: np.ndarray, i: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    keep = np.arange(y.size) != i
    return phi[keep], y[keep], w[keep]


def legendre_design(dim: int, degree: int, z: np.ndarray, n_terms: int | None = None) -> np.ndarray:
    indices = total_degree_indices(dim, degree)[:n_terms]
    return PolynomialBasis(indices, ["legendre"] * dim).design_matrix(z)


@pytest.mark.parametrize("weighted", [False, True], ids=["equal", "weighted"])
def test_loo_residuals_equal_brute_force_refits(weighted: bool) -> None:
    rng = np.random.default_rng(8)
    z = rng.uniform(-1, 1, (30, 2))
    phi = legendre_design(2, 2, z)
    y = np.sin(2 * z[:, 0]) + z[:, 1] ** 3 + 0.1 * rng.standard_normal(30)
    w = rng.uniform(0.2, 2.0, 30) if weighted else np.ones(30)
    if weighted:
        w[4] = 0.0  # a point without weight is predicted, never fitted
    expected = [y[i] - phi[i] @ weighted_lstsq(*drop(phi, y, w, i)) for i in range(30)]
    tolerance = lstsq_tolerance(phi, w, float(np.abs(y).max()))
    assert_allclose(loo_residuals(phi, y, w if weighted else None), expected, atol=tolerance)


def test_loo_residual_is_infinite_at_leverage_one() -> None:
    rng = np.random.default_rng(2)
    phi = np.column_stack([np.ones(10), rng.standard_normal(10), np.eye(10)[0]])
    loo = loo_residuals(phi, rng.standard_normal(10))
    assert loo[0] == np.inf
    assert np.isfinite(loo[1:]).all()


def test_loo_residuals_need_full_rank() -> None:
    phi = np.column_stack([np.ones(8), np.arange(8.0), 2 * np.arange(8.0)])
    with pytest.raises(ValueError, match="full column rank 3"):
        loo_residuals(phi, np.arange(8.0))


PLANTED = np.array([0, 3, 17, 60, 120, 190])  # the constant and 5 terms up to degree 4


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_planted_sparse_polynomial_is_recovered(seed: int) -> None:
    # 5 of 200 candidate terms in 6 dimensions, noiseless, on 300 uniform points: least angle
    # regression activates the planted terms first (no failure in 3000 seeds tried), and the
    # least-squares refit on them is exact.
    rng = np.random.default_rng(seed)
    z = rng.uniform(-1, 1, (300, 6))
    phi = legendre_design(6, 4, z, n_terms=200)
    coef = rng.uniform(1, 2, PLANTED.size) * rng.choice([-1, 1], PLANTED.size)
    y = phi[:, PLANTED] @ coef
    fit = fit_sparse(phi, y)
    assert_array_equal(fit.columns, PLANTED)
    ones = np.ones(300)
    assert_allclose(fit.coef, coef, atol=lstsq_tolerance(phi[:, PLANTED], ones, 1.0))
    assert fit.loo_error == EXACT_FIT_FLOOR


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_full_column_fit_equals_weighted_least_squares(seed: int) -> None:
    # With 300 samples, 35 columns and every coefficient far above the noise, dropping any
    # column costs far more than the correction factor, so all are kept.
    rng = np.random.default_rng(seed)
    z = rng.uniform(-1, 1, (300, 3))
    phi = legendre_design(3, 4, z)
    coef = rng.uniform(0.5, 1.5, 35) * rng.choice([-1, 1], 35)
    y = phi @ coef + 0.01 * rng.standard_normal(300)
    w = rng.uniform(0.5, 2.0, 300)
    fit = fit_sparse(phi, y, w)
    assert_array_equal(fit.columns, np.arange(35))
    expected = weighted_lstsq(phi, y, w)
    assert_allclose(fit.coef, expected, atol=lstsq_tolerance(phi, w, float(np.abs(y).max())))
    # The score is the corrected LOO error computed independently (brute-force refits).
    assert_allclose(fit.loo_error, corrected_loo_error(phi, y, w), rtol=SCORE_RTOL)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_underdetermined_candidates(seed: int) -> None:
    # 60 samples, 200 candidates: the chosen set is admissible and its coefficients and
    # score are those of the weighted least-squares fit on the chosen columns.
    rng = np.random.default_rng(seed)
    z = rng.uniform(-1, 1, (60, 6))
    phi = legendre_design(6, 4, z, n_terms=200)
    y = np.exp(0.5 * z[:, 0]) * np.cos(z[:, 1]) + z[:, 2] * z[:, 3] ** 2
    w = rng.uniform(0.5, 1.0, 60)
    fit = fit_sparse(phi, y, w)
    assert fit.columns[0] == 0
    assert (np.diff(fit.columns) > 0).all()
    assert fit.columns.size <= 60 - 2
    chosen = phi[:, fit.columns]
    expected = weighted_lstsq(chosen, y, w)
    assert_allclose(fit.coef, expected, atol=lstsq_tolerance(chosen, w, float(np.abs(y).max())))
    assert_allclose(fit.loo_error, corrected_loo_error(chosen, y, w), rtol=SCORE_RTOL)


@pytest.mark.parametrize("seed", [0, 1])
def test_the_path_computed_in_pieces_gives_the_same_fit(
    seed: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(seed)
    z = rng.uniform(-1, 1, (120, 4))
    phi = legendre_design(4, 5, z)
    y = np.exp(0.5 * z[:, 0]) * np.cos(z[:, 1]) + z[:, 2] * z[:, 3] ** 2
    w = rng.uniform(0.5, 1.0, 120)
    whole = fit_sparse(phi, y, w)
    # A first path of 4 steps, doubled until the search settles.
    monkeypatch.setattr(regression, "FIRST_PATH_STEPS", 4)
    monkeypatch.setattr(regression, "FIRST_PATH_FRACTION", 0.0)
    lengths: list[int] = []
    lar_order = regression._lar_order

    def recording_lar_order(
        x: np.ndarray, target: np.ndarray, steps: int
    ) -> tuple[np.ndarray, bool]:
        lengths.append(steps)
        return lar_order(x, target, steps)

    monkeypatch.setattr(regression, "_lar_order", recording_lar_order)
    pieces = fit_sparse(phi, y, w)
    assert lengths[:3] == [4, 8, 16]
    assert_array_equal(pieces.columns, whole.columns)
    assert_array_equal(pieces.coef, whole.coef)
    assert pieces.loo_error == whole.loo_error


def test_a_point_with_tiny_weight_is_ignored() -> None:
    rng = np.random.default_rng(4)
    z = rng.uniform(-1, 1, (60, 1))
    phi = legendre_design(1, 3, z)
    coef = np.array([1.0, -2.0, 0.5, 1.5])
    y = phi @ coef
    y[7] += 50.0
    w = np.ones(60)
    w[7] = 1e-8
    weighted = fit_sparse(phi, y, w)
    assert_array_equal(weighted.columns, np.arange(4))
    # First-order effect of the corrupted point on the weighted solution:
    # w_7 * 50 * (Phi^T W Phi)^-1 phi_7; the tolerance is ten times its size.
    shift = w[7] * 50.0 * np.linalg.solve(phi.T @ (w[:, None] * phi), phi[7])
    assert_allclose(weighted.coef, coef, atol=10 * np.abs(shift).max())
    # With equal weights the same point pulls the fit far from the polynomial.
    unweighted = fit_sparse(phi, y)
    error = phi[:, unweighted.columns] @ unweighted.coef - phi @ coef
    assert np.abs(error).max() > 0.1


def test_max_active_bounds_the_set() -> None:
    rng = np.random.default_rng(6)
    z = rng.uniform(-1, 1, (100, 3))
    phi = legendre_design(3, 3, z)
    y = np.sin(3 * z).sum(axis=1)
    assert fit_sparse(phi, y).columns.size > 3
    limited = fit_sparse(phi, y, max_active=3)
    assert limited.columns.size <= 3
    assert limited.columns[0] == 0


def test_constant_target() -> None:
    phi = legendre_design(2, 2, np.random.default_rng(0).uniform(-1, 1, (20, 2)))
    fit = fit_sparse(phi, np.full(20, 2.5))
    assert_array_equal(fit.columns, [0])
    assert_array_equal(fit.coef, [2.5])
    assert fit.loo_error == 0.0


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"y": np.zeros(5)}, r"y must have shape \(20,\), got \(5,\)"),
        ({"sample_weight": -np.ones(20)}, "finite and non-negative"),
        ({"sample_weight": np.r_[np.ones(2), np.zeros(18)]}, "at least 3 samples .* got 2"),
        ({"phi": np.ones((20, 0))}, "n_columns >= 1"),
        ({"max_active": 0}, "max_active must be at least 1"),
    ],
)
def test_fit_sparse_rejects_bad_input(change: dict[str, object], message: str) -> None:
    rng = np.random.default_rng(0)
    args: dict[str, object] = {
        "phi": legendre_design(2, 2, rng.uniform(-1, 1, (20, 2))),
        "y": rng.standard_normal(20),
    }
    args.update(change)
    with pytest.raises(ValueError, match=message):
        fit_sparse(**args)


def test_fit_sparse_needs_the_constant_first() -> None:
    phi = legendre_design(2, 2, np.random.default_rng(0).uniform(-1, 1, (20, 2)))
    with pytest.raises(ValueError, match="column 0 of phi must be a nonzero constant"):
        fit_sparse(phi[:, ::-1], np.arange(20.0))


def test_degree_adaptive_finds_a_planted_polynomial() -> None:
    rng = np.random.default_rng(9)
    z = rng.uniform(-1, 1, (120, 3))
    indices = total_degree_indices(3, 5)
    planted = np.array([0, 2, 5, 13, 40])  # a term of total degree 5 last
    coef = np.array([0.5, 1.0, -2.0, 0.7, 1.3])
    y = PolynomialBasis(indices[planted], ["legendre"] * 3).design_matrix(z) @ coef
    basis, fit = fit_degree_adaptive(z, y, ["legendre"] * 3, max_degree=8)
    assert basis.degree == 5
    assert_array_equal(basis.indices, indices[planted])
    assert_array_equal(fit.columns, np.arange(planted.size))
    # Noiseless: exact up to the rounding of a least-squares solution.
    tolerance = lstsq_tolerance(basis.design_matrix(z), np.ones(120), float(np.abs(y).max()))
    assert_allclose(fit.coef, coef, atol=tolerance)
    assert_allclose(basis.design_matrix(z) @ fit.coef, y, atol=tolerance)


def test_degree_patience_applies_once_candidate_sets_are_large(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    tried: list[int] = []

    def recording_fit(phi: np.ndarray, y: np.ndarray, w: np.ndarray) -> SparseFit:
        tried.append(phi.shape[1])
        return fit_sparse(phi, y, w)

    monkeypatch.setattr(regression, "fit_sparse", recording_fit)
    rng = np.random.default_rng(3)
    z = rng.uniform(-1, 1, (80, 2))
    y = 1.0 + z[:, 0] * z[:, 1]  # exact at degree 2; degrees 3 and up can only tie
    basis, _ = fit_degree_adaptive(z, y, ["legendre"] * 2, max_degree=10)
    # Every set up to degree 10 has at most 66 terms, under CHEAP_CANDIDATES: all are tried,
    # binomial(2 + p, p) candidates for p = 1..10, and a tie never displaces the best.
    assert tried == [3, 6, 10, 15, 21, 28, 36, 45, 55, 66]
    assert basis.degree == 2
    tried.clear()
    monkeypatch.setattr(regression, "CHEAP_CANDIDATES", 0)
    basis, _ = fit_degree_adaptive(z, y, ["legendre"] * 2, max_degree=10)
    assert tried == [3, 6, 10, 15]  # patience: degrees 3 and 4 do not improve on 2
    assert basis.degree == 2


def test_degree_adaptive_respects_the_candidate_limits() -> None:
    rng = np.random.default_rng(1)
    z = rng.uniform(-1, 1, (40, 4))
    y = np.exp(z.sum(axis=1))
    # max_terms=20 admits degree 1 (5 terms) and 2 (15 terms), not 3 (35).
    basis, _ = fit_degree_adaptive(z, y, ["legendre"] * 4, max_degree=6, max_terms=20)
    assert basis.degree <= 2
    with pytest.raises(ValueError, match="degree-1 basis has 5 terms, more than the 4 allowed"):
        fit_degree_adaptive(z, y, ["legendre"] * 4, max_degree=3, max_terms=4)
    with pytest.raises(ValueError, match="one family per column of z"):
        fit_degree_adaptive(z, y, ["legendre"] * 3, max_degree=3)
