from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import httpx

LIMIT = 300  # seconds: a safety net against a hung subprocess, not a timing assertion


def clean_env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HONING_")}
    env.update(extra)
    return env


def test_lab_script_calibrates_the_cooling_block(live_server: str, examples: Path) -> None:
    result = subprocess.run(
        [sys.executable, str(examples / "lab_script.py"), "--url", live_server, "--max-runs", "24"],
        capture_output=True,
        text=True,
        env=clean_env(),
        timeout=LIMIT,
    )
    assert result.returncode in (0, 3), result.stderr
    lines = result.stdout.splitlines()
    assert lines[0].startswith("calibration ")
    assert lines[2].startswith("h ") and lines[3].startswith("ambient ")
    assert "independent measurements" in lines[-1]
    # The invented data came from h = 12.5 W/m2/K; the 95 % interval should hold it.
    low, high = (float(v) for v in lines[2].split("[")[1].rstrip("]").split(","))
    assert low < 12.5 < high, lines[2]


def test_lab_script_explains_an_unreachable_server(examples: Path) -> None:
    result = subprocess.run(
        [sys.executable, str(examples / "lab_script.py"), "--url", "http://127.0.0.1:9"],
        capture_output=True,
        text=True,
        env=clean_env(),
        timeout=LIMIT,
    )
    assert result.returncode != 0
    assert result.stderr.startswith("lab_script: cannot reach http://127.0.0.1:9")
    assert "Traceback" not in result.stderr


def _finished_calibration(url: str) -> tuple[str, str]:
    spec = {
        "name": "ci-check",
        "parameters": [{"name": "k", "prior": {"kind": "uniform", "low": 0.0, "high": 1.0}}],
        "observations": [{"name": "y", "values": [0.5, 0.25], "sd": 0.05}],
        "design": {"initial_runs": 4, "batch_size": 2},
        "budget": {"max_runs": 4},
    }
    created = httpx.post(f"{url}/v1/calibrations", json=spec).json()
    cid, token = created["id"], created["token"]
    auth = {"Authorization": f"Bearer {token}"}
    for run in httpx.post(
        f"{url}/v1/calibrations/{cid}/runs", json={"count": 4}, headers=auth
    ).json()["runs"]:
        k = run["parameters"]["k"]
        httpx.put(
            f"{url}/v1/calibrations/{cid}/runs/{run['run_id']}",
            json={"outputs": {"y": [k, k * k]}},
            headers=auth,
        ).raise_for_status()
    return cid, token


def test_ci_step_fails_a_calibration_that_did_not_converge(
    live_server: str, examples: Path, tmp_path: Path
) -> None:
    cid, token = _finished_calibration(live_server)
    bin_dir = str(Path(sys.executable).parent)  # the venv's 'honing' script
    env = clean_env(
        HONING_URL=live_server,
        HONING_TOKEN=token,
        HONING_ID=cid,
        HONING_WAIT_SECONDS="120",
        ARTIFACTS=str(tmp_path / "artifacts"),
        PATH=f"{bin_dir}:{os.environ['PATH']}",
    )
    result = subprocess.run(
        ["bash", str(examples / "ci_step.sh")],
        capture_output=True,
        text=True,
        env=env,
        timeout=LIMIT,
    )
    assert result.returncode == 1, result.stderr
    assert "used its run budget without converging" in result.stderr
    artifacts = tmp_path / "artifacts"
    assert json.loads((artifacts / "posterior.json").read_text())["runs_completed"] == 4
    assert (artifacts / "runs.csv").read_text().startswith("run_id,")
    assert "<html" in (artifacts / "report.html").read_text().lower()


def test_ci_step_passes_a_converged_calibration(examples: Path, tmp_path: Path) -> None:
    # A stand-in 'honing' that reports convergence: the step's own logic is under test here.
    fake = tmp_path / "bin" / "honing"
    fake.parent.mkdir()
    fake.write_text('#!/bin/sh\n[ "$1" = status ] && echo "c1  converged"\nexit 0\n')
    fake.chmod(0o755)
    env = clean_env(
        HONING_URL="http://127.0.0.1:9",
        HONING_TOKEN="t",
        HONING_ID="c1",
        ARTIFACTS=str(tmp_path / "artifacts"),
        PATH=f"{fake.parent}:{os.environ['PATH']}",
    )
    result = subprocess.run(
        ["bash", str(examples / "ci_step.sh")],
        capture_output=True,
        text=True,
        env=env,
        timeout=LIMIT,
    )
    assert result.returncode == 0, result.stderr
    assert "converged; artifacts in" in result.stdout


def test_ci_step_needs_its_settings(examples: Path) -> None:
    result = subprocess.run(
        ["bash", str(examples / "ci_step.sh")],
        capture_output=True,
        text=True,
        env=clean_env(),
        timeout=LIMIT,
    )
    assert result.returncode != 0
    assert "set HONING_URL" in result.stderr
