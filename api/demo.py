"""The demo scenario: a tracer pulse pushed through a packed soil column.

A laboratory column 0.40 m long is packed with soil and run at steady flow. A tracer
solution is fed at the inlet for 0.25 d, then clean water. Probes at 0.10, 0.20 and 0.30 m
record the breakthrough curves ``C/C0`` every 0.1 d up to 2 d. Each data point is the mean
of replicate column runs, stated with the standard error of that mean.

The model is 1-D advection-dispersion with linear equilibrium sorption (retardation ``R``)
and first-order decay at the same rate ``lambda`` in the dissolved and sorbed phases::

    R dC/dt = D d2C/dx2 - v dC/dx - lambda R C,      D = dispersivity * v

with ``C(0, t)`` the inlet concentration (a first-type inlet) and ``dC/dx = 0`` at the
outlet. It is solved on a uniform grid of nodes with second-order central differences and
Crank-Nicolson time steps (the inlet term averaged over each step). Everything here is
invented for the demo; the data come from `TRUE_PARAMETERS` plus noise with a fixed seed.

``python -m honing.api.demo simulate`` is the simulator behind the worker protocol: it reads
``HONING_PARAMS`` and writes ``HONING_OUTPUTS``. ``python -m honing.api.demo spec`` prints
the calibration spec as JSON.
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
    "TIME_STEP",
    "TRUE_PARAMETERS",
    "demo_spec",
    "main",
    "simulate_column",
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
#: Observation channel names, one per probe.
OBSERVATIONS = ("probe_10cm", "probe_20cm", "probe_30cm")
#: The values the synthetic data were generated from (known only because they are invented).
TRUE_PARAMETERS = {"velocity": 0.62, "dispersivity": 0.0045, "retardation": 1.7, "decay": 0.12}
#: Replicate column runs behind each data point, and the generator seed.
REPLICATES = 4
SEED = 20240611
#: Smallest stated sd: the probes' resolution in C/C0.
SD_FLOOR = 0.005


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
    """Relative concentration ``C/C0`` at each probe and sampling time.

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


def synthetic_observations(seed: int = SEED) -> list[dict[str, Any]]:
    """The demo's measured data: replicate means and their standard errors, per probe.

    Each of `REPLICATES` column runs is the model at `TRUE_PARAMETERS` plus probe noise of
    sd ``0.01 + 0.04 C/C0``; values are rounded to 4 decimals as a logger would store them.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    clean = simulate_column(**TRUE_PARAMETERS)
    noise_sd = 0.01 + 0.04 * clean
    runs = clean + noise_sd * rng.standard_normal((REPLICATES, *clean.shape))
    mean = runs.mean(axis=0)
    sem = np.maximum(runs.std(axis=0, ddof=1) / math.sqrt(REPLICATES), SD_FLOOR)
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
                # From the pump rate and the porosity measured when packing: about 10 %.
                "prior": {"kind": "truncnormal", "mean": 0.6, "sd": 0.06, "low": 0.3, "high": 0.9},
                "unit": "m/d",
            },
            {
                "name": "dispersivity",
                "prior": {"kind": "loguniform", "low": 0.001, "high": 0.03},
                "unit": "m",
            },
            {
                "name": "retardation",
                # Only v / R shapes the curves, so R is resolved through the velocity prior.
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
            {"name": o["name"], "values": o["values"], "sd": o["sd"], "coords": o["coords"]}
            for o in _OBSERVED
        ],
        "noise": {"scale": "fixed"},
        "design": {"initial_runs": 30, "batch_size": 20},
        "surrogate": {"max_degree": 6, "retain_fraction": 0.5},
        "budget": {"max_runs": 150},
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
        result = simulate_column(
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
        "name": "probe_10cm",
        "values": [
            -0.0022, 0.1676, 0.6439, 0.853, 0.5411, 0.1644, 0.0241, 0.0075, -0.0018, -0.0007,
            0.0019, 0.0016, 0.0013, 0.0005, -0.0032, -0.0023, -0.0066, 0.0057, 0.0008, 0.0017,
        ],
        "sd": [
            0.005, 0.005, 0.0134, 0.0332, 0.0129, 0.0081, 0.005, 0.005, 0.0071, 0.006,
            0.0067, 0.005, 0.005, 0.005, 0.005, 0.0052, 0.005, 0.005, 0.005, 0.005,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "probe_20cm",
        "values": [
            -0.002, -0.0049, 0.0026, 0.0796, 0.3405, 0.6307, 0.6734, 0.3998, 0.1757, 0.0514,
            0.0192, 0.0032, 0.0029, -0.0068, 0.004, -0.0083, 0.0022, 0.0004, 0.0005, 0.0061,
        ],
        "sd": [
            0.005, 0.0053, 0.005, 0.0066, 0.0076, 0.0132, 0.0179, 0.0113, 0.0063, 0.005,
            0.0067, 0.005, 0.0068, 0.005, 0.005, 0.0064, 0.0071, 0.0058, 0.0061, 0.0065,
        ],
        "coords": list(SAMPLE_TIMES),
    },
    {
        "name": "probe_30cm",
        "values": [
            -0.0008, -0.0007, -0.0095, 0.0024, -0.0008, 0.0383, 0.1813, 0.4301, 0.5629, 0.5175,
            0.304, 0.1546, 0.0574, 0.0114, 0.001, 0.0084, -0.0039, -0.0037, -0.0031, -0.0015,
        ],
        "sd": [
            0.005, 0.005, 0.0051, 0.005, 0.005, 0.007, 0.005, 0.0061, 0.0161, 0.0159,
            0.006, 0.005, 0.0057, 0.0052, 0.005, 0.005, 0.0079, 0.005, 0.005, 0.006,
        ],
        "coords": list(SAMPLE_TIMES),
    },
]
# fmt: on


if __name__ == "__main__":
    sys.exit(main())
