"""The demo scenario: a two-tracer pulse pushed through a packed soil column.

A laboratory column 0.40 m long is packed with soil and run at steady flow. A solution
carrying two solutes is fed at the inlet for 0.25 d, then clean water: chloride, a
conservative tracer that neither sorbs nor decays, and the solute under study, which sorbs
(retardation ``R``) and decays (first-order rate ``lambda``). Probes at 0.10, 0.20 and 0.30 m
record the breakthrough curve ``C/C0`` of each every 0.1 d up to 2 d: six channels. Each data
point is the mean of replicate column runs, stated with the standard error of that mean.

Both species follow 1-D advection-dispersion with linear equilibrium sorption and first-order
decay at the same rate in the dissolved and sorbed phases::

    R dC/dt = D d2C/dx2 - v dC/dx - lambda R C,      D = dispersivity * v

chloride with ``R = 1`` and ``lambda = 0``. Dividing by ``R`` shows why both are measured: one
sorbing solute's curves depend on ``v`` and ``R`` only through ``v / R``, so alone it cannot
tell a fast, strongly sorbing solute from a slow, weakly sorbing one. Chloride moves with the
water and fixes ``v`` and the dispersivity; the solute's delay and loss then give ``R`` and
``lambda``.

Each species is solved with ``C(0, t)`` the inlet concentration (a first-type inlet) and
``dC/dx = 0`` at the outlet, on a uniform grid of nodes with second-order central differences
and Crank-Nicolson time steps (the inlet term averaged over each step). Everything here is
invented for the demo; the data come from `TRUE_PARAMETERS` plus noise with a fixed seed.

``python -m honing.api.demo simulate`` is the simulator behind the worker protocol: it reads
``HONING_PARAMS`` and writes ``HONING_OUTPUTS`` (all six channels). ``python -m
honing.api.demo spec`` prints the calibration spec as JSON.
"""

from __future__ import annotations

import json
import math
import os
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import numpy as np

__all__ = [
    "CELLS",
    "COLUMN_LENGTH",
    "OBSERVATIONS",
    "PROBE_DEPTHS",
    "PULSE_DURATION",
    "SAMPLE_TIMES",
    "SPECIES",
    "TIME_STEP",
    "TRUE_PARAMETERS",
    "demo_spec",
    "main",
    "simulate_column",
    "simulate_tracer_test",
    "synthetic_observations",
]

#: Column length, m.
COLUMN_LENGTH = 0.40
#: Grid intervals along the column: 2 mm nodes, so the cell Peclet number dx / dispersivity
#: stays at or below 2 over the whole prior of the dispersivity (1 mm and up).
CELLS = 200
#: Time step, d (0.1 d sampling interval / 50; the 0.25 d pulse spans 125 steps).
TIME_STEP = 0.002
#: Duration of the tracer pulse at the inlet, d.
PULSE_DURATION = 0.25
#: Probe depths below the inlet, m.
PROBE_DEPTHS = (0.10, 0.20, 0.30)
#: Sampling times, d.
SAMPLE_TIMES = tuple(round(0.1 * k, 1) for k in range(1, 21))
#: The two co-injected species: the conservative tracer first, then the sorbing solute.
SPECIES = ("chloride", "solute")
#: Observation channel names, species by species, each at every probe (shallowest first).
OBSERVATIONS = (
    "chloride_10cm",
    "chloride_20cm",
    "chloride_30cm",
    "solute_10cm",
    "solute_20cm",
    "solute_30cm",
)
#: The values the synthetic data were generated from (known only because they are invented).
TRUE_PARAMETERS = {"velocity": 0.62, "dispersivity": 0.0045, "retardation": 1.7, "decay": 0.12}
#: Replicate column runs behind each data point, and the generator seed.
REPLICATES = 4
SEED = 20240611
#: Sd of one probe reading, ``READING_SD + READING_SD_SLOPE * C/C0``, from the probes'
#: calibration against standards (the same for both species).
READING_SD = 0.01
READING_SD_SLOPE = 0.04
#: Smallest stated sd: the sd of the mean of `REPLICATES` readings of clean water.
SD_FLOOR = READING_SD / math.sqrt(REPLICATES)


def simulate_column(
    velocity: float,
    dispersivity: float,
    retardation: float,
    decay: float,
    *,
    length: float = COLUMN_LENGTH,
    cells: int = CELLS,
    time_step: float = TIME_STEP,
    pulse: float = PULSE_DURATION,
    depths: Sequence[float] = PROBE_DEPTHS,
    times: Sequence[float] = SAMPLE_TIMES,
) -> np.ndarray:
    """Relative concentration ``C/C0`` of one species at each probe and sampling time.

    Parameters
    ----------
    velocity
        Pore-water velocity ``v``, m/d (> 0).
    dispersivity
        Longitudinal dispersivity, m (> 0); ``D = dispersivity * v``.
    retardation
        Retardation factor ``R`` (>= 1 for sorbing tracers; > 0).
    decay
        First-order decay rate ``lambda``, 1/d (>= 0).
    length
        Column length, m; the outlet boundary ``dC/dx = 0`` sits here.
    cells
        Grid intervals; every depth must fall on a node.
    time_step
        Crank-Nicolson step, d; every sampling time must be a whole number of steps.
    pulse
        Inlet pulse duration, d; ``math.inf`` for a continuous inlet.
    depths, times
        Probe depths (m) and sampling times (d).

    Returns
    -------
    numpy.ndarray
        Shape ``(len(depths), len(times))``.
    """
    import numpy as np

    if min(velocity, dispersivity, retardation, time_step, length) <= 0 or decay < 0:
        raise ValueError(
            "velocity, dispersivity, retardation, length and time step must be > 0 and decay "
            f">= 0; got {velocity}, {dispersivity}, {retardation}, {length}, {time_step}, {decay}"
        )
    dx = length / cells
    nodes = [_whole(d / dx, f"depth {d} m is not on the grid (dx = {dx} m)") for d in depths]
    stops = [_whole(t / time_step, f"time {t} d is not a whole number of steps") for t in times]
    if min(nodes) < 1 or max(nodes) > cells:
        raise ValueError(f"depths must lie in (0, {length}] m")
    a = dispersivity * velocity / (retardation * dx * dx)
    b = velocity / (2.0 * retardation * dx)
    # A: the semi-discrete operator on nodes 1..cells (node 0 is the inlet value).
    n = cells
    op = np.zeros((n, n))
    idx = np.arange(n)
    op[idx, idx] = -2.0 * a - decay
    op[idx[1:], idx[:-1]] = a + b
    op[idx[:-1], idx[1:]] = a - b
    op[n - 1, n - 2] = 2.0 * a  # mirror node beyond the outlet: zero gradient
    half = 0.5 * time_step * op
    implicit = np.eye(n) - half
    step = np.linalg.solve(implicit, np.eye(n) + half)
    inflow = np.linalg.solve(implicit, np.eye(n)[:, 0]) * time_step * (a + b)
    conc = np.zeros(n)
    out = np.empty((len(nodes), len(stops)))
    columns = {s: j for j, s in enumerate(stops)}
    probe_rows = np.asarray(nodes) - 1
    for k in range(1, max(stops) + 1):
        t0 = (k - 1) * time_step
        # Mean inlet concentration over [t0, t0 + dt]: the pulse's share of the step.
        inlet = min(1.0, max(0.0, (pulse - t0) / time_step))
        conc = step @ conc + inflow * inlet
        if k in columns:
            out[:, columns[k]] = conc[probe_rows]
    return out


def simulate_tracer_test(
    velocity: float, dispersivity: float, retardation: float, decay: float, **grid: Any
) -> np.ndarray:
    """``C/C0`` of both species at each probe and sampling time, rows in `OBSERVATIONS` order.

    Chloride is `simulate_column` with ``retardation = 1`` and ``decay = 0``; the solute uses
    the given values. The keyword arguments (grid, pulse, depths, times) go to both.

    Returns
    -------
    numpy.ndarray
        Shape ``(2 * len(depths), len(times))``: chloride at every depth, then the solute.
    """
    import numpy as np

    chloride = simulate_column(velocity, dispersivity, 1.0, 0.0, **grid)
    solute = simulate_column(velocity, dispersivity, retardation, decay, **grid)
    return np.vstack([chloride, solute])


def synthetic_observations(seed: int = SEED) -> list[dict[str, Any]]:
    """The demo's measured data: replicate means and their standard errors, per channel.

    Each of `REPLICATES` column runs is the model at `TRUE_PARAMETERS` plus reading noise of
    sd ``READING_SD + READING_SD_SLOPE * C/C0`` on both species; values are rounded to 4
    decimals as a logger would store them. The stated sd is that of a mean of `REPLICATES`
    readings at the measured level, from the probes' calibration: the sample sd of only four
    replicates is itself uncertain by about 40 %, and where it comes out small it would make
    the posterior overconfident.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    clean = simulate_tracer_test(**TRUE_PARAMETERS)
    noise_sd = READING_SD + READING_SD_SLOPE * clean
    runs = clean + noise_sd * rng.standard_normal((REPLICATES, *clean.shape))
    mean = runs.mean(axis=0)
    level = np.clip(mean, 0.0, None)
    sem = (READING_SD + READING_SD_SLOPE * level) / math.sqrt(REPLICATES)
    return [
        {
            "name": name,
            "values": [round(float(v), 4) for v in mean[i]],
            "sd": [round(float(s), 4) for s in sem[i]],
            "coords": list(SAMPLE_TIMES),
        }
        for i, name in enumerate(OBSERVATIONS)
    ]


def demo_spec() -> dict[str, Any]:
    """The demo calibration spec (the same as ``examples/column_demo.toml``)."""
    return {
        "name": "tracer-column-demo",
        "parameters": [
            {
                "name": "velocity",
                # The pump rate gives the Darcy flux; the porosity of the packed soil is
                # guessed, so v is known to a factor of about 1.6 either way.
                "prior": {"kind": "lognormal", "median": 0.5, "sigma_log": 0.5},
                "unit": "m/d",
            },
            {
                "name": "dispersivity",
                "prior": {"kind": "loguniform", "low": 0.001, "high": 0.03},
                "unit": "m",
            },
            {
                "name": "retardation",
                # At least 1; up to 3 for this soil without a batch sorption test. The solute
                # alone gives only v / R; chloride gives v, and so R.
                "prior": {"kind": "uniform", "low": 1.0, "high": 3.0},
                "unit": "-",
            },
            {
                "name": "decay",
                "prior": {"kind": "lognormal", "median": 0.1, "sigma_log": 1.0},
                "unit": "1/d",
            },
        ],
        "observations": [
            {
                "name": o["name"],
                "values": o["values"],
                "sd": o["sd"],
                "coords": o["coords"],
                "unit": "C/C0",
                "coords_label": "time [d]",
            }
            for o in _OBSERVED
        ],
        "noise": {"scale": "fixed"},
        "design": {"initial_runs": 30, "batch_size": 20},
        "surrogate": {"max_degree": 6, "retain_fraction": 0.5},
        # Converges after about 190 to 280 runs (the path depends on the order runs finish).
        "budget": {"max_runs": 400},
        "seed": 7,
    }


def main(argv: Sequence[str] | None = None) -> int:
    """``simulate`` (the worker protocol) or ``spec`` (print the spec as JSON)."""
    args = list(sys.argv[1:] if argv is None else argv)
    if args == ["spec"]:
        sys.stdout.write(json.dumps(demo_spec(), indent=2) + "\n")
        return 0
    if args != ["simulate"]:
        sys.stderr.write("usage: python -m honing.api.demo simulate|spec\n")
        return 2
    # One BLAS thread (numpy is imported only below): the small products here gain nothing
    # from threads, and runs started side by side (honing worker -j N) would fight for cores.
    for variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(variable, "1")
    try:
        params_path, outputs_path = os.environ["HONING_PARAMS"], os.environ["HONING_OUTPUTS"]
    except KeyError as exc:
        sys.stderr.write(f"demo simulate: {exc.args[0]} is not set (run it via honing worker)\n")
        return 2
    with open(params_path, encoding="utf-8") as f:
        params = json.load(f)
    try:
        result = simulate_tracer_test(
            float(params["velocity"]),
            float(params["dispersivity"]),
            float(params["retardation"]),
            float(params["decay"]),
        )
    except (KeyError, ValueError) as exc:
        sys.stderr.write(f"demo simulate: bad parameters {params}: {exc}\n")
        return 1
    outputs = {
        name: [float(v) for v in row] for name, row in zip(OBSERVATIONS, result, strict=True)
    }
    with open(outputs_path, "w", encoding="utf-8") as f:
        json.dump(outputs, f)
    return 0


def _whole(x: float, message: str) -> int:
    k = round(x)
    if abs(x - k) > 1e-9 * max(1.0, abs(x)):
        raise ValueError(message)
    return int(k)


# Generated once by ``synthetic_observations()`` and kept verbatim (the tests regenerate it).
# fmt: off
_OBSERVED: list[dict[str, Any]] = [
    {
        "name": "chloride_10cm",
        "values": [
            0.0708, 0.7992, 0.9737, 0.4984, 0.0516, -0.0008, -0.008, 0.0005, -0.0086, 0.0071,
            -0.0015, 0.0022, 0.0004, -0.0007, 0.0027, -0.0067, -0.0101, 0.0025, 0.0022, 0.0039,
        ],
        "sd": [
            0.0064, 0.021, 0.0245, 0.015, 0.006, 0.005, 0.005, 0.005, 0.005, 0.0051,
            0.005, 0.005, 0.005, 0.005, 0.0051, 0.005, 0.005, 0.0051, 0.005, 0.0051,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "chloride_20cm",
        "values": [
            -0.0043, 0.0137, 0.4081, 0.9025, 0.8406, 0.3086, 0.0483, 0.0024, 0.0027, -0.0041,
            0.0085, -0.0039, 0.0002, -0.0139, 0.0042, -0.0058, -0.0109, 0.0055, 0.0057, -0.0031,
        ],
        "sd": [
            0.005, 0.0053, 0.0132, 0.0231, 0.0218, 0.0112, 0.006, 0.005, 0.0051, 0.005,
            0.0052, 0.005, 0.005, 0.005, 0.0051, 0.005, 0.005, 0.0051, 0.0051, 0.005,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "chloride_30cm",
        "values": [
            0.0019, -0.0078, 0.0017, 0.1519, 0.6265, 0.8302, 0.6036, 0.2035, 0.0294, 0.0027,
            0.0007, 0.0042, -0.0011, 0.0043, 0.0054, 0.0074, -0.0076, -0.0032, -0.0044, -0.0056,
        ],
        "sd": [
            0.005, 0.005, 0.005, 0.008, 0.0175, 0.0216, 0.0171, 0.0091, 0.0056, 0.0051,
            0.005, 0.0051, 0.005, 0.0051, 0.0051, 0.0051, 0.005, 0.005, 0.005, 0.005,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "solute_10cm",
        "values": [
            -0.0004, 0.1741, 0.6581, 0.9126, 0.5274, 0.1639, 0.0331, 0.0102, 0.0056, -0.0013,
            0.0029, -0.0075, 0.0035, 0.0034, -0.0047, 0.0025, 0.0005, 0.0092, -0.0007, -0.0014,
        ],
        "sd": [
            0.005, 0.0085, 0.0182, 0.0233, 0.0155, 0.0083, 0.0057, 0.0052, 0.0051, 0.005,
            0.0051, 0.005, 0.0051, 0.0051, 0.005, 0.005, 0.005, 0.0052, 0.005, 0.005,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "solute_20cm",
        "values": [
            -0.0055, -0.009, 0.0078, 0.0783, 0.3555, 0.6344, 0.6922, 0.3773, 0.1696, 0.0539,
            0.0132, 0.0067, 0.0008, 0.002, -0.009, -0.0074, 0.0068, -0.0041, 0.0028, 0.0065,
        ],
        "sd": [
            0.005, 0.005, 0.0052, 0.0066, 0.0121, 0.0177, 0.0188, 0.0125, 0.0084, 0.0061,
            0.0053, 0.0051, 0.005, 0.005, 0.005, 0.005, 0.0051, 0.005, 0.0051, 0.0051,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "solute_30cm",
        "values": [
            -0.0017, 0.0054, -0.0057, 0.0031, -0.0006, 0.0307, 0.188, 0.4377, 0.5461, 0.5122,
            0.3188, 0.1394, 0.068, 0.0139, 0.0035, 0.0047, 0.0008, 0.0026, -0.0012, -0.0066,
        ],
        "sd": [
            0.005, 0.0051, 0.005, 0.0051, 0.005, 0.0056, 0.0088, 0.0138, 0.0159, 0.0152,
            0.0114, 0.0078, 0.0064, 0.0053, 0.0051, 0.0051, 0.005, 0.0051, 0.005, 0.005,
        ],
        "coords": list(SAMPLE_TIMES),
    },
]
# fmt: on


if __name__ == "__main__":
    sys.exit(main())
