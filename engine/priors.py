"""Prior distributions of calibration parameters and their maps to reference variables.

Each prior ``p(x)`` comes with a one-to-one map ``x -> xi`` onto a reference variable whose
distribution under the prior is exactly the measure of one orthonormal polynomial family:

=============  ===================================================  ==========  ===========
kind           reference map                                        xi ~        family
=============  ===================================================  ==========  ===========
uniform        affine ``[low, high] -> [-1, 1]``                    U[-1, 1]    legendre
normal         ``(x - mean) / sd``                                  N(0, 1)     hermite
lognormal      ``(log x - log median) / sigma_log``                 N(0, 1)     hermite
loguniform     affine in ``log x``, ``[low, high] -> [-1, 1]``      U[-1, 1]    legendre
truncnormal    probability integral transform ``2 F(x) - 1``        U[-1, 1]    legendre
=============  ===================================================  ==========  ===========

Surrogates are built in reference coordinates, so a prior only needs these maps, its density
and its quantile function. Priors are read from and written to the JSON objects of the
calibration spec (``{"kind": "normal", "mean": 0.0, "sd": 1.0}``) by `prior_from_dict` and
`Prior.to_dict`; every invalid field is reported as a `SpecError` at its location.

Points outside a prior's support map to NaN where the reference map is undefined there
(non-positive values under the log maps, anything outside a truncated normal's interval); the
affine maps extend past the interval, and `reference_logpdf` is ``-inf`` for both.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass
from numbers import Real
from typing import Any, ClassVar, Literal

import numpy as np
from scipy import special, stats

from honing.engine.errors import SpecError

__all__ = [
    "Family",
    "LogNormal",
    "LogUniform",
    "Normal",
    "Prior",
    "TruncNormal",
    "Uniform",
    "prior_from_dict",
    "reference_logpdf",
    "reference_ppf",
    "reference_sample",
]

Family = Literal["legendre", "hermite"]

_FAMILIES: tuple[Family, ...] = ("legendre", "hermite")
#: Narrowest and widest prior sd accepted: squares and reciprocals of posterior spreads then
#: stay far inside the float range whatever the data do.
SD_RANGE = (1e-150, 1e150)
#: Log width of a log-uniform prior beyond which e^-w is below double rounding, so that its
#: sd takes the wide-range form.
_WIDE_LOG_WIDTH = 40.0
#: Upper probability of the central range a prior must keep finite (its 0.05% to 99.95%
#: points, the range the report plots).
CENTRAL_MASS = 0.9995
_LOG_HALF = math.log(0.5)
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def _check_family(family: str) -> None:
    if family not in _FAMILIES:
        raise ValueError(f"family must be one of {_FAMILIES}, got {family!r}")


def reference_logpdf(family: Family, xi: np.ndarray) -> np.ndarray:
    """Log density of the reference variable, elementwise.

    Parameters
    ----------
    family : {"legendre", "hermite"}
        ``legendre``: U[-1, 1], density 1/2 on the closed interval and ``-inf`` outside;
        ``hermite``: N(0, 1).
    xi : ndarray, any shape
        Reference values; NaN gives ``-inf``.

    Returns
    -------
    ndarray, same shape as `xi`
    """
    _check_family(family)
    xi = np.asarray(xi, dtype=float)
    if family == "legendre":
        return np.where(np.abs(xi) <= 1.0, _LOG_HALF, -np.inf)
    with np.errstate(over="ignore"):  # a square past the float range gives the right -inf
        density = -0.5 * np.square(xi) - _LOG_SQRT_2PI
    return np.where(np.isnan(xi), -np.inf, density)


def reference_ppf(family: Family, u: np.ndarray) -> np.ndarray:
    """Quantile function of the reference variable, elementwise; NaN for `u` outside [0, 1].

    Parameters
    ----------
    family : {"legendre", "hermite"}
    u : ndarray, any shape
        Probabilities.

    Returns
    -------
    ndarray, same shape as `u`
    """
    _check_family(family)
    u = _unit(u)
    if family == "legendre":
        return 2.0 * u - 1.0
    return np.asarray(special.ndtri(u), dtype=float)


def reference_sample(family: Family, rng: np.random.Generator, size: int) -> np.ndarray:
    """Independent draws of the reference variable, shape ``(size,)``."""
    _check_family(family)
    if family == "legendre":
        return rng.uniform(-1.0, 1.0, size)
    return rng.standard_normal(size)


def _unit(u: np.ndarray) -> np.ndarray:
    """Probabilities as floats, with values outside [0, 1] (and NaN) replaced by NaN."""
    u = np.asarray(u, dtype=float)
    return np.where((u >= 0.0) & (u <= 1.0), u, np.nan)


def _log_positive(x: np.ndarray) -> np.ndarray:
    """``log x`` where ``x > 0``, NaN elsewhere, without floating-point warnings."""
    positive = x > 0.0
    return np.where(positive, np.log(np.where(positive, x, 1.0)), np.nan)


def _clip_where(values: np.ndarray, inside: np.ndarray, low: float, high: float) -> np.ndarray:
    """Clip `values` to ``[low, high]`` where `inside`: keeps rounding from leaving a support."""
    return np.where(inside, np.clip(values, low, high), values)


class Prior(ABC):
    """A univariate prior with its map to a reference variable.

    Subclasses are frozen dataclasses whose parameters are validated on construction.
    ``fields`` lists the parameter names of the JSON object in order.
    """

    kind: ClassVar[str]
    family: ClassVar[Family]
    fields: ClassVar[tuple[str, ...]]

    def __post_init__(self) -> None:
        problems = self._check(self.params())
        if problems:
            raise SpecError([((name,), msg) for name, msg in problems])

    @classmethod
    def _check(cls, params: Mapping[str, float]) -> list[tuple[str, str]]:
        """Problems with parameter values as ``(field, message)``; empty when valid."""
        nonfinite = [
            (name, f"must be a finite number, got {params[name]!r}")
            for name in cls.fields
            if not math.isfinite(params[name])
        ]
        return nonfinite or cls._relations(params)

    @staticmethod
    @abstractmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        """Problems with the relations between finite parameters (signs, order)."""

    @classmethod
    @abstractmethod
    def _from_params(cls, params: Mapping[str, float]) -> Prior:
        """Build from validated parameters keyed by their JSON names."""

    @abstractmethod
    def params(self) -> dict[str, float]:
        """Parameters keyed by their JSON names."""

    def to_dict(self) -> dict[str, Any]:
        """The JSON object of the spec, ``{"kind": ..., <parameters>}``."""
        return {"kind": self.kind, **self.params()}

    @abstractmethod
    def to_reference(self, x: np.ndarray) -> np.ndarray:
        """Map physical values to reference values, elementwise (same shape)."""

    @abstractmethod
    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        """Map reference values to physical values, elementwise (same shape)."""

    @abstractmethod
    def logpdf(self, x: np.ndarray) -> np.ndarray:
        """Log density of the prior, elementwise; ``-inf`` outside the support."""

    @abstractmethod
    def ppf(self, u: np.ndarray) -> np.ndarray:
        """Quantile function, elementwise; NaN for `u` outside [0, 1]."""

    @abstractmethod
    def in_support(self, x: np.ndarray) -> np.ndarray:
        """Boolean array, True where `x` lies in the (closed) support."""

    @property
    @abstractmethod
    def mean(self) -> float:
        """Mean of the prior."""

    @property
    @abstractmethod
    def sd(self) -> float:
        """Standard deviation of the prior."""

    def sample(self, rng: np.random.Generator, size: int) -> np.ndarray:
        """Independent draws from the prior, shape ``(size,)``."""
        return self.from_reference(reference_sample(self.family, rng, size))


@dataclass(frozen=True)
class Uniform(Prior):
    """Uniform on ``[low, high]``."""

    kind: ClassVar[str] = "uniform"
    family: ClassVar[Family] = "legendre"
    fields: ClassVar[tuple[str, ...]] = ("low", "high")

    low: float
    high: float

    @staticmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        if params["high"] <= params["low"]:
            return [("high", f"must be greater than low={params['low']!r}")]
        return []

    @classmethod
    def _from_params(cls, params: Mapping[str, float]) -> Uniform:
        return cls(params["low"], params["high"])

    def params(self) -> dict[str, float]:
        return {"low": self.low, "high": self.high}

    def to_reference(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        xi = 2.0 * (x - self.low) / (self.high - self.low) - 1.0
        return _clip_where(xi, self.in_support(x), -1.0, 1.0)

    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        xi = np.asarray(xi, dtype=float)
        x = self.low + 0.5 * (xi + 1.0) * (self.high - self.low)
        return _clip_where(x, np.abs(xi) <= 1.0, self.low, self.high)

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        return np.where(self.in_support(x), -math.log(self.high - self.low), -np.inf)

    def ppf(self, u: np.ndarray) -> np.ndarray:
        return np.clip(self.low + _unit(u) * (self.high - self.low), self.low, self.high)

    def in_support(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        return (x >= self.low) & (x <= self.high)

    @property
    def mean(self) -> float:
        return 0.5 * (self.low + self.high)

    @property
    def sd(self) -> float:
        return (self.high - self.low) / math.sqrt(12.0)


@dataclass(frozen=True)
class Normal(Prior):
    """Normal with mean ``mu`` and standard deviation ``sigma`` (JSON: ``mean``, ``sd``)."""

    kind: ClassVar[str] = "normal"
    family: ClassVar[Family] = "hermite"
    fields: ClassVar[tuple[str, ...]] = ("mean", "sd")

    mu: float
    sigma: float

    @staticmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        if params["sd"] <= 0.0:
            return [("sd", f"must be positive, got {params['sd']!r}")]
        return []

    @classmethod
    def _from_params(cls, params: Mapping[str, float]) -> Normal:
        return cls(params["mean"], params["sd"])

    def params(self) -> dict[str, float]:
        return {"mean": self.mu, "sd": self.sigma}

    def to_reference(self, x: np.ndarray) -> np.ndarray:
        return (np.asarray(x, dtype=float) - self.mu) / self.sigma

    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        return self.mu + self.sigma * np.asarray(xi, dtype=float)

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        return reference_logpdf("hermite", self.to_reference(x)) - math.log(self.sigma)

    def ppf(self, u: np.ndarray) -> np.ndarray:
        return self.from_reference(reference_ppf("hermite", u))

    def in_support(self, x: np.ndarray) -> np.ndarray:
        return np.isfinite(np.asarray(x, dtype=float))

    @property
    def mean(self) -> float:
        return self.mu

    @property
    def sd(self) -> float:
        return self.sigma


@dataclass(frozen=True)
class LogNormal(Prior):
    """Log-normal: ``log x ~ N(log median, sigma_log**2)``."""

    kind: ClassVar[str] = "lognormal"
    family: ClassVar[Family] = "hermite"
    fields: ClassVar[tuple[str, ...]] = ("median", "sigma_log")

    median: float
    sigma_log: float

    @staticmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        problems = []
        if params["median"] <= 0.0:
            problems.append(("median", f"must be positive, got {params['median']!r}"))
        if params["sigma_log"] <= 0.0:
            problems.append(("sigma_log", f"must be positive, got {params['sigma_log']!r}"))
        return problems

    @classmethod
    def _from_params(cls, params: Mapping[str, float]) -> LogNormal:
        return cls(params["median"], params["sigma_log"])

    def params(self) -> dict[str, float]:
        return {"median": self.median, "sigma_log": self.sigma_log}

    def to_reference(self, x: np.ndarray) -> np.ndarray:
        log_x = _log_positive(np.asarray(x, dtype=float))
        return (log_x - math.log(self.median)) / self.sigma_log

    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        return self.median * np.exp(self.sigma_log * np.asarray(xi, dtype=float))

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        xi = self.to_reference(x)
        density = reference_logpdf("hermite", xi) - math.log(self.sigma_log) - _log_positive(x)
        return np.where(self.in_support(x), density, -np.inf)

    def ppf(self, u: np.ndarray) -> np.ndarray:
        return self.from_reference(reference_ppf("hermite", u))

    def in_support(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        return (x > 0.0) & np.isfinite(x)

    @property
    def mean(self) -> float:
        return self.median * math.exp(0.5 * self.sigma_log**2)

    @property
    def sd(self) -> float:
        return self.mean * math.sqrt(math.expm1(self.sigma_log**2))


@dataclass(frozen=True)
class LogUniform(Prior):
    """Log-uniform (reciprocal) on ``[low, high]`` with ``0 < low < high``."""

    kind: ClassVar[str] = "loguniform"
    family: ClassVar[Family] = "legendre"
    fields: ClassVar[tuple[str, ...]] = ("low", "high")

    low: float
    high: float

    @staticmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        if params["low"] <= 0.0:
            return [("low", f"must be positive, got {params['low']!r}")]
        if params["high"] <= params["low"]:
            return [("high", f"must be greater than low={params['low']!r}")]
        return []

    @classmethod
    def _from_params(cls, params: Mapping[str, float]) -> LogUniform:
        return cls(params["low"], params["high"])

    def params(self) -> dict[str, float]:
        return {"low": self.low, "high": self.high}

    @property
    def _log_width(self) -> float:
        return float(self._log_over_low(np.asarray(self.high)))

    def _log_over_low(self, x: np.ndarray) -> np.ndarray:
        """``log(x / low)``: from the ratio, exact for close values, or as a difference of
        logs where the ratio overflows (hundreds of decades apart). The width is taken the
        same way, so that the bounds map to -1 and 1 exactly."""
        with np.errstate(over="ignore"):
            ratio = x / self.low
        return np.where(
            np.isfinite(ratio), _log_positive(ratio), _log_positive(x) - math.log(self.low)
        )

    def to_reference(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        xi = 2.0 * self._log_over_low(x) / self._log_width - 1.0
        return _clip_where(xi, self.in_support(x), -1.0, 1.0)

    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        xi = np.asarray(xi, dtype=float)
        x = self.low * np.exp(0.5 * (xi + 1.0) * self._log_width)
        return _clip_where(x, np.abs(xi) <= 1.0, self.low, self.high)

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        density = -_log_positive(x) - math.log(self._log_width)
        return np.where(self.in_support(x), density, -np.inf)

    def ppf(self, u: np.ndarray) -> np.ndarray:
        x = self.low * np.exp(_unit(u) * self._log_width)
        return np.clip(x, self.low, self.high)

    def in_support(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        return (x >= self.low) & (x <= self.high)

    @property
    def mean(self) -> float:
        return (self.high - self.low) / self._log_width

    @property
    def sd(self) -> float:
        # With w = log(high / low) and E = expm1(w), x = low e^(t w) for t uniform on (0, 1)
        # has variance low^2 E g / (2 w^2), g = w (E + 2) - 2 E = sum_{k>=3} (k-2) w^k / k!.
        # The series has no cancellation for close bounds, where E[x^2] - mean^2 loses every
        # digit; for wide ones E overflows before high does, and e^-w is below rounding.
        w = self._log_width
        if w > _WIDE_LOG_WIDTH:
            return self.high * math.sqrt(w - 2.0) / (math.sqrt(2.0) * w)
        e = math.expm1(w)
        return self.low * math.sqrt(e * _log_uniform_excess(w, e) / 2.0) / w


def _log_uniform_excess(w: float, e: float) -> float:
    """``w (e + 2) - 2 e`` for ``e = expm1(w)``: by its series below w = 1, where the closed
    form cancels, and the closed form above."""
    if w >= 1.0:
        return w * (e + 2.0) - 2.0 * e
    total, term = 0.0, w**2 / 2.0  # term = w^k / k!
    for k in range(3, 30):
        term *= w / k
        total += (k - 2) * term
        if (k - 2) * term < 1e-17 * total:
            break
    return total


@dataclass(frozen=True)
class TruncNormal(Prior):
    """Normal with mean ``mu`` and sd ``sigma`` truncated to ``[low, high]``.

    JSON fields are ``mean`` and ``sd`` (of the normal before truncation), ``low``, ``high``.
    The reference map is ``xi = F(x) - S(x) = 2 F(x) - 1`` with the distribution function
    ``F`` and survival function ``S = 1 - F`` of `scipy.stats.truncnorm`, which works in log
    space: an interval far in a tail of the normal (say 8 to 9 standard deviations above the
    mean) keeps full accuracy where ``(Phi(x) - Phi(a)) / (Phi(b) - Phi(a))`` has no correct
    digit. The inverse takes the quantile function of ``(1 + xi) / 2`` below the median and
    the inverse survival function of ``(1 - xi) / 2`` above it, so that near either end,
    where the map is most sensitive, the argument is formed without rounding (Sterbenz
    lemma).
    """

    kind: ClassVar[str] = "truncnormal"
    family: ClassVar[Family] = "legendre"
    fields: ClassVar[tuple[str, ...]] = ("mean", "sd", "low", "high")

    mu: float
    sigma: float
    low: float
    high: float

    @staticmethod
    def _relations(params: Mapping[str, float]) -> list[tuple[str, str]]:
        problems = []
        if params["sd"] <= 0.0:
            problems.append(("sd", f"must be positive, got {params['sd']!r}"))
        if params["high"] <= params["low"]:
            problems.append(("high", f"must be greater than low={params['low']!r}"))
        return problems

    @classmethod
    def _from_params(cls, params: Mapping[str, float]) -> TruncNormal:
        return cls(params["mean"], params["sd"], params["low"], params["high"])

    def params(self) -> dict[str, float]:
        return {"mean": self.mu, "sd": self.sigma, "low": self.low, "high": self.high}

    def _dist(self) -> Any:
        a = (self.low - self.mu) / self.sigma
        b = (self.high - self.mu) / self.sigma
        return stats.truncnorm(a, b, loc=self.mu, scale=self.sigma)

    def to_reference(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        dist = self._dist()
        xi = np.asarray(dist.cdf(x) - dist.sf(x), dtype=float)
        return np.where(self.in_support(x), xi, np.nan)

    def from_reference(self, xi: np.ndarray) -> np.ndarray:
        xi = np.asarray(xi, dtype=float)
        inside = np.abs(xi) <= 1.0
        dist = self._dist()
        lower = np.where(inside & (xi <= 0.0), 0.5 * (1.0 + xi), np.nan)
        upper = np.where(inside & (xi > 0.0), 0.5 * (1.0 - xi), np.nan)
        x = np.where(xi <= 0.0, dist.ppf(lower), dist.isf(upper))
        return np.where(inside, np.clip(x, self.low, self.high), np.nan)

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        return np.where(self.in_support(x), self._dist().logpdf(x), -np.inf)

    def ppf(self, u: np.ndarray) -> np.ndarray:
        return np.asarray(self._dist().ppf(_unit(u)), dtype=float)

    def in_support(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        return (x >= self.low) & (x <= self.high)

    @property
    def mean(self) -> float:
        return float(self._dist().mean())

    @property
    def sd(self) -> float:
        return float(self._dist().std())


_KINDS: dict[str, type[Prior]] = {
    cls.kind: cls for cls in (Uniform, Normal, LogNormal, TruncNormal, LogUniform)
}


def _number(value: Any) -> float | None:
    """`value` as a float if it is a real number (not a bool) that a float can hold."""
    if isinstance(value, bool) or not isinstance(value, Real):
        return None
    try:
        return float(value)
    except OverflowError:
        return math.inf


def prior_from_dict(
    data: Mapping[str, Any], loc: tuple[str | int, ...] = ("prior",), *, check_scale: bool = True
) -> Prior:
    """Read and validate a prior from its JSON object.

    Parameters
    ----------
    data : mapping
        ``{"kind": <kind>, <parameter>: <number>, ...}`` with exactly the parameters of the
        kind: ``uniform`` (low, high), ``normal`` (mean, sd), ``lognormal`` (median,
        sigma_log), ``truncnormal`` (mean, sd, low, high), ``loguniform`` (low, high).
    loc : tuple of str or int
        Location of `data` in the enclosing document; error locations extend it.
    check_scale : bool
        Refuse a prior whose spread floating point cannot hold (see `SD_RANGE`); off only
        for priors accepted before that check existed.

    Returns
    -------
    Prior

    Raises
    ------
    SpecError
        With one entry per invalid field, at ``(*loc, field)``.
    """
    if not isinstance(data, Mapping):
        raise SpecError.at(loc, f"must be an object, got {type(data).__name__}")
    kinds = ", ".join(_KINDS)
    if "kind" not in data:
        raise SpecError.at((*loc, "kind"), f"field required; one of {kinds}")
    kind = data["kind"]
    if not isinstance(kind, str) or kind not in _KINDS:
        raise SpecError.at((*loc, "kind"), f"unknown prior kind {kind!r}; expected one of {kinds}")
    cls = _KINDS[kind]
    errors: list[tuple[tuple[str | int, ...], str]] = []
    params: dict[str, float] = {}
    for name in cls.fields:
        if name not in data:
            errors.append(((*loc, name), "field required"))
            continue
        value = _number(data[name])
        if value is None:
            errors.append(((*loc, name), f"must be a number, got {type(data[name]).__name__}"))
        else:
            params[name] = value
    takes = ", ".join(cls.fields)
    errors.extend(
        ((*loc, str(name)), f"unexpected field; a {kind} prior takes {takes}")
        for name in data
        if name != "kind" and name not in cls.fields
    )
    if errors:
        raise SpecError(errors)
    problems = cls._check(params)
    if problems:
        raise SpecError([((*loc, name), msg) for name, msg in problems])
    prior = cls._from_params(params)
    scale = _scale_problem(prior) if check_scale else None
    if scale:
        raise SpecError.at(loc, scale)
    return prior


def _scale_problem(prior: Prior) -> str | None:
    """Why a prior's spread is beyond what the engine's arithmetic can hold, or None.

    Its mean and its central range must be finite floats and its sd within `SD_RANGE`: the
    design, the posterior's variances and their reciprocals are then finite too.
    """
    low, high = SD_RANGE
    with np.errstate(all="ignore"):
        try:
            mean, sd = float(prior.mean), float(prior.sd)
            ends = prior.ppf(np.array([1.0 - CENTRAL_MASS, CENTRAL_MASS]))
        except (OverflowError, ValueError, ZeroDivisionError):
            return (
                "too wide or too narrow for floating-point arithmetic: its mean and sd cannot "
                f"be computed; the sd must lie between {low:g} and {high:g}"
            )
    if math.isfinite(mean) and low <= sd <= high and np.all(np.isfinite(ends)):
        return None
    return (
        f"too wide or too narrow for floating-point arithmetic (mean {mean:.3g}, sd {sd:.3g}): "
        f"the sd must lie between {low:g} and {high:g}, and the mean and the 0.05% to 99.95% "
        "points must be finite"
    )
