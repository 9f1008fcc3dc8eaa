from __future__ import annotations

import csv
import io
import json
import sys
from pathlib import Path
from typing import Any

import pytest

# A straight line y = a x + b seen at four points: small enough that refits take moments.
SPEC_TOML = """
name = "line-{tag}"
seed = 3

[[parameters]]
name = "a"
prior = {{ kind = "uniform", low = 0.0, high = 2.0 }}
unit = "1/s"

[[parameters]]
name = "b"
prior = {{ kind = "normal", mean = 0.0, sd = 1.0 }}

[[observations]]
name = "y"
values = [1.1, 2.0, 2.9, 4.2]
sd = 0.1
coords = [1.0, 2.0, 3.0, 4.0]

[design]
initial_runs = 6
batch_size = 4

[budget]
max_runs = {max_runs}
"""

# The simulator reads {a} and {b} from its arguments and checks the environment protocol.
SIMULATOR = """
import json, os, sys
a, b = float(sys.argv[1]), float(sys.argv[2])
params = json.load(open(os.environ["HONING_PARAMS"]))
assert params == {"a": a, "b": b}, (params, a, b)
assert float(os.environ["HONING_P_a"]) == a
if a > float(os.environ.get("FAIL_ABOVE", "99")):
    print("mesh tangled at step 12", file=sys.stderr)
    sys.exit(4)
json.dump({"y": [a * x + b for x in (1, 2, 3, 4)]}, open(os.environ["HONING_OUTPUTS"], "w"))
"""


@pytest.fixture
def create(live_server: str, cli: Any, tmp_path: Path) -> Any:
    def make(tag: str, max_runs: int = 14) -> tuple[str, str]:
        spec = tmp_path / f"{tag}.toml"
        spec.write_text(SPEC_TOML.format(tag=tag, max_runs=max_runs))
        result = cli("create", str(spec), url=live_server)
        assert result.returncode == 0, result.stderr
        cid, token = result.stdout.split()
        return cid, token

    return make


@pytest.fixture
def simulator(tmp_path: Path) -> list[str]:
    path = tmp_path / "line.py"
    path.write_text(SIMULATOR)
    return [sys.executable, str(path), "{a}", "{b}"]


def test_create_prints_id_and_token_or_json(live_server: str, cli: Any, tmp_path: Path) -> None:
    spec = tmp_path / "s.toml"
    spec.write_text(SPEC_TOML.format(tag="json", max_runs=14))
    result = cli("create", str(spec), "--json", url=live_server)
    assert result.returncode == 0, result.stderr
    answer = json.loads(result.stdout)
    assert set(answer) >= {"id", "token", "status"}
    assert answer["status"] == "collecting"


def test_worker_runs_a_calibration_to_its_end(
    live_server: str, cli: Any, create: Any, simulator: list[str], tmp_path: Path
) -> None:
    cid, token = create("budget")
    result = cli("worker", cid, "-j", "2", "--", *simulator, url=live_server, token=token)
    # Whether the line converges before its 14-run budget depends on the refits' timing.
    assert result.returncode in (0, 3), result.stderr
    final = {0: "converged", 3: "budget_exhausted"}[result.returncode]
    assert result.stderr.splitlines()[-1].endswith(f"| {final}")

    runs = json.loads(cli("runs", cid, "--json", url=live_server, token=token).stdout)["runs"]
    done = [r for r in runs if r["state"] == "done"]
    assert 6 <= len(done) <= 14
    for run in done:
        a, b = run["parameters"]["a"], run["parameters"]["b"]
        assert run["outputs"]["y"] == pytest.approx([a * x + b for x in (1, 2, 3, 4)])

    status = cli("status", cid, url=live_server, token=token)
    assert status.returncode == result.returncode
    # A spent budget comes with the engine's reason on stderr; convergence with nothing.
    spent = "warning: run budget spent before convergence: "
    assert status.stderr.startswith(spent) is (final == "budget_exhausted"), status.stderr
    assert (f"honing budget {cid} " in status.stderr) is (final == "budget_exhausted")
    waited = cli("status", cid, "--wait", "--json", url=live_server, token=token)
    assert waited.returncode == result.returncode
    assert json.loads(waited.stdout)["runs_completed"] == len(done)

    table = cli("posterior", cid, url=live_server, token=token)
    assert table.returncode == 0, table.stderr
    lines = table.stdout.splitlines()
    assert lines[0].split()[:4] == ["parameter", "unit", "mean", "sd"]
    assert lines[2].split()[:2] == ["a", "1/s"]
    assert "independent measurements" in table.stdout
    assert (spent in table.stdout) is (final == "budget_exhausted")

    samples = tmp_path / "samples.csv"
    result = cli("samples", cid, "-n", "50", "-o", str(samples), url=live_server, token=token)
    assert result.returncode == 0, result.stderr
    rows = list(csv.reader(io.StringIO(samples.read_text())))
    assert rows[0] == ["a", "b"]
    assert len(rows) == 51

    report = tmp_path / "report.html"
    result = cli("report", cid, "-o", str(report), url=live_server, token=token)
    assert result.returncode == 0, result.stderr
    assert "<html" in report.read_text().lower()

    # An archive written by 'runs -o' imports into a fresh calibration of the same model.
    archive = tmp_path / "runs.csv"
    assert cli("runs", cid, "-o", str(archive), url=live_server, token=token).returncode == 0
    other, other_token = create("imported")
    result = cli("import", other, str(archive), url=live_server, token=other_token)
    assert result.returncode == 0, result.stderr
    left = len(runs) - len(done)  # leased, expired or failed: not imported, and said so
    skipped = f" (skipped {left} not done or without outputs)" if left else ""
    assert result.stdout.strip() == f"imported {len(done)} runs into {other}{skipped}"
    info = json.loads(cli("status", other, "--json", url=live_server, token=other_token).stdout)
    assert info["runs_completed"] == len(done)
    # So does the JSON one ('-o' with a .json name), whole run records and all.
    records = tmp_path / "runs.json"
    assert cli("runs", cid, "-o", str(records), url=live_server, token=token).returncode == 0
    assert len(json.loads(records.read_text())["runs"]) == len(runs)
    third, third_token = create("imported-json")
    result = cli("import", third, str(records), url=live_server, token=third_token)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == f"imported {len(done)} runs into {third}{skipped}"


def test_failed_runs_carry_the_end_of_stderr(
    live_server: str, cli: Any, create: Any, simulator: list[str], monkeypatch: Any
) -> None:
    cid, token = create("failing", max_runs=12)
    monkeypatch.setenv("FAIL_ABOVE", "1.0")
    result = cli("worker", cid, "-j", "2", "-q", "--", *simulator, url=live_server, token=token)
    assert result.returncode in (3, 5), result.stderr
    runs = json.loads(cli("runs", cid, "--json", url=live_server, token=token).stdout)["runs"]
    failed = [r for r in runs if r["state"] == "failed"]
    assert failed, "about half the prior lies above a = 1"
    for run in failed:
        assert run["parameters"]["a"] > 1.0
        assert "exited with status 4" in run["error"]
        assert run["error"].endswith("mesh tangled at step 12")


def test_errors_from_the_live_server_are_one_line(
    live_server: str, cli: Any, create: Any, one_line_error: Any
) -> None:
    cid, token = create("errors")
    result = cli("status", cid, url=live_server, token="not-the-token")
    assert result.returncode == 1
    one_line_error(result, "(403)")
    assert cli("delete", cid, url=live_server, token=token).returncode == 0
    result = cli("status", cid, url=live_server, token=token)
    assert result.returncode == 1
    one_line_error(result, "(404)")


def test_a_spent_budget_is_raised_and_the_worker_goes_on(
    live_server: str, cli: Any, create: Any, simulator: list[str]
) -> None:
    # 8 runs cannot converge (the first fit waits for 6, and the rule needs two rounds after
    # it): the budget runs out, status says by how much to raise it, and once raised the
    # same calibration takes more runs.
    cid, token = create("raise", max_runs=8)
    first = cli("worker", cid, "-q", "--", *simulator, url=live_server, token=token)
    assert first.returncode == 3, first.stderr
    status = cli("status", cid, url=live_server, token=token)
    assert status.returncode == 3
    hint = status.stderr.splitlines()[-1]
    assert hint.startswith(f"to go on, raise the budget: honing budget {cid} "), status.stderr
    least = int(hint.split()[-1])
    assert least > 8
    raised = cli("budget", cid, str(least), url=live_server, token=token)
    assert raised.returncode == 0, raised.stderr
    assert raised.stdout == f"{cid}  collecting  budget {least} runs\n"
    again = cli("worker", cid, "-q", "--", *simulator, url=live_server, token=token)
    assert again.returncode in (0, 3), again.stderr
    info = json.loads(cli("status", cid, "--json", url=live_server, token=token).stdout)
    assert 8 < info["runs_completed"] <= least
    # The same budget again changes nothing; a smaller one is refused, and a converged
    # calibration cannot be reopened.
    final = "budget_exhausted" if again.returncode == 3 else "converged"
    same = cli("budget", cid, str(least), url=live_server, token=token)
    assert same.returncode == 0 and same.stdout == f"{cid}  {final}  budget {least} runs\n"
    refused = cli("budget", cid, str(least - 1), url=live_server, token=token)
    reason = "max_runs" if again.returncode == 3 else "has converged"
    assert refused.returncode == 1 and reason in refused.stderr, refused.stderr


def test_runs_longer_than_their_lease_are_not_handed_out_twice(
    live_server: str, cli: Any, create: Any, tmp_path: Path
) -> None:
    # Each run takes 5 s against a 3 s lease: the worker extends the leases while the
    # commands run, so no lease lapses and no point is evaluated twice.
    cid, token = create("long-runs", max_runs=6)
    slow = tmp_path / "slow.py"
    slow.write_text("import time\ntime.sleep(5)\n" + SIMULATOR)
    command = [sys.executable, str(slow), "{a}", "{b}"]
    result = cli(
        "worker", cid, "-j", "3", "-q", "--lease-seconds", "3", "--", *command,
        url=live_server, token=token,
    )  # fmt: skip
    assert result.returncode == 3, result.stderr
    runs = json.loads(cli("runs", cid, "--json", url=live_server, token=token).stdout)["runs"]
    assert [r["state"] for r in runs] == ["done"] * 6
    # (A lapsed lease's late result is kept as "done" too, but its point would have gone out
    # again in place of a new one.)
    assert len({(r["parameters"]["a"], r["parameters"]["b"]) for r in runs}) == 6
