import itertools
import math

import numpy as np
import pytest
from numpy.polynomial import hermite_e
from numpy.polynomial import legendre as numpy_legendre
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special

from honing.engine.bases import (
    PolynomialBasis,
    count_total_degree_indices,
    total_degree_indices,
)
from honing.engine.errors import StateError
from honing.engine.priors import Family

EPS = np.finfo(float).eps
# Each factor is within 8 k eps of its bound (see test_polynomials); with degrees <= 5 and
# points within 3 standard units the factors are below 30 in size, so products of up to 5
# factors agree to better than 1e-12 relative to their size.
PRODUCT_RTOL = 1e-12


def univariate(family: Family, x: np.ndarray, k: int) -> np.ndarray:
    # Reference: scipy.special, normalised to orthonormal polynomials.
    if family == "legendre":
        return special.eval_legendre(k, x) * math.sqrt(2 * k + 1)
    return special.eval_hermitenorm(k, x) / math.sqrt(math.factorial(k))


def naive_design(indices: np.ndarray, families: list[Family], z: np.ndarray) -> np.ndarray:
    out = np.ones((z.shape[0], indices.shape[0]))
    for t, alpha in enumerate(indices):
        for j, k in enumerate(alpha):
            out[:, t] *= univariate(families[j], z[:, j], int(k))
    return out


def brute_force_set(dim: int, degree: int, q: float) -> list[tuple[int, ...]]:
    # The full (degree + 1)^dim grid filtered by the q-norm, for small dims only.
    grid = itertools.product(range(degree + 1), repeat=dim)
    keep = [a for a in grid if sum(v**q for v in a) <= degree**q * (1 + 1e-9)]
    # Total degree first, then decreasing lexicographic order.
    return sorted(keep, key=lambda a: (sum(a), tuple(-v for v in a)))


@pytest.mark.parametrize(("dim", "degree"), [(1, 0), (1, 7), (2, 5), (3, 4), (6, 3), (10, 2)])
def test_total_degree_count_is_binomial(dim: int, degree: int) -> None:
    # Reference: the number of multi-indices of length dim with sum <= degree is
    # binomial(dim + degree, degree) (stars and bars).
    indices = total_degree_indices(dim, degree)
    assert indices.shape == (math.comb(dim + degree, degree), dim)
    assert count_total_degree_indices(dim, degree) == indices.shape[0]
    assert np.unique(indices, axis=0).shape[0] == indices.shape[0]
    assert (indices.sum(axis=1) <= degree).all()


@pytest.mark.parametrize(
    ("dim", "degree", "q"), [(2, 5, 1.0), (3, 4, 1.0), (3, 6, 0.5), (4, 5, 0.75), (2, 8, 0.4)]
)
def test_set_and_order_match_brute_force(dim: int, degree: int, q: float) -> None:
    indices = total_degree_indices(dim, degree, q)
    assert [tuple(row) for row in indices.tolist()] == brute_force_set(dim, degree, q)
    assert count_total_degree_indices(dim, degree, q) == indices.shape[0]


def test_order_starts_with_constant_then_linear_terms() -> None:
    indices = total_degree_indices(4, 3, 0.75)
    assert_array_equal(indices[:5], np.vstack([np.zeros(4, dtype=int), np.eye(4, dtype=int)]))


@pytest.mark.parametrize(("dim", "degree"), [(3, 6), (5, 5), (8, 4)])
def test_q_norm_sets_are_nested(dim: int, degree: int) -> None:
    sets = [
        {tuple(row) for row in total_degree_indices(dim, degree, q).tolist()}
        for q in (0.3, 0.5, 0.75, 1.0)
    ]
    for smaller, larger in itertools.pairwise(sets):
        assert smaller <= larger
    # Pure powers are in every set, and a smaller q drops some interaction.
    assert all((degree, *[0] * (dim - 1)) in s for s in sets)
    assert len(sets[0]) < len(sets[-1])


@pytest.mark.timeout(10)
def test_fifty_dimensions_is_fast_and_the_right_size() -> None:
    # A (degree + 1)^dim grid would have 3^50 points: finishing at all shows it is avoided.
    indices = total_degree_indices(50, 2)
    assert indices.shape == (math.comb(52, 2), 50)
    basis = PolynomialBasis(indices, ["hermite"] * 50)
    z = np.random.default_rng(11).standard_normal((2000, 50))
    phi = basis.design_matrix(z)
    assert phi.shape == (2000, 1326)
    columns = np.random.default_rng(12).choice(1326, 40, replace=False)
    expected = naive_design(indices[columns], ["hermite"] * 50, z[:200])
    assert_allclose(phi[:200, columns], expected, rtol=PRODUCT_RTOL, atol=PRODUCT_RTOL)


def test_max_terms_names_both_numbers() -> None:
    with pytest.raises(ValueError, match=r"has 23426 terms, more than max_terms=5000"):
        total_degree_indices(50, 3, max_terms=5000)
    assert total_degree_indices(50, 3, max_terms=23426).shape[0] == 23426


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"dim": 0, "degree": 2}, ValueError, "dim must be at least 1, got 0"),
        ({"dim": 2, "degree": -1}, ValueError, "degree must be at least 0, got -1"),
        ({"dim": 2, "degree": 2.5}, TypeError, "degree must be an integer, got float"),
        ({"dim": 2, "degree": 2, "q": 0.0}, ValueError, r"q must be in \(0, 1\], got 0.0"),
        ({"dim": 2, "degree": 2, "q": 1.5}, ValueError, r"q must be in \(0, 1\], got 1.5"),
    ],
)
def test_index_arguments_are_checked(
    kwargs: dict[str, float], error: type[Exception], message: str
) -> None:
    with pytest.raises(error, match=message):
        total_degree_indices(**kwargs)


def test_design_matrix_matches_naive_products() -> None:
    families: list[Family] = ["legendre", "hermite", "legendre", "hermite"]
    indices = total_degree_indices(4, 5, 0.75)
    rng = np.random.default_rng(5)
    z = np.column_stack(
        [rng.uniform(-1, 1, 64) if f == "legendre" else rng.standard_normal(64) for f in families]
    )
    phi = PolynomialBasis(indices, families).design_matrix(z)
    assert phi.shape == (64, indices.shape[0])
    assert_allclose(phi, naive_design(indices, families, z), rtol=PRODUCT_RTOL, atol=PRODUCT_RTOL)


@pytest.mark.parametrize(
    ("families", "degree"),
    [(["legendre", "hermite"], 6), (["hermite", "legendre", "legendre"], 4)],
)
def test_tensor_basis_is_orthonormal_by_gauss_quadrature(
    families: list[Family], degree: int
) -> None:
    # Reference: tensor product of Gauss rules (numpy.polynomial.legendre.leggauss and
    # numpy.polynomial.hermite_e.hermegauss) with weights normalised to probability measures;
    # with degree + 1 nodes per dimension the rule is exact for the products of two terms.
    rules = []
    for family in families:
        if family == "legendre":
            nodes, weights = numpy_legendre.leggauss(degree + 1)
        else:
            nodes, weights = hermite_e.hermegauss(degree + 1)
        rules.append((nodes, weights / weights.sum()))
    grid = np.array(list(itertools.product(*(nodes for nodes, _ in rules))))
    weights = np.prod(np.array(list(itertools.product(*(w for _, w in rules)))), axis=1)
    basis = PolynomialBasis(total_degree_indices(len(families), degree), families)
    phi = basis.design_matrix(grid)
    gram = phi.T @ (weights[:, None] * phi)
    # Rounding of a sum of n_points products whose absolute values sum to at most the
    # product of the per-dimension Legendre bounds (2 degree + 1) (Hermite: 1), times a few
    # ulps for the nodes and weights.
    bound = (2 * degree + 1) ** families.count("legendre")
    assert_allclose(gram, np.eye(basis.n_terms), rtol=0, atol=4 * grid.shape[0] * bound * EPS)


def test_basis_properties_and_subset() -> None:
    indices = total_degree_indices(3, 3)
    basis = PolynomialBasis(indices, ["legendre", "hermite", "legendre"])
    assert (basis.n_terms, basis.dim, basis.degree) == (20, 3, 3)
    assert not basis.indices.flags.writeable
    columns = np.array([0, 4, 19, 2])
    part = basis.subset(columns)
    assert_array_equal(part.indices, indices[columns])
    assert part.families == basis.families
    z = np.random.default_rng(1).uniform(-1, 1, (10, 3))
    assert_array_equal(part.design_matrix(z), basis.design_matrix(z)[:, columns])
    with pytest.raises(ValueError, match=r"columns must be in \[0, 20\), got \[20\]"):
        basis.subset(np.array([1, 20]))
    with pytest.raises(ValueError, match="1-D integer array"):
        basis.subset(np.array([0.0, 1.0]))


def test_dict_round_trip() -> None:
    basis = PolynomialBasis(total_degree_indices(2, 3, 0.5), ["hermite", "legendre"])
    data = basis.to_dict()
    assert data == {"indices": basis.indices.tolist(), "families": ["hermite", "legendre"]}
    restored = PolynomialBasis.from_dict(data)
    assert_array_equal(restored.indices, basis.indices)
    assert restored.families == basis.families


@pytest.mark.parametrize(
    ("data", "message"),
    [
        ({"indices": [[0, 1]]}, "missing \\['families'\\]"),
        ({"indices": [[0, 1]], "families": ["legendre"]}, "one family per dimension"),
        ({"indices": [[0.5, 1]], "families": ["legendre"] * 2}, "must be integers"),
        ({"indices": [[0, -1]], "families": ["legendre"] * 2}, "non-negative"),
        ({"indices": [[0, 1]], "families": ["legendre", "chebyshev"]}, "chebyshev"),
        ({"indices": [], "families": []}, "shape \\(n_terms, dim\\)"),
    ],
)
def test_from_dict_rejects_invalid_data(data: dict[str, object], message: str) -> None:
    with pytest.raises(StateError, match=message):
        PolynomialBasis.from_dict(data)


def test_design_matrix_checks_the_shape() -> None:
    basis = PolynomialBasis(total_degree_indices(3, 2), ["legendre"] * 3)
    with pytest.raises(ValueError, match=r"shape \(n_points, 3\), got shape \(5, 2\)"):
        basis.design_matrix(np.zeros((5, 2)))
