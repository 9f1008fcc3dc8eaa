"""Lab-automation style use of the honing HTTP API with httpx alone (no honing import).

A bench script calibrates a lumped cooling model of a machined aluminium block: the block is
heated, set on an insulating stand, and a thermocouple logs its temperature every minute.
Two parameters are uncertain: the heat transfer coefficient ``h`` (W/m2/K) and the room
temperature ``ambient`` (degC). The model is

    T(t) = ambient + (T0 - ambient) * exp(-h * area * t / (mass * heat_capacity))

The measured curve below is invented for this example. The same loop works when ``evaluate``
drives a real instrument or a long simulation instead.

    python examples/lab_script.py --url http://127.0.0.1:8750 [--max-runs 40]

Calibrated values are estimates conditional on the model and the data; check them against
independent measurements before use, and follow local codes and licensed practice.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from typing import Any

import httpx

MASS = 0.50  # kg
HEAT_CAPACITY = 900.0  # J/kg/K, aluminium
AREA = 0.018  # m2 exposed to air
T0 = 80.0  # degC at t = 0
TIMES = [60.0 * k for k in range(1, 13)]  # s
# Invented: h = 12.5 W/m2/K, ambient = 21.3 degC, thermocouple noise sd 0.3 K, rounded to 0.1 K.
MEASURED = [77.9, 76.2, 75.1, 72.7, 71.8, 69.7, 69.2, 67.5, 66.5, 64.6, 63.6, 62.2]

SPEC: dict[str, Any] = {
    "name": "aluminium-block-cooling",
    "parameters": [
        {
            "name": "h",
            "prior": {"kind": "lognormal", "median": 10.0, "sigma_log": 0.5},
            "unit": "W/m2/K",
        },
        {"name": "ambient", "prior": {"kind": "normal", "mean": 22.0, "sd": 2.0}, "unit": "degC"},
    ],
    "observations": [{"name": "temperature", "values": MEASURED, "sd": 0.3, "coords": TIMES}],
    "design": {"initial_runs": 8, "batch_size": 4},
    "budget": {"max_runs": 40},
    "seed": 11,
}


def evaluate(parameters: dict[str, float]) -> dict[str, list[float]]:
    """The bench model: block temperature at each logging time."""
    rate = parameters["h"] * AREA / (MASS * HEAT_CAPACITY)
    ambient = parameters["ambient"]
    return {"temperature": [ambient + (T0 - ambient) * math.exp(-rate * t) for t in TIMES]}


def check(response: httpx.Response) -> Any:
    """The JSON answer, or exit with the problem document's title and detail."""
    if response.status_code >= 400:
        try:
            problem = response.json()
            text = f"{problem.get('title')} ({response.status_code}): {problem.get('detail')}"
        except ValueError:
            text = f"HTTP {response.status_code}"
        sys.exit(f"lab_script: {text}")
    return response.json()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--url", default="http://127.0.0.1:8750")
    parser.add_argument("--max-runs", type=int, default=SPEC["budget"]["max_runs"])
    args = parser.parse_args()
    try:
        return calibrate(args.url, {**SPEC, "budget": {"max_runs": args.max_runs}})
    except httpx.TransportError as exc:
        sys.exit(f"lab_script: cannot reach {args.url} ({type(exc).__name__}: {exc})")


def calibrate(url: str, spec: dict[str, Any]) -> int:
    """Create the calibration, evaluate leased points until it finishes, print the result."""
    with httpx.Client(base_url=url, timeout=30.0) as http:
        created = check(http.post("/v1/calibrations", json=spec))
        cid = created["id"]
        http.headers["Authorization"] = f"Bearer {created['token']}"
        print(f"calibration {cid}")
        while True:
            response = http.post(
                f"/v1/calibrations/{cid}/runs", json={"count": 4, "worker": "bench-rig-2"}
            )
            lease = check(response)
            if not lease["runs"]:
                if lease["status"] in ("converged", "budget_exhausted", "failed"):
                    break
                time.sleep(float(response.headers.get("Retry-After", "1")))
                continue
            for run in lease["runs"]:
                outputs = evaluate(run["parameters"])
                check(
                    http.put(
                        f"/v1/calibrations/{cid}/runs/{run['run_id']}", json={"outputs": outputs}
                    )
                )
        summary = check(http.get(f"/v1/calibrations/{cid}/posterior"))
    print(f"status {lease['status']}, round {summary['round']}, runs {summary['runs_completed']}")
    for name, stats in summary["parameters"].items():
        low, high = stats["ci95"]
        print(
            f"{name:8s} mean {stats['mean']:8.3f}  sd {stats['sd']:7.3f}"
            f"  95% [{low:.3f}, {high:.3f}]"
        )
    print(
        "Estimates conditional on the model and data; check them against independent measurements."
    )
    return {"converged": 0, "budget_exhausted": 3}.get(lease["status"], 1)


if __name__ == "__main__":
    sys.exit(main())
