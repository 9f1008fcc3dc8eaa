from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from honing.client.worker import STDERR_TAIL, run_command, substitute

RUN = {"run_id": "r7", "parameters": {"velocity": 0.25, "k-sat.top": 1e-05, "n": 3}}


def python(code: str) -> list[str]:
    return [sys.executable, "-c", code]


def test_environment_protocol(tmp_path: Path) -> None:
    seen = tmp_path / "seen.json"
    code = f"""
import json, os
env = {{k: v for k, v in os.environ.items() if k.startswith("HONING_")}}
env["params"] = json.load(open(os.environ["HONING_PARAMS"]))
json.dump(env, open({str(seen)!r}, "w"))
json.dump({{"y": [1, 2.5]}}, open(os.environ["HONING_OUTPUTS"], "w"))
"""
    result = run_command(python(code), RUN)
    assert result.error is None
    assert result.outputs == {"y": [1.0, 2.5]}
    env = json.loads(seen.read_text())
    assert env["params"] == RUN["parameters"]
    assert env["HONING_RUN_ID"] == "r7"
    assert env["HONING_P_velocity"] == "0.25"
    assert float(env["HONING_P_k-sat.top"]) == 1e-05
    assert env["HONING_P_k_sat_top"] == env["HONING_P_k-sat.top"], "shell-safe alias"
    assert env["HONING_P_n"] == "3"
    assert env["HONING_OUTPUTS"].endswith("outputs.json")


def test_placeholders_are_replaced_by_parameter_values() -> None:
    args = substitute(
        ["sim", "--v={velocity}", "{k-sat.top}", "{unknown}", "awk '{print $1}'"],
        RUN["parameters"],
    )
    assert args == ["sim", "--v=0.25", "1e-05", "{unknown}", "awk '{print $1}'"]


def test_placeholders_reach_the_command() -> None:
    code = (
        "import json, os, sys; y = [float(a) for a in sys.argv[1:]];"
        "json.dump({'y': y}, open(os.environ['HONING_OUTPUTS'], 'w'))"
    )
    result = run_command([*python(code), "{velocity}", "{n}"], RUN)
    assert result.outputs == {"y": [0.25, 3.0]}


def test_nonzero_exit_reports_the_end_of_stderr() -> None:
    code = "import sys; sys.stderr.write('step 1 ok\\nsolver diverged\\n'); sys.exit(3)"
    result = run_command(python(code), RUN)
    assert result.outputs is None
    assert result.error is not None
    assert "exited with status 3" in result.error
    assert result.error.endswith("step 1 ok\nsolver diverged")


def test_only_the_tail_of_a_long_stderr_is_kept() -> None:
    code = "import sys; sys.stderr.write('x' * 50000 + 'THE END'); sys.exit(1)"
    result = run_command(python(code), RUN)
    assert result.error is not None
    assert result.error.endswith("THE END")
    assert len(result.error) < STDERR_TAIL + 200


def test_missing_outputs_file() -> None:
    result = run_command(python("pass"), RUN)
    assert result.error is not None and "no outputs file" in result.error


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("{not json", "not valid JSON"),
        ('{"y": [1, NaN]}', "NaN is not allowed"),
        ('{"y": [1, Infinity]}', "Infinity is not allowed"),
        ("[1, 2]", "must hold a JSON object"),
        ('{"y": 3}', "must be a list of numbers"),
        ('{"y": [1, "2"]}', "is not a finite number"),
        ('{"y": [true]}', "is not a finite number"),
        ('{"y": [1e999]}', "is not a finite number"),
    ],
)
def test_malformed_outputs(content: str, message: str) -> None:
    code = f"import os; open(os.environ['HONING_OUTPUTS'], 'w').write({content!r})"
    result = run_command(python(code), RUN)
    assert result.outputs is None
    assert result.error is not None and message in result.error, result.error


def test_timeout_stops_the_whole_process_group(tmp_path: Path) -> None:
    # The command starts a grandchild; both must be gone when the run is reported.
    pid_file = tmp_path / "child.pid"
    code = f"""
import subprocess, sys, time
child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(600)"])
open({str(pid_file)!r}, "w").write(str(child.pid))
print("started a long job", file=sys.stderr, flush=True)
time.sleep(600)
"""
    result = run_command(python(code), RUN, timeout=2.0)
    assert result.error is not None
    assert "timed out after 2 s" in result.error
    assert "started a long job" in result.error
    child = int(pid_file.read_text())
    assert not Path(f"/proc/{child}").exists() or "zombie" in _proc_state(child)


def _proc_state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/status").read_text().lower()
    except OSError:
        return "zombie"


def test_a_command_that_cannot_start() -> None:
    result = run_command(["/nonexistent/simulator", "{velocity}"], RUN)
    assert result.error is not None
    assert result.error.startswith("cannot start '/nonexistent/simulator'")
