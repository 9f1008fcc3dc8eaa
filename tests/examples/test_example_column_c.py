from __future__ import annotations

import json
import os
import subprocess
from pathlib import Path

import httpx
import numpy as np
import pytest
from numpy.testing import assert_allclose
from threadpoolctl import threadpool_limits

from honing.api import demo

POINTS = [
    demo.TRUE_PARAMETERS,
    {"velocity": 0.9, "dispersivity": 0.001, "retardation": 1.0, "decay": 0.0},
    {"velocity": 0.3, "dispersivity": 0.03, "retardation": 3.0, "decay": 1.5},
]
# Both programs take the same Crank-Nicolson steps on the same grid; they differ only in
# how each step's tridiagonal system is solved (Thomas sweeps in C, a precomputed dense
# inverse in Python), so they agree to rounding: about 1e-14 after 1000 steps.
ROUNDING = 1e-11


def run_c(binary: Path, point: dict[str, float]) -> dict[str, list[float]]:
    args = [repr(point[k]) for k in ("velocity", "dispersivity", "retardation", "decay")]
    result = subprocess.run([str(binary), *args], capture_output=True, text=True, check=True)
    return json.loads(result.stdout)


@pytest.mark.parametrize("point", POINTS, ids=["truth", "sharp", "slow-decaying"])
def test_c_model_agrees_with_the_python_solver(column_binary: Path, point: dict) -> None:
    outputs = run_c(column_binary, point)
    assert list(outputs) == list(demo.OBSERVATIONS)
    with threadpool_limits(1):
        expected = demo.simulate_tracer_test(**point)
    assert_allclose(np.array([outputs[k] for k in demo.OBSERVATIONS]), expected, atol=ROUNDING)


def test_c_model_reads_the_worker_environment(column_binary: Path, tmp_path: Path) -> None:
    env = {f"HONING_P_{k}": repr(v) for k, v in demo.TRUE_PARAMETERS.items()}
    env["HONING_OUTPUTS"] = str(tmp_path / "out.json")
    subprocess.run([str(column_binary)], env=env, check=True)
    written = json.loads((tmp_path / "out.json").read_text())
    assert written == run_c(column_binary, demo.TRUE_PARAMETERS)


def test_c_model_refuses_bad_input(column_binary: Path) -> None:
    result = subprocess.run(
        [str(column_binary), "0.6", "abc", "1.5", "0.1"], capture_output=True, text=True
    )
    assert result.returncode == 2
    assert result.stderr == "column: dispersivity is not a number: 'abc'\n"
    result = subprocess.run(
        [str(column_binary), "0.6", "0.004", "1.5", "-1"], capture_output=True, text=True
    )
    assert result.returncode == 2 and "decay >= 0" in result.stderr


def test_curl_and_jq_worker_runs_a_calibration(
    live_server: str, column_binary: Path, examples: Path, tmp_path: Path
) -> None:
    spec = demo.demo_spec()
    spec["budget"] = {"max_runs": 34}
    spec_path = tmp_path / "spec.json"
    spec_path.write_text(json.dumps(spec))
    env = {k: v for k, v in os.environ.items() if not k.startswith("HONING_")}
    # No Python on the worker side: PATH holds only the system folders (bash, curl, jq).
    env.update(
        PATH="/usr/local/bin:/usr/bin:/bin",
        HONING_URL=live_server,
        COLUMN_MODEL=str(column_binary),
        HONING_WORKER="curl-worker",
    )
    result = subprocess.run(
        ["bash", str(examples / "column_c" / "worker.sh"), str(spec_path)],
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
    )
    assert result.returncode == 3, result.stderr
    cid, token = result.stdout.split()
    assert "budget_exhausted after 34 runs done, 0 failed" in result.stderr

    runs = httpx.get(
        f"{live_server}/v1/calibrations/{cid}/runs",
        headers={"Authorization": f"Bearer {token}"},
    ).json()["runs"]
    done = [r for r in runs if r["state"] == "done"]
    assert len(done) == 34
    assert {r["worker"] for r in done} == {"curl-worker"}
    sample = done[-1]
    assert sample["outputs"] == run_c(column_binary, sample["parameters"])
