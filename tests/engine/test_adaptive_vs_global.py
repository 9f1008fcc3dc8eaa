"""The adaptive scheme against one global fit over the prior, at equal runs (reduced benchmark).

Two concentrated problems from `tests/benchmarks/problems.py`: B2 at its smallest noise, and
B3 at delta = 4 with 5 KL modes. At the adaptive loop's final run count, the global fit's
posterior-weighted surrogate error (`bench_accuracy.surrogate_error`) must be at least
`MIN_RATIO` times the adaptive one. The full benchmark is `tests/benchmarks/bench_accuracy.py`.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from bench_accuracy import error_draws, run_adaptive, run_global
from make_references import reference_chain
from problems import Reference, b2_nonlinear, b3_elliptic

#: Smallest (b)/(a) ratio of surrogate errors at equal runs that counts as the adaptive scheme
#: beating the global fit: one order of magnitude, the target the brief sets for moderate B3
#: (the full benchmark measures far larger ratios on these concentrated settings).
MIN_RATIO = 10.0


def _b3_reference(problem) -> Reference:
    # emcee on the full 5-mode model from its mode (make_references.reference_chain), stopped
    # at emcee's own minimum of 50 autocorrelation times (get_autocorr_time raises below it):
    # the error metric only needs the true model at posterior draws.
    draws = reference_chain(problem, seed=77, tau_multiple=50)["draws"]
    return Reference(
        draws,
        draws.mean(0),
        draws.std(0, ddof=1),
        np.cov(draws, rowvar=False),
        "emcee on the full model",
    )


@pytest.mark.slow
@pytest.mark.parametrize("which", ["B2-concentrated", "B3-delta4-m5"])
def test_adaptive_beats_global_at_equal_runs(which):
    if which.startswith("B2"):
        problem = b2_nonlinear("concentrated", max_runs=40)
        ref = problem.reference()  # dense quadrature
    else:
        # converges near 240 runs (measured); the budget is a cap that leaves a margin
        problem = b3_elliptic("concentrated", 4.0, n_modes=5, max_runs=280)
        ref = _b3_reference(problem)
    draws, truth = error_draws(problem, ref)
    adaptive, _, _ = run_adaptive(problem, ref, draws, truth)
    global_fit = run_global(problem, adaptive.runs, ref, draws, truth)
    ratio = global_fit.sur_err / adaptive.sur_err
    assert ratio >= MIN_RATIO, (
        f"{which}: at {adaptive.runs} runs the global fit's surrogate error "
        f"{global_fit.sur_err:.3g} is only {ratio:.3g} times the adaptive one "
        f"{adaptive.sur_err:.3g} (wanted >= {MIN_RATIO})"
    )
