"""Per-round numbers: trust of a run, posterior summaries, divergences, and the stop rule."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import stats

from honing.engine.priors import Family, reference_logpdf

__all__ = [
    "TRUST_FLOOR",
    "TRUST_SCALE",
    "VALIDATION_TOLERANCE",
    "converged",
    "fit_trust",
    "gaussian_kl",
    "kl_tolerance",
    "marginal_kl",
    "parameter_summary",
    "rounds_to_go",
    "trust_from_error",
    "unmet_conditions",
]

#: Scale of the trust index, in noise units: a run whose outputs the surrogate predicted within
#: an rms of one noise sd keeps trust 0.8; at 2 sd, 0.5; at 6 sd, 0.1; at 20 sd, 0.01. The
#: slow (Cauchy-like) decay keeps a round of surprising runs from collapsing onto the floor.
TRUST_SCALE = 2.0
#: Trust never falls below this, so that a round whose every run surprised the surrogate
#: still has a well-posed weighted fit.
TRUST_FLOOR = 1e-3
#: Validation error (rms surrogate error in noise units, out of sample) below which the
#: surrogate's error is small against the noise: it adds under 4% to the noise variance.
VALIDATION_TOLERANCE = 0.2
#: Posterior change (nats) treated as no change, beyond the sampling noise `kl_tolerance` adds.
#: Between Gaussians of equal sd, KL = delta^2 / 2 for a mean moved by delta sd, so 0.005
#: allows 0.1 sd between rounds, the accuracy the summaries aim for (0.02 allowed 0.2 sd, and
#: 2-parameter calibrations cut by a failure boundary stopped with means 0.2 sd off).
KL_FLOOR = 0.005
#: Fewest draws a marginal's information gain is estimated from (a served pool holds
#: thousands; below a handful scipy's spacing estimates warn and give NaN).
MIN_KL_DRAWS = 8
#: Quantile of the sampling noise of the posterior change below which a round counts as
#: unchanged (`kl_tolerance`).
NOISE_QUANTILE = 0.95
#: Consecutive rounds both tolerances must hold for convergence.
CONVERGED_ROUNDS = 2


def trust_from_error(rms_error: float) -> float:
    """Trust index of one run from the rms of (true - predicted) whitened residuals.

    ``rho = max(1 / (1 + (e / TRUST_SCALE)^2), TRUST_FLOOR)``: 1 for a perfect prediction,
    tending to the floor as the discrepancy grows, in units of the noise sd.
    """
    if not np.isfinite(rms_error):
        return TRUST_FLOOR
    return float(_trust(np.asarray(rms_error, dtype=float)))


def _trust(errors: np.ndarray) -> np.ndarray:
    """``max(1 / (1 + (e / TRUST_SCALE)^2), TRUST_FLOOR)`` elementwise, for finite errors."""
    return np.maximum(1.0 / (1.0 + (errors / TRUST_SCALE) ** 2), TRUST_FLOOR)


def fit_trust(errors: np.ndarray) -> np.ndarray:
    """Fit weights of runs from their prediction errors, relative to the typical error.

    Each run's trust (`trust_from_error`) with its rms prediction error divided by
    ``max(1, median)`` of the finite errors: a run counts as surprising when the surrogate
    predicted it much worse than the others, not merely worse than the noise. While the
    surrogate is still poor everywhere, absolute trust would give every run it predicted a
    weight near the floor, against 1 for the initial design far out, and the fit would
    follow the design instead of the posterior region. Runs without a prediction get 1.

    Parameters
    ----------
    errors : ndarray, shape (n_runs,)
        Rms of (true - predicted) whitened residuals per run; NaN without a prediction.

    Returns
    -------
    ndarray, shape (n_runs,)
    """
    errors = np.asarray(errors, dtype=float)
    finite = np.isfinite(errors)
    if not finite.any():
        return np.ones(errors.shape)
    relative = errors[finite] / max(1.0, float(np.median(errors[finite])))
    out = np.ones(errors.shape)
    out[finite] = _trust(relative)
    return out


def gaussian_kl(m0: np.ndarray, s0: np.ndarray, m1: np.ndarray, s1: np.ndarray) -> float:
    """KL divergence ``KL(N(m0, s0) || N(m1, s1))`` between multivariate Gaussians, in nats.

    ``(tr(S1^-1 S0) + (m1 - m0)^T S1^-1 (m1 - m0) - d + ln(det S1 / det S0)) / 2``.

    Parameters
    ----------
    m0, m1 : ndarray, shape (dim,)
    s0, s1 : ndarray, shape (dim, dim)
        Symmetric positive definite covariances.

    References
    ----------
    .. [1] Kullback, S. (1959). Information Theory and Statistics. Wiley; the Gaussian case is
       eq. (9.1.x) in many texts, e.g. Duchi, J., "Derivations for linear algebra and
       optimization", sect. 9.
    """
    m0, m1 = np.atleast_1d(m0), np.atleast_1d(m1)
    s0, s1 = np.atleast_2d(s0), np.atleast_2d(s1)
    d = m0.size
    l1 = np.linalg.cholesky(s1)
    l0 = np.linalg.cholesky(s0)
    a = np.linalg.solve(l1, l0)
    b = np.linalg.solve(l1, m1 - m0)
    logdet = 2.0 * (np.log(np.diag(l1)).sum() - np.log(np.diag(l0)).sum())
    return float(0.5 * (np.sum(a**2) + b @ b - d + logdet))


def kl_tolerance(dim: int, ess: float) -> float:
    """Largest posterior change still counted as no change.

    Two Gaussian fits to independent samples of ``n`` draws from one posterior differ by
    sampling noise alone: ``n KL`` between them tends to a chi-square variable with
    ``k = d + d(d+1)/2`` degrees of freedom (the fitted means and covariances; the
    likelihood-ratio limit of Wilks 1938, with the difference of two fits carrying twice one
    fit's variance), so its mean is ``k / n``. The tolerance is `KL_FLOOR` plus the 95%
    quantile of that noise, with the chain's smallest effective sample size for ``n``: a
    tolerance at the mean was passed by only about half of unchanged rounds.
    """
    k = dim + dim * (dim + 1) / 2
    return KL_FLOOR + float(stats.chi2.ppf(NOISE_QUANTILE, k)) / max(ess, 1.0)


def marginal_kl(post: np.ndarray, family: Family) -> float:
    """KL divergence from prior to posterior marginal, ``KL(posterior || prior)``, in nats.

    ``KL = -H(posterior) - E_posterior[log prior]`` from draws in reference coordinates, where
    the prior is U[-1, 1] or N(0, 1) and the divergence is the same as in physical ones (it
    is invariant under the monotone map). The expectation is a plain average over the draws
    and the entropy an m-spacing estimate, so neither bins nor truncates the tails: a
    histogram on the central 99.8% of N(0, 1) draws, renormalised, left out the tails' share
    of the entropy and overstated the divergence from N(0, 10^2) by 0.013 nats. Vasicek's
    estimate for N(0, 1) references; on U[-1, 1] its spacings at the hard edges overstate
    the divergence (0.006-0.010 nats for 20,000-8,000 draws of the prior itself), which
    Ebrahimi's edge-corrected weights cut to 0.002-0.003.

    Parameters
    ----------
    post : ndarray, shape (n_draws,)
        Posterior draws of one parameter in reference coordinates.
    family : {"legendre", "hermite"}
        Its reference family.

    Returns
    -------
    float
        NaN when the draws do not spread (fewer than two distinct values), or are fewer
        than `MIN_KL_DRAWS`.

    References
    ----------
    .. [1] Vasicek, O. (1976). A test for normality based on sample entropy. J. R. Stat. Soc.
       B 38, 54-59.
    .. [2] Ebrahimi, N., Pflughoeft, K., Soofi, E. S. (1994). Two measures of sample entropy.
       Stat. Probab. Lett. 20, 225-234.
    """
    post = np.asarray(post, dtype=float)
    if post.size < MIN_KL_DRAWS or np.unique(post).size < 2:
        return float("nan")
    method = "ebrahimi" if family == "legendre" else "vasicek"
    with np.errstate(divide="ignore"):  # repeated draws give empty spacings: -inf, NaN below
        entropy = stats.differential_entropy(post, method=method)
    kl = -entropy - float(np.mean(reference_logpdf(family, post)))
    return float(kl) if np.isfinite(kl) else float("nan")


def parameter_summary(draws: np.ndarray, map_value: float, prior_sd: float) -> dict[str, Any]:
    """Mean, sd, median, 95% credible interval, MAP and prior sd of one parameter's draws."""
    lo, med, hi = np.quantile(draws, [0.025, 0.5, 0.975])
    sd = float(np.std(draws, ddof=1))
    return {
        "mean": float(np.mean(draws)),
        "sd": sd,
        "median": float(med),
        "ci95": [float(lo), float(hi)],
        "map": float(map_value),
        "prior_sd": float(prior_sd),
        "sd_ratio": sd / prior_sd if np.isfinite(prior_sd) and prior_sd > 0 else None,
    }


def converged(history: Sequence[dict[str, Any]]) -> bool:
    """True when validation error and posterior change met their tolerances in the last
    `CONVERGED_ROUNDS` rounds, each round's chain having met its own length rule (a chain
    stopped at its cap has a rough ESS, and so a loose change tolerance): when
    `unmet_conditions` finds nothing unmet."""
    return not unmet_conditions(history)


def unmet_conditions(history: Sequence[dict[str, Any]]) -> list[str]:
    """What keeps the last `CONVERGED_ROUNDS` rounds from counting as converged, one phrase
    per condition with the value behind it and its round; empty when nothing does.

    A calibration that spends its budget without converging reports these, so that its user
    can tell whether the surrogate still mispredicted new runs, the posterior was still
    moving between rounds, or a round's chain was too short to measure the change. A value
    that is missing or not a number (a NaN stored as null) counts as unmet.
    """
    recent = list(history)[-CONVERGED_ROUNDS:]
    labels = [h.get("round", len(history) - len(recent) + i + 1) for i, h in enumerate(recent)]
    reasons = []
    if len(recent) < CONVERGED_ROUNDS:
        reasons.append(
            f"only {len(recent)} round(s) fitted, and {CONVERGED_ROUNDS} rounds in a row must "
            "pass every check"
        )
    errors = [(h.get("validation_error"), r) for h, r in zip(recent, labels, strict=True)]
    unscored = [r for e, r in errors if e is None]
    if unscored:
        reasons.append(
            f"round {unscored[-1]} had no new runs that an earlier surrogate had predicted, so "
            "no surrogate's predictions were checked there"
        )
    missed = [(e, r) for e, r in errors if e is not None and not e < VALIDATION_TOLERANCE]
    if missed:
        error, round_ = max(missed, key=lambda m: (np.nan_to_num(m[0], nan=np.inf), m[1]))
        reasons.append(
            f"the runs new in round {round_} differed from the surrogate's predictions by "
            f"{error:.3g} noise sd (rms), where convergence needs under {VALIDATION_TOLERANCE:g}"
        )
    changes = [
        (h.get("posterior_change"), h.get("kl_tolerance"), r)
        for h, r in zip(recent, labels, strict=True)
    ]
    uncompared = [r for c, t, r in changes if c is None]
    if uncompared:
        reasons.append(f"round {uncompared[-1]} had no earlier posterior to compare with")
    untolerated = [r for c, t, r in changes if c is not None and t is None]
    if untolerated:
        reasons.append(f"round {untolerated[-1]} recorded no tolerance for its change")
    moving = [(c, t, r) for c, t, r in changes if c is not None and t is not None and not c < t]
    if moving:
        change, tolerance, round_ = max(moving, key=lambda m: np.nan_to_num(m[0], nan=np.inf))
        reasons.append(
            f"the posterior still moved in round {round_}: by {change:.3g} nats, as much as a "
            f"mean shifting {_kl_shift(change):.2g} sd, where convergence needs under "
            f"{tolerance:.2g} nats ({_kl_shift(tolerance):.2g} sd)"
        )
    capped = [r for h, r in zip(recent, labels, strict=True) if not h.get("chain_complete", True)]
    if capped:
        reasons.append(
            f"round {capped[-1]}'s sampler chain ran to its step cap, too short to measure "
            "the change"
        )
    return reasons


def rounds_to_go(history: Sequence[dict[str, Any]]) -> int:
    """Fewest further rounds before `converged` can hold: `CONVERGED_ROUNDS` less the latest
    rounds that each pass every check, and at least one."""
    passing = 0
    for entry in reversed(list(history)):
        if unmet_conditions([entry] * CONVERGED_ROUNDS):
            break
        passing += 1
    return max(1, CONVERGED_ROUNDS - passing)


def _kl_shift(kl: float) -> float:
    """Shift of a Gaussian's mean, in its sd, with KL divergence ``kl``: ``sqrt(2 kl)``."""
    return float(np.sqrt(2.0 * kl))
