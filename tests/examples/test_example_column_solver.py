from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.special import erfc, erfcx
from threadpoolctl import threadpool_limits

from honing.api import demo
from honing.engine.spec import CalibrationSpec

# Ogata-Banks test problem: a long column (outlet effects below 1e-12 at the probes), probes
# at 4, 8 and 12 cm, a continuous inlet, no decay; three grids with dt / dx held fixed.
DEPTHS = (0.04, 0.08, 0.12)
TIMES = tuple(round(0.08 * k, 2) for k in range(1, 7))
GRIDS = ((150, 0.004), (300, 0.002), (600, 0.001))
CASES = {
    "demo truth": (0.62, 0.0045, 1.7),
    "dispersive, strongly sorbing": (0.3, 0.03, 3.0),
}


def ogata_banks(x: np.ndarray, t: np.ndarray, v: float, d: float, r: float) -> np.ndarray:
    """C/C0 for a continuous first-type inlet on a semi-infinite column.

    Ogata, A. and Banks, R. B. (1961), A solution of the differential equation of longitudinal
    dispersion in porous media, U.S. Geological Survey Professional Paper 411-A, with the
    retarded velocity v/R and dispersion D/R:
    C/C0 = 1/2 [erfc((x - vt)/(2 sqrt(Dt))) + exp(vx/D) erfc((x + vt)/(2 sqrt(Dt)))].
    The second term is evaluated as exp(vx/D - b^2) erfcx(b) so it cannot overflow.
    """
    v, d = v / r, d / r
    s = 2.0 * np.sqrt(d * t)
    a, b = (x - v * t) / s, (x + v * t) / s
    return 0.5 * (erfc(a) + np.exp(v * x / d - b * b) * erfcx(b))


def numerical(v: float, alpha: float, r: float, cells: int, dt: float) -> np.ndarray:
    with threadpool_limits(1):
        return demo.simulate_column(
            v,
            alpha,
            r,
            0.0,
            length=0.6,
            cells=cells,
            time_step=dt,
            pulse=math.inf,
            depths=DEPTHS,
            times=TIMES,
        )


@pytest.mark.parametrize("case", CASES)
def test_solver_matches_ogata_banks_and_converges_at_second_order(case: str) -> None:
    v, alpha, r = CASES[case]
    x, t = np.meshgrid(DEPTHS, TIMES, indexing="ij")
    exact = ogata_banks(x, t, v, alpha * v, r)
    errors, solutions = [], []
    for cells, dt in GRIDS:
        solution = numerical(v, alpha, r, cells, dt)
        solutions.append(solution)
        errors.append(np.abs(solution - exact).max())
    # Central differences and Crank-Nicolson are both second order, so halving dx and dt
    # together divides the error by about 4.
    orders = [math.log2(errors[i] / errors[i + 1]) for i in range(len(errors) - 1)]
    assert all(1.8 < p < 2.2 for p in orders), f"observed orders {orders}, errors {errors}"
    # The error of each grid is the truncation error that Richardson extrapolation estimates
    # from the next finer grid, (C_h - C_h/2) * 4/3, to within 25 %.
    for coarse, fine, error in zip(solutions, solutions[1:], errors, strict=False):
        estimate = np.abs(coarse - fine).max() * 4.0 / 3.0
        assert error == pytest.approx(estimate, rel=0.25), (error, estimate)
    assert errors[0] < 5e-3, "the coarsest grid is already within 0.5 % of C0"


def test_demo_grid_error_is_small_against_the_stated_sd() -> None:
    # Demo grid (dx = 2 mm, dt = 0.002 d) against a 4x finer one at the true parameters, for
    # both species (chloride, unretarded, has the sharper curves).
    p = demo.TRUE_PARAMETERS
    with threadpool_limits(1):
        base = demo.simulate_tracer_test(**p)
        fine = demo.simulate_tracer_test(**p, cells=4 * demo.CELLS, time_step=demo.TIME_STEP / 4)
    grid_error = np.abs(base - fine).max(axis=1)
    assert (grid_error < 0.3 * demo.SD_FLOOR).all(), grid_error


def test_chloride_is_the_conservative_limit_of_the_same_solver() -> None:
    p = demo.TRUE_PARAMETERS
    with threadpool_limits(1):
        both = demo.simulate_tracer_test(**p)
        chloride = demo.simulate_column(p["velocity"], p["dispersivity"], 1.0, 0.0)
        solute = demo.simulate_column(**p)
        other = demo.simulate_tracer_test(p["velocity"], p["dispersivity"], 2.5, 0.9)
    assert both.shape == (len(demo.OBSERVATIONS), len(demo.SAMPLE_TIMES))
    assert_allclose(both[:3], chloride, rtol=0, atol=0)
    assert_allclose(both[3:], solute, rtol=0, atol=0)
    # Retardation and decay act on the solute only.
    assert_allclose(other[:3], chloride, rtol=0, atol=0)


def test_chloride_separates_velocity_from_retardation() -> None:
    # The solute's equation divided by R depends on v and R only through v / R (and the
    # dispersivity and decay), so doubling both leaves its curves unchanged: alone it cannot
    # identify them. Chloride (R = 1) moves with v itself and tells the two points apart.
    p = demo.TRUE_PARAMETERS
    doubled = {**p, "velocity": 2 * p["velocity"], "retardation": 2 * p["retardation"]}
    with threadpool_limits(1):
        base = demo.simulate_tracer_test(**p)
        twin = demo.simulate_tracer_test(**doubled)
    assert_allclose(twin[3:], base[3:], rtol=0, atol=1e-12)
    # The chloride curves then differ by many times the stated sd.
    assert np.abs(twin[:3] - base[:3]).max() > 50 * demo.SD_FLOOR


def test_mass_balance_of_the_pulse_without_decay() -> None:
    # Without decay and retardation 1, the area under the curve at any depth the pulse has
    # fully passed equals the pulse duration (Ogata-Banks superposition of two step inputs).
    times = tuple(round(0.01 * k, 2) for k in range(1, 401))
    with threadpool_limits(1):
        curve = demo.simulate_column(0.6, 0.004, 1.0, 0.0, times=times, time_step=0.001)
    area = curve.sum(axis=1) * 0.01
    assert_allclose(area, demo.PULSE_DURATION, rtol=2e-3)


def first_type_with_decay(
    x: np.ndarray, t: np.ndarray, v: float, d: float, r: float, decay: float
) -> np.ndarray:
    """C/C0 for a continuous first-type inlet with first-order decay, zero where t <= 0.

    van Genuchten, M. Th. and Alves, W. J. (1982), Analytical solutions of the one-dimensional
    convective-dispersive solute transport equation, USDA Technical Bulletin 1661: with
    u = v sqrt(1 + 4 lambda D / v^2), C/C0 = 1/2 exp((v - u) x / 2D) erfc((x - ut)/(2 sqrt(Dt)))
    + 1/2 exp((v + u) x / 2D) erfc((x + ut)/(2 sqrt(Dt))); here with v/R and D/R, the decay
    acting in both phases.
    """
    v, d = v / r, d / r
    u = v * math.sqrt(1.0 + 4.0 * decay * d / v**2)
    tt = np.where(t > 0, t, 1.0)
    s = 2.0 * np.sqrt(d * tt)
    a, b = (x - u * tt) / s, (x + u * tt) / s
    first = np.exp((v - u) * x / (2 * d)) * erfc(a)
    second = np.exp((v + u) * x / (2 * d) - b * b) * erfcx(b)
    return np.where(t > 0, 0.5 * (first + second), 0.0)


def test_pulse_with_decay_matches_the_analytic_solution() -> None:
    # The demo's pulse is a step up at 0 minus a step up at the pulse's end (linearity).
    # Column 0.8 m long so the outlet condition does not reach the probes (semi-infinite).
    v, alpha, r, decay = 0.62, 0.0045, 1.7, 0.5
    x, t = np.meshgrid(demo.PROBE_DEPTHS, demo.SAMPLE_TIMES, indexing="ij")
    exact = first_type_with_decay(x, t, v, alpha * v, r, decay) - first_type_with_decay(
        x, t - demo.PULSE_DURATION, v, alpha * v, r, decay
    )
    with threadpool_limits(1):
        numerical = demo.simulate_column(v, alpha, r, decay, length=0.8, cells=2 * demo.CELLS)
    # Same dx and dt as the demo grid, whose error the Ogata-Banks test above bounds (~1e-3).
    assert_allclose(numerical, exact, atol=2e-3)


def test_bad_parameters_are_refused() -> None:
    with pytest.raises(ValueError, match="must be > 0"):
        demo.simulate_column(-0.1, 0.004, 1.5, 0.1)
    with pytest.raises(ValueError, match="not on the grid"):
        demo.simulate_column(0.6, 0.004, 1.5, 0.1, depths=(0.101,))


def test_stored_data_regenerate_from_the_seed() -> None:
    with threadpool_limits(1):
        regenerated = demo.synthetic_observations()
    spec = demo.demo_spec()
    for stored, fresh in zip(spec["observations"], regenerated, strict=True):
        assert stored["name"] == fresh["name"]
        assert_allclose(stored["values"], fresh["values"], atol=1e-12)
        assert_allclose(stored["sd"], fresh["sd"], atol=1e-12)


def test_demo_spec_is_valid_and_files_agree(examples: Path) -> None:
    spec = demo.demo_spec()
    parsed = CalibrationSpec.from_dict(spec)
    assert parsed.names == ["velocity", "dispersivity", "retardation", "decay"]
    assert parsed.output_size == 120
    assert [o.name for o in parsed.observations] == list(demo.OBSERVATIONS)
    toml_spec = tomllib.loads((examples / "column_demo.toml").read_text())
    assert toml_spec == spec
    assert json.loads((examples / "column_demo.json").read_text()) == spec
    # The true values lie inside every prior's support.
    for p in parsed.parameters:
        value = np.array([demo.TRUE_PARAMETERS[p.name]])
        assert bool(p.prior.in_support(value)[0]), p.name


def test_simulate_entry_follows_the_worker_protocol(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    params, outputs = tmp_path / "params.json", tmp_path / "outputs.json"
    params.write_text(json.dumps(demo.TRUE_PARAMETERS))
    monkeypatch.setenv("HONING_PARAMS", str(params))
    monkeypatch.setenv("HONING_OUTPUTS", str(outputs))
    with threadpool_limits(1):
        assert demo.main(["simulate"]) == 0
        expected = demo.simulate_tracer_test(**demo.TRUE_PARAMETERS)
    written = json.loads(outputs.read_text())
    assert list(written) == list(demo.OBSERVATIONS)
    assert_allclose([written[k] for k in demo.OBSERVATIONS], expected, rtol=0, atol=0)
