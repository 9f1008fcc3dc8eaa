"""Multivariate orthonormal polynomial bases: truncated multi-index sets and design matrices.

A term of the basis is a multi-index ``alpha`` of length ``dim``; its basis function is the
product over dimensions ``j`` of the orthonormal polynomial of degree ``alpha_j`` of that
dimension's family (see `honing.engine.polynomials`). Products of orthonormal univariate
polynomials are orthonormal for the product measure, so every basis here is orthonormal for
the joint reference distribution.

Multi-index sets are built from their nonzero parts: a set truncated by total degree ``p``
holds few distinct "value patterns" (the ordered nonzero entries, at most ``p`` of them), and
every multi-index is one pattern placed on one choice of positions. Enumerating the patterns
and the position choices costs time proportional to the size of the set, with no pass over
the ``(p + 1)**dim`` grid, and gives the size of the set before any array is built.
"""

from __future__ import annotations

import itertools
import math
import operator
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

import numpy as np

from honing.engine.errors import StateError
from honing.engine.polynomials import evaluate
from honing.engine.priors import Family

__all__ = ["PolynomialBasis", "count_total_degree_indices", "total_degree_indices"]

#: Relative slack on the q-norm bound, so that multi-indices exactly on the boundary
#: ``||alpha||_q = degree`` are kept although ``alpha_i ** q`` is rounded (a few ulps each).
QNORM_SLACK = 1e-9

_FAMILIES = ("legendre", "hermite")


def _check_int(name: str, value: int, low: int) -> int:
    try:
        number = operator.index(value)
    except TypeError:
        raise TypeError(f"{name} must be an integer, got {type(value).__name__}") from None
    if number < low:
        raise ValueError(f"{name} must be at least {low}, got {number}")
    return number


def _value_patterns(degree: int, q: float, max_len: int) -> Iterator[tuple[int, ...]]:
    """Ordered tuples of positive integers of length <= `max_len` with q-norm <= `degree`."""
    budget = degree**q * (1.0 + QNORM_SLACK)

    def extend(prefix: tuple[int, ...], used: float) -> Iterator[tuple[int, ...]]:
        yield prefix
        if len(prefix) == max_len:
            return
        for value in range(1, degree + 1):
            cost = used + value**q
            if cost > budget:
                return
            yield from extend((*prefix, value), cost)

    return extend((), 0.0)


def _grouped_patterns(dim: int, degree: int, q: float) -> dict[int, list[tuple[int, ...]]]:
    """Value patterns grouped by their number of nonzero entries."""
    _check_int("dim", dim, 1)
    _check_int("degree", degree, 0)
    if not 0.0 < q <= 1.0:
        raise ValueError(f"q must be in (0, 1], got {q!r}")
    groups: dict[int, list[tuple[int, ...]]] = {}
    for pattern in _value_patterns(degree, q, min(dim, degree)):
        groups.setdefault(len(pattern), []).append(pattern)
    return groups


def count_total_degree_indices(dim: int, degree: int, q: float = 1.0) -> int:
    """Size of the set `total_degree_indices` would return, without building it."""
    groups = _grouped_patterns(dim, degree, q)
    return sum(len(patterns) * math.comb(dim, k) for k, patterns in groups.items())


def total_degree_indices(
    dim: int, degree: int, q: float = 1.0, max_terms: int | None = None
) -> np.ndarray:
    """Multi-indices of a total-degree set with hyperbolic (q-norm) truncation.

    The set is ``{alpha : (sum_i alpha_i**q)**(1/q) <= degree}``; ``q = 1`` gives the
    total-degree set of size ``binomial(dim + degree, degree)``, smaller ``q`` drops terms with
    many interacting dimensions first.

    Parameters
    ----------
    dim : int
        Number of dimensions, at least 1.
    degree : int
        Bound on the q-norm, at least 0.
    q : float
        Exponent of the quasi-norm, in (0, 1].
    max_terms : int, optional
        Largest set accepted.

    Returns
    -------
    ndarray of int64, shape (n_terms, dim)
        Ordered by total degree, and within one total degree by decreasing lexicographic order
        (so the constant comes first, then ``e_1, e_2, ...``).

    Raises
    ------
    ValueError
        If the set has more than `max_terms` terms (before building it).

    References
    ----------
    .. [1] G. Blatman, B. Sudret, "Adaptive sparse polynomial chaos expansion based on least
       angle regression", J. Comput. Phys. 230:2345-2367, 2011.
    """
    groups = _grouped_patterns(dim, degree, q)
    n_terms = sum(len(patterns) * math.comb(dim, k) for k, patterns in groups.items())
    if max_terms is not None and n_terms > max_terms:
        raise ValueError(
            f"the multi-index set for dim={dim}, degree={degree}, q={q} has {n_terms} terms, "
            f"more than max_terms={max_terms}"
        )
    blocks = []
    for k, patterns in groups.items():
        n_positions = math.comb(dim, k)
        positions = np.fromiter(
            itertools.chain.from_iterable(itertools.combinations(range(dim), k)),
            dtype=np.int64,
            count=n_positions * k,
        ).reshape(n_positions, k)
        values = np.array(patterns, dtype=np.int64).reshape(len(patterns), k)
        block = np.zeros((len(patterns) * n_positions, dim), dtype=np.int64)
        rows = np.arange(block.shape[0])[:, None]
        block[rows, np.tile(positions, (len(patterns), 1))] = np.repeat(values, n_positions, 0)
        blocks.append(block)
    indices = np.concatenate(blocks)
    # np.lexsort sorts by its last key first: total degree, then alpha_1 descending, ...
    keys = [-indices[:, j] for j in reversed(range(dim))]
    order = np.lexsort((*keys, indices.sum(axis=1)))
    return indices[order]


class PolynomialBasis:
    """A set of multi-indices with one reference family per dimension.

    Parameters
    ----------
    indices : ndarray of int, shape (n_terms, dim)
        Non-negative multi-indices, one row per basis function.
    families : sequence of {"legendre", "hermite"}, length dim

    Attributes
    ----------
    indices : ndarray of int64, shape (n_terms, dim)
        Read-only copy of the multi-indices.
    families : tuple of str, length dim
    """

    def __init__(self, indices: np.ndarray, families: Sequence[Family]) -> None:
        array = np.asarray(indices)
        if array.ndim != 2 or array.shape[0] < 1 or array.shape[1] < 1:
            raise ValueError(
                f"indices must have shape (n_terms, dim) with n_terms, dim >= 1, "
                f"got shape {array.shape}"
            )
        if not np.issubdtype(array.dtype, np.integer):
            raise ValueError(f"indices must be integers, got dtype {array.dtype}")
        if (array < 0).any():
            raise ValueError(f"indices must be non-negative, got minimum {array.min()}")
        families = tuple(families)
        if len(families) != array.shape[1]:
            raise ValueError(
                f"expected one family per dimension ({array.shape[1]}), got {len(families)}"
            )
        unknown = [f for f in families if f not in _FAMILIES]
        if unknown:
            raise ValueError(f"families must be among {_FAMILIES}, got {unknown}")
        self.indices: np.ndarray = array.astype(np.int64, copy=True)
        self.indices.setflags(write=False)
        self.families: tuple[Family, ...] = families
        # Rows of the stacked univariate table: dimension j, degree d -> offset[j] + d; one more
        # row of ones at the end stands for the single factor of the constant term.
        self._max_degree = self.indices.max(axis=0)
        ends = np.cumsum(self._max_degree + 1)
        terms, dims = np.nonzero(self.indices)
        factor_rows = ends[dims] - self._max_degree[dims] - 1 + self.indices[terms, dims]
        n_factors = np.count_nonzero(self.indices, axis=1)
        first = np.concatenate([[0], np.cumsum(n_factors)[:-1]])
        # Terms grouped by their number k of nonconstant factors, with their factors' table rows.
        self._groups = [
            (
                group,
                factor_rows[first[group, None] + np.arange(k)]
                if k
                else np.full((group.size, 1), ends[-1]),
            )
            for k in np.unique(n_factors)
            if (group := np.flatnonzero(n_factors == k)).size
        ]

    def __repr__(self) -> str:
        return f"PolynomialBasis(n_terms={self.n_terms}, dim={self.dim}, degree={self.degree})"

    @property
    def n_terms(self) -> int:
        """Number of basis functions."""
        return int(self.indices.shape[0])

    @property
    def dim(self) -> int:
        """Number of input dimensions."""
        return int(self.indices.shape[1])

    @property
    def degree(self) -> int:
        """Largest total degree of any term."""
        return int(self.indices.sum(axis=1).max())

    def design_matrix(self, z: np.ndarray) -> np.ndarray:
        """Basis functions evaluated at points.

        One table of univariate polynomials per dimension, up to the largest degree any term
        uses there; each term's column is then the product of its nonconstant factors, so the
        cost is ``n_points`` times the number of nonzero entries of `indices`.

        Parameters
        ----------
        z : ndarray, shape (n_points, dim)
            Points in reference (or local) coordinates.

        Returns
        -------
        ndarray, shape (n_points, n_terms)
            In column-major (Fortran) order: it is built, and mostly used, column by column.
        """
        z = np.asarray(z, dtype=float)
        if z.ndim != 2 or z.shape[1] != self.dim:
            raise ValueError(f"z must have shape (n_points, {self.dim}), got shape {z.shape}")
        table = np.concatenate(
            [
                *(
                    evaluate(family, z[:, j], int(self._max_degree[j])).T
                    for j, family in enumerate(self.families)
                ),
                np.ones((1, z.shape[0])),
            ]
        )
        out = np.empty((self.n_terms, z.shape[0]))
        for group, rows in self._groups:
            block = table[rows[:, 0]]
            for s in range(1, rows.shape[1]):
                block *= table[rows[:, s]]
            out[group] = block
        return out.T

    def subset(self, columns: np.ndarray) -> PolynomialBasis:
        """The basis made of the given terms, in the given order.

        Parameters
        ----------
        columns : ndarray of int, shape (n_selected,)
            Row numbers into `indices`.
        """
        columns = np.asarray(columns)
        if columns.ndim != 1 or not np.issubdtype(columns.dtype, np.integer):
            raise ValueError(
                f"columns must be a 1-D integer array, got shape {columns.shape} "
                f"and dtype {columns.dtype}"
            )
        outside = columns[(columns < 0) | (columns >= self.n_terms)]
        if outside.size:
            raise ValueError(f"columns must be in [0, {self.n_terms}), got {outside[:5].tolist()}")
        return PolynomialBasis(self.indices[columns], self.families)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form: ``{"indices": [[...], ...], "families": [...]}``."""
        return {"indices": self.indices.tolist(), "families": list(self.families)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> PolynomialBasis:
        """Inverse of `to_dict`.

        Raises
        ------
        StateError
            If `data` is not the dict of a basis.
        """
        missing = [key for key in ("indices", "families") if key not in data]
        if missing:
            raise StateError(f"a basis needs the keys 'indices' and 'families'; missing {missing}")
        try:
            return cls(np.asarray(data["indices"]), data["families"])
        except (TypeError, ValueError) as exc:
            raise StateError(f"invalid basis: {exc}") from exc
