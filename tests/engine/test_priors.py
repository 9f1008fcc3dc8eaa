import math
from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import integrate, special, stats

from honing.engine.errors import SpecError
from honing.engine.priors import (
    Family,
    LogNormal,
    LogUniform,
    Normal,
    Prior,
    TruncNormal,
    Uniform,
    prior_from_dict,
    reference_logpdf,
    reference_ppf,
    reference_sample,
)

EPS = np.finfo(float).eps
# Closed forms evaluated here and by scipy.stats are different arrangements of the same
# expressions, each a few ulps from exact; 1e-12 (about 5000 ulps) leaves room for the
# amplification by a log or an exp of moderate argument, never for a wrong formula.
FORMULA_RTOL = 1e-12
# Round trips lose the rounding of the intermediate value times the derivative of the map
# back (its condition number, computed per point below); each map is a handful of correctly
# rounded operations or scipy special functions accurate to a few ulps, and the worst case
# over these priors is about 15 such units, so 64 of them never hides an inexact inverse.
ROUND_TRIP_ULPS = 64
# scipy.integrate.quad is asked for relative accuracy 1e-12; its result can be off by a few
# times that.
QUAD_RTOL = 1e-10
# Kolmogorov-Smirnov tests run with a fixed seed at this significance: a correct map fails
# for about one seed in a thousand, a wrong one (a mis-scaled or shifted map) every time at
# these sample sizes.
KS_ALPHA = 1e-3
N_KS = 4000

# Each prior with the scipy.stats frozen distribution it must equal.
CASES: list[tuple[Prior, Any]] = [
    (Uniform(-2.0, 3.0), stats.uniform(loc=-2.0, scale=5.0)),
    (Normal(1.5, 0.7), stats.norm(loc=1.5, scale=0.7)),
    (LogNormal(2.0, 0.4), stats.lognorm(s=0.4, scale=2.0)),
    (TruncNormal(0.5, 2.0, -1.0, 4.0), stats.truncnorm(-0.75, 1.75, loc=0.5, scale=2.0)),
    # An interval 8 to 9 standard deviations into the upper tail.
    (TruncNormal(0.0, 1.0, 8.0, 9.0), stats.truncnorm(8.0, 9.0)),
    (LogUniform(0.01, 100.0), stats.loguniform(0.01, 100.0)),
]
IDS = ["uniform", "normal", "lognormal", "truncnormal", "truncnormal-tail", "loguniform"]
U = np.concatenate([[1e-12, 1e-6], np.linspace(0.01, 0.99, 99), [1 - 1e-6, 1 - 1e-12]])


def reference_grid(prior: Prior) -> np.ndarray:
    if prior.family == "legendre":
        return np.linspace(-1.0, 1.0, 401)
    return np.linspace(-8.0, 8.0, 401)


def jacobian(prior: Prior, xi: np.ndarray, x: np.ndarray) -> np.ndarray:
    # |dx/dxi| = q(xi) / p(x) for the reference density q.
    return np.exp(reference_logpdf(prior.family, xi) - prior.logpdf(x))


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_logpdf_matches_scipy(prior: Prior, dist: Any) -> None:
    x = dist.ppf(U)
    # Reference: scipy.stats frozen distribution.
    assert_allclose(prior.logpdf(x), dist.logpdf(x), rtol=FORMULA_RTOL, atol=FORMULA_RTOL)


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_ppf_matches_scipy(prior: Prior, dist: Any) -> None:
    # Reference: scipy.stats frozen distribution.
    assert_allclose(prior.ppf(U), dist.ppf(U), rtol=FORMULA_RTOL)


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_moments_match_scipy(prior: Prior, dist: Any) -> None:
    # Reference: scipy.stats frozen distribution.
    assert_allclose(prior.mean, dist.mean(), rtol=FORMULA_RTOL)
    assert_allclose(prior.sd, dist.std(), rtol=FORMULA_RTOL)


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_moments_match_integrals_of_the_density(prior: Prior, dist: Any) -> None:
    # Reference: the first two moments of the prior's own density by adaptive quadrature
    # (scipy.integrate.quad), which checks the closed forms and the density together.
    low, high = dist.support()
    centre = float(dist.median())

    def moment(power: int) -> float:
        def integrand(t: float) -> float:
            return (t - centre) ** power * math.exp(prior.logpdf(np.array([t]))[0])

        parts = [
            integrate.quad(integrand, a, b, epsabs=0.0, epsrel=1e-12)[0]
            for a, b in ((low, centre), (centre, high))
        ]
        return sum(parts)

    assert_allclose(moment(0), 1.0, rtol=QUAD_RTOL)
    assert_allclose(prior.mean, centre + moment(1), rtol=QUAD_RTOL)
    assert_allclose(prior.sd, math.sqrt(moment(2) - moment(1) ** 2), rtol=QUAD_RTOL)


def assert_within(actual: np.ndarray, expected: np.ndarray, tolerance: np.ndarray) -> None:
    excess = np.abs(actual - expected) / tolerance
    assert (excess <= 1.0).all(), f"worst point at {excess.max():.2f} times its tolerance"


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_reference_maps_invert_each_other(prior: Prior, dist: Any) -> None:
    xi = reference_grid(prior)
    x = prior.from_reference(xi)
    assert prior.in_support(x).all()
    slope = jacobian(prior, xi, x)
    back = prior.to_reference(x)
    assert_within(back, xi, ROUND_TRIP_ULPS * EPS * (np.abs(xi) + np.abs(x) / slope))
    again = prior.from_reference(back)
    assert_within(again, x, ROUND_TRIP_ULPS * EPS * (np.abs(x) + np.abs(xi) * slope))


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_reference_variable_has_the_reference_distribution(prior: Prior, dist: Any) -> None:
    # Draws from scipy's own sampler, mapped to the reference variable, must follow U[-1, 1]
    # or N(0, 1) (Kolmogorov-Smirnov test, scipy.stats.kstest).
    x = dist.rvs(size=N_KS, random_state=np.random.default_rng(20240611))
    reference = stats.uniform(-1.0, 2.0) if prior.family == "legendre" else stats.norm()
    result = stats.kstest(prior.to_reference(x), reference.cdf)
    assert result.pvalue > KS_ALPHA, f"{prior}: KS statistic {result.statistic:.4f}"


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_samples_follow_the_prior(prior: Prior, dist: Any) -> None:
    # Kolmogorov-Smirnov test against the scipy.stats distribution function.
    result = stats.kstest(prior.sample(np.random.default_rng(7), N_KS), dist.cdf)
    assert result.pvalue > KS_ALPHA, f"{prior}: KS statistic {result.statistic:.4f}"


def test_truncated_normal_far_in_the_tail() -> None:
    # Reference: the distribution function of N(0, 1) truncated to [8, 9] as a ratio of
    # integrals of the normal density by scipy.integrate.quad, which, unlike differences of
    # Phi, has no cancellation there.
    prior = TruncNormal(0.0, 1.0, 8.0, 9.0)
    x = np.array([8.0, 8.001, 8.1, 8.5, 8.99, 9.0])

    def mass(a: float, b: float) -> float:
        return integrate.quad(stats.norm.pdf, a, b, epsabs=0.0, epsrel=1e-13)[0]

    total = mass(8.0, 9.0)
    expected = np.array([(mass(8.0, t) - mass(t, 9.0)) / total for t in x])
    # Each mass is accurate to 1e-13 relative (the requested accuracy); xi is their
    # normalised difference, bounded by 1.
    assert_allclose(prior.to_reference(x), expected, rtol=0, atol=1e-12)


def test_truncated_normal_density_in_the_body() -> None:
    # Reference: the normal density renormalised by the mass of the interval, from
    # scipy.special.ndtr.
    prior = TruncNormal(0.5, 2.0, -1.0, 4.0)
    x = np.linspace(-1.0, 4.0, 21)
    mass = special.ndtr((4.0 - 0.5) / 2.0) - special.ndtr((-1.0 - 0.5) / 2.0)
    expected = stats.norm.logpdf(x, 0.5, 2.0) - math.log(mass)
    assert_allclose(prior.logpdf(x), expected, rtol=FORMULA_RTOL)


@pytest.mark.parametrize(
    ("prior", "outside"),
    [
        (Uniform(-2.0, 3.0), [-2.5, 3.5]),
        (LogNormal(2.0, 0.4), [-1.0, 0.0]),
        (TruncNormal(0.5, 2.0, -1.0, 4.0), [-1.5, 4.5]),
        (LogUniform(0.01, 100.0), [-1.0, 0.0, 0.005, 200.0]),
        (Normal(1.5, 0.7), [np.inf, -np.inf, np.nan]),
    ],
    ids=["uniform", "lognormal", "truncnormal", "loguniform", "normal"],
)
def test_outside_the_support(prior: Prior, outside: list[float]) -> None:
    x = np.array(outside)
    assert not prior.in_support(x).any()
    assert_array_equal(prior.logpdf(x), -np.inf)
    assert_array_equal(reference_logpdf(prior.family, prior.to_reference(x)), -np.inf)


def test_ppf_is_nan_outside_the_unit_interval() -> None:
    for prior, _ in CASES:
        assert np.isnan(prior.ppf(np.array([-0.1, 1.1, np.nan]))).all(), prior


def test_reference_densities_and_quantiles_match_scipy() -> None:
    # Reference: scipy.stats.uniform(-1, 2) and scipy.stats.norm.
    xi = np.linspace(-1.5, 1.5, 31)
    assert_allclose(reference_logpdf("legendre", xi), stats.uniform(-1.0, 2.0).logpdf(xi))
    assert_allclose(reference_logpdf("hermite", xi), stats.norm.logpdf(xi), rtol=FORMULA_RTOL)
    assert_allclose(reference_ppf("legendre", U), stats.uniform(-1.0, 2.0).ppf(U))
    assert_allclose(reference_ppf("hermite", U), stats.norm.ppf(U), rtol=FORMULA_RTOL)


@pytest.mark.parametrize("family", ["legendre", "hermite"])
def test_reference_samples(family: Family) -> None:
    reference = stats.uniform(-1.0, 2.0) if family == "legendre" else stats.norm()
    draws = reference_sample(family, np.random.default_rng(3), N_KS)
    assert draws.shape == (N_KS,)
    # Kolmogorov-Smirnov test against scipy.stats.
    assert stats.kstest(draws, reference.cdf).pvalue > KS_ALPHA


def test_unknown_family() -> None:
    with pytest.raises(ValueError, match=r"\('legendre', 'hermite'\), got 'jacobi'"):
        reference_logpdf("jacobi", np.zeros(2))


@pytest.mark.parametrize(("prior", "dist"), CASES, ids=IDS)
def test_dict_round_trip(prior: Prior, dist: Any) -> None:
    data = prior.to_dict()
    assert data["kind"] == prior.kind
    assert set(data) == {"kind", *type(prior).fields}
    assert prior_from_dict(data) == prior


def test_dict_uses_the_spec_field_names() -> None:
    assert Normal(1.0, 2.0).to_dict() == {"kind": "normal", "mean": 1.0, "sd": 2.0}
    assert TruncNormal(0.0, 1.0, -1.0, 2.0).to_dict() == {
        "kind": "truncnormal",
        "mean": 0.0,
        "sd": 1.0,
        "low": -1.0,
        "high": 2.0,
    }
    assert LogNormal(3.0, 0.5).to_dict() == {"kind": "lognormal", "median": 3.0, "sigma_log": 0.5}


LOC = ("parameters", 2, "prior")


@pytest.mark.parametrize(
    ("data", "field", "message"),
    [
        ({"kind": "gamma", "shape": 1}, "kind", "unknown prior kind 'gamma'"),
        ({"kind": 3}, "kind", "unknown prior kind 3"),
        ({"low": 0, "high": 1}, "kind", "field required"),
        ({"kind": "uniform", "low": 0}, "high", "field required"),
        ({"kind": "uniform", "low": 0, "high": 1, "mean": 0}, "mean", "unexpected field"),
        ({"kind": "uniform", "low": True, "high": 1}, "low", "must be a number, got bool"),
        ({"kind": "uniform", "low": "0", "high": 1}, "low", "must be a number, got str"),
        ({"kind": "uniform", "low": None, "high": 1}, "low", "must be a number"),
        ({"kind": "uniform", "low": 0, "high": math.nan}, "high", "finite"),
        ({"kind": "uniform", "low": -math.inf, "high": 1}, "low", "finite"),
        ({"kind": "normal", "mean": 10**400, "sd": 1}, "mean", "finite"),
        ({"kind": "uniform", "low": 1, "high": 1}, "high", "greater than low"),
        ({"kind": "normal", "mean": 0, "sd": 0}, "sd", "positive"),
        ({"kind": "normal", "mean": 0, "sd": -1.0}, "sd", "positive"),
        ({"kind": "lognormal", "median": 0, "sigma_log": 1}, "median", "positive"),
        ({"kind": "lognormal", "median": 1, "sigma_log": -0.1}, "sigma_log", "positive"),
        ({"kind": "loguniform", "low": 0, "high": 1}, "low", "positive"),
        ({"kind": "loguniform", "low": 2, "high": 1}, "high", "greater than low"),
        ({"kind": "truncnormal", "mean": 0, "sd": 1, "low": 2, "high": 1}, "high", "greater"),
        ({"kind": "truncnormal", "mean": 0, "sd": 0, "low": 0, "high": 1}, "sd", "positive"),
    ],
)
def test_validation_names_the_field(data: dict[str, Any], field: str, message: str) -> None:
    with pytest.raises(SpecError) as info:
        prior_from_dict(data, LOC)
    assert len(info.value.errors) == 1, info.value.errors
    assert info.value.errors[0]["loc"] == [*LOC, field]
    assert message in str(info.value.errors[0]["msg"])


def test_validation_reports_every_field() -> None:
    data = {"kind": "truncnormal", "mean": "a", "low": 0, "high": 1, "width": 2}
    with pytest.raises(SpecError) as info:
        prior_from_dict(data, LOC)
    assert sorted(tuple(e["loc"]) for e in info.value.errors) == sorted(
        [(*LOC, "mean"), (*LOC, "sd"), (*LOC, "width")]
    )


def test_validation_of_a_non_object() -> None:
    with pytest.raises(SpecError) as info:
        prior_from_dict([0, 1], LOC)
    assert info.value.errors == [{"loc": list(LOC), "msg": "must be an object, got list"}]


def test_default_location() -> None:
    with pytest.raises(SpecError) as info:
        prior_from_dict({"kind": "normal", "mean": 0})
    assert info.value.errors[0]["loc"] == ["prior", "sd"]


def test_constructors_validate() -> None:
    with pytest.raises(SpecError) as info:
        Normal(0.0, -1.0)
    assert info.value.errors[0]["loc"] == ["sd"]
    with pytest.raises(SpecError):
        LogUniform(1.0, math.nan)


@pytest.mark.parametrize(
    "data",
    [
        {"kind": "uniform", "low": -1e308, "high": 1e308},  # high - low overflows
        {"kind": "normal", "mean": 0, "sd": 1e308},  # its 99.95% point overflows
        {"kind": "normal", "mean": 0, "sd": 1e-320},  # subnormal: 1 / sd overflows
        {"kind": "lognormal", "median": 1, "sigma_log": 1e6},  # exp(sigma^2 / 2) overflows
        {"kind": "loguniform", "low": 1e-308, "high": 1e308},  # sd about 1e306
    ],
)
def test_priors_beyond_floating_point_are_refused_at_the_prior(data: dict[str, Any]) -> None:
    # Each is finite field by field, yet its spread (or its reciprocal or square) is not a
    # float; the engine's designs and posterior variances would overflow.
    with pytest.raises(SpecError) as info:
        prior_from_dict(data, LOC)
    assert info.value.errors[0]["loc"] == list(LOC)
    assert "floating-point" in str(info.value.errors[0]["msg"])


def test_a_wide_loguniform_keeps_its_spread() -> None:
    # high / low = 1e320 overflows, so the log width is log(high) - log(low): 320 decades.
    # The point 1e-40 lies half way in log terms and maps to 0 (exact arithmetic).
    prior = LogUniform(1e-200, 1e120)
    assert prior.to_reference(np.array([1e-40]))[0] == pytest.approx(0.0, abs=1e-12)
    # The moments do not depend on the width's overflow either (scipy.stats.loguniform).
    assert prior.sd == pytest.approx(stats.loguniform(1e-200, 1e120).std(), rel=1e-9)


def test_support_endpoints_map_onto_the_reference_interval_exactly() -> None:
    # By definition the support's ends map to -1 and 1; rounding in the log map used to
    # leave them up to 7.8e-14 outside, where the reference density is zero.
    rng = np.random.default_rng(3)
    for _ in range(2000):
        low = float(np.exp(rng.uniform(-30, 30)))
        high = low * float(np.exp(rng.uniform(0.01, 40)))
        for prior in (LogUniform(low, high), Uniform(low, high)):
            xi = prior.to_reference(np.array([low, high]))
            assert_array_equal(xi, [-1.0, 1.0])
            assert prior.in_support(prior.from_reference(xi)).all()


@pytest.mark.parametrize(("low", "high"), [(3.0, 3.00003), (10.0, 10.0001), (1e5, 1.00001e5)])
def test_a_narrow_loguniform_keeps_its_sd_and_is_accepted(low: float, high: float) -> None:
    # E[x^2] - mean^2 cancels every digit for close bounds (it gave 0.386 for 1e5..1.00001e5,
    # and refused the others). Reference: scipy.integrate.quad of the centred second moment
    # in t = log(x / low) / w on [0, 1]; the difference inside loses about eps / w relative,
    # so 1e-8 is loose enough for w down to 1e-5.
    w = math.log(high / low)
    mean = (high - low) / w
    var, _ = integrate.quad(lambda t: (low * math.exp(t * w) - mean) ** 2, 0.0, 1.0)
    prior = prior_from_dict({"kind": "loguniform", "low": low, "high": high}, LOC)
    assert prior.sd == pytest.approx(math.sqrt(var), rel=1e-8)
