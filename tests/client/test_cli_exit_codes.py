from __future__ import annotations

import json
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest

from honing.client.cli import main

CAL = "/v1/calibrations/c1"


def calibration(status: str) -> dict[str, Any]:
    return {"id": "c1", "status": status, "round": 4, "runs_completed": 40, "runs_failed": 1}


def test_help_lists_every_command_and_exit_code(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == 0
    text = capsys.readouterr().out
    commands = ("serve", "demo", "create", "worker", "status", "posterior", "samples", "runs")
    for name in (*commands, "budget"):
        assert f"    {name}" in text
    for code in ("0 ", "1 ", "2 ", "3 ", "4 ", "5 ", "130", "143"):
        assert f"\n  {code}" in text


def test_worker_help_explains_the_protocol(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["worker", "--help"]) == 0
    text = capsys.readouterr().out
    for word in ("HONING_PARAMS", "HONING_P_<name>", "HONING_RUN_ID", "HONING_OUTPUTS", "{name}"):
        assert word in text
    # How long a running command's lease is extended, and how to say longer.
    assert "a day after the lease" in " ".join(text.split())


def test_usage_errors_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["no-such-command"]) == 2
    assert main(["status"]) == 2
    assert main([]) == 2
    assert main(["worker", "c1", "-j", "0", "--", "true"]) == 2
    capsys.readouterr()


@pytest.mark.parametrize(
    ("status", "code"),
    [("converged", 0), ("budget_exhausted", 3), ("failed", 5), ("collecting", 4), ("fitting", 4)],
)
def test_status_exit_codes(fake_server: Any, cli: Any, status: str, code: int) -> None:
    fake_server.on("GET", CAL, calibration(status))
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == code, result.stderr
    assert result.stdout.startswith(f"c1  {status}  round 4  runs 40 done, 1 failed")


def test_status_explains_a_spent_budget_from_the_posterior(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("budget_exhausted"))
    reasons = ["round 4 had no earlier posterior to compare with", "only 1 round(s) fitted"]
    diagnostics = {
        "warnings": ["prior check: 9 of 12 points lie outside", "run budget spent: ..."],
        "unmet_conditions": reasons,
        "suggested_max_runs": 72,
    }
    fake_server.on("GET", f"{CAL}/posterior", {"diagnostics": diagnostics})
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 3
    # only the stop rule's reasons and the way on, on stderr; not the other warnings
    assert result.stderr.splitlines() == [
        "warning: run budget spent before convergence: " + "; ".join(reasons),
        "to go on, raise the budget: honing budget c1 72",
    ]


@pytest.mark.parametrize(
    "diagnostics",
    [
        {"unmet_conditions": "not a list", "suggested_max_runs": "72"},
        {"unmet_conditions": [], "suggested_max_runs": True},
        {"unmet_conditions": None, "suggested_max_runs": None},
        "not an object",
    ],
)
def test_status_of_a_spent_budget_skips_odd_diagnostics(
    fake_server: Any, cli: Any, diagnostics: object
) -> None:
    fake_server.on("GET", CAL, calibration("budget_exhausted"))
    fake_server.on("GET", f"{CAL}/posterior", {"diagnostics": diagnostics})
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 3 and result.stderr == ""


def test_status_of_a_spent_budget_without_a_posterior_still_exits_3(
    fake_server: Any, cli: Any
) -> None:
    fake_server.on("GET", CAL, calibration("budget_exhausted"))  # posterior: 404
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 3 and result.stderr == ""
    assert result.stdout.startswith("c1  budget_exhausted  round 4")


def test_status_of_a_spent_budget_survives_a_garbled_posterior(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("budget_exhausted"))
    fake_server.on("GET", f"{CAL}/posterior", "not json")
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 3 and result.stderr == ""


def test_status_json_on_a_spent_budget_is_only_json(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("budget_exhausted"))
    result = cli("status", "c1", "--json", url=fake_server.url, token="t")
    assert result.returncode == 3
    assert json.loads(result.stdout)["status"] == "budget_exhausted"
    assert result.stderr == "" and fake_server.bodies("GET", f"{CAL}/posterior") == []


def test_status_reads_no_posterior_unless_the_budget_is_spent(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("converged"))
    assert cli("status", "c1", url=fake_server.url, token="t").returncode == 0
    assert fake_server.bodies("GET", f"{CAL}/posterior") == []


def test_posterior_lists_the_engine_warnings_before_the_caution(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("converged"))
    summary = {
        "round": 4,
        "parameters": {"k": {"mean": 1.5, "sd": 0.1, "ci95": [1.3, 1.7]}},
        "diagnostics": {"warnings": ["posterior chain stopped at 20000 steps", "prior check"]},
    }
    fake_server.on("GET", f"{CAL}/posterior", summary)
    result = cli("posterior", "c1", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[-3:-1] == [
        "warning: posterior chain stopped at 20000 steps",
        "warning: prior check",
    ]
    assert "independent measurements" in lines[-1]


def test_budget_sends_the_new_budget_and_prints_the_status(fake_server: Any, cli: Any) -> None:
    answer = {**calibration("collecting"), "spec": {"budget": {"max_runs": 600}}}
    fake_server.on("PATCH", CAL, answer)
    result = cli("budget", "c1", "600", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert result.stdout == "c1  collecting  budget 600 runs\n"
    assert fake_server.bodies("PATCH", CAL) == [{"budget": {"max_runs": 600}}]


def test_budget_refused_is_one_line_and_exit_1(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    problem = {"type": "about:blank", "title": "Conflict", "status": 409, "detail": "converged"}
    fake_server.on("PATCH", CAL, problem, status=409)
    result = cli("budget", "c1", "600", url=fake_server.url, token="t")
    assert result.returncode == 1
    one_line_error(result, "Conflict (409)", "converged")


def test_status_wait_times_out_with_4(fake_server: Any, cli: Any) -> None:
    fake_server.on("GET", CAL, calibration("collecting"))
    result = cli(
        "status",
        "c1",
        "--wait",
        "--timeout",
        "0.5",
        "--interval",
        "0.1",
        url=fake_server.url,
        token="t",
    )
    assert result.returncode == 4
    assert len(fake_server.bodies("GET", CAL)) >= 2


def test_status_wait_returns_once_finished(fake_server: Any, cli: Any) -> None:
    answers = iter(["collecting", "fitting", "converged"])
    fake_server.on_call("GET", CAL, lambda body: (200, calibration(next(answers)), {}))
    result = cli(
        "status", "c1", "--wait", "--interval", "0.1", "--json", url=fake_server.url, token="t"
    )
    assert result.returncode == 0
    assert json.loads(result.stdout)["status"] == "converged"


def test_server_problem_is_one_line_on_stderr(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    result = cli("posterior", "nope", url=fake_server.url, token="t")
    assert result.returncode == 1
    assert result.stdout == ""
    one_line_error(result, "Not Found (404)", "/v1/calibrations/nope/posterior")


def test_unreachable_server_is_one_line(cli: Any, one_line_error: Any) -> None:
    # Port 9 (discard) on loopback: nothing listens there in a test machine.
    result = cli("status", "c1", url="http://127.0.0.1:9", token="t")
    assert result.returncode == 1
    one_line_error(result, "cannot reach http://127.0.0.1:9")


def test_missing_token_is_explained(cli: Any, one_line_error: Any) -> None:
    result = cli("status", "c1", url="http://127.0.0.1:9")
    assert result.returncode == 1
    one_line_error(result, "no token", "HONING_TOKEN")


def test_unreadable_spec_is_one_line(cli: Any, one_line_error: Any, tmp_path: Path) -> None:
    bad = tmp_path / "spec.toml"
    bad.write_text("name = [unclosed\n")
    result = cli("create", str(bad), url="http://127.0.0.1:9")
    assert result.returncode == 1
    one_line_error(result, "is not valid TOML")
    result = cli("create", str(tmp_path / "missing.json"), url="http://127.0.0.1:9")
    one_line_error(result, "cannot read the spec")


def test_worker_exits_0_once_converged(fake_server: Any, cli: Any) -> None:
    fake_server.on("POST", f"{CAL}/runs", {"runs": [], "status": "converged"})
    fake_server.on("GET", f"{CAL}/posterior", {"round": 9, "status": "converged"})
    result = cli("worker", "c1", "--", "false", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert "converged" in result.stderr


def test_worker_exits_3_when_the_budget_is_used_up(fake_server: Any, cli: Any) -> None:
    fake_server.on("POST", f"{CAL}/runs", {"runs": [], "status": "budget_exhausted"})
    result = cli("worker", "c1", "-q", "--", "false", url=fake_server.url, token="t")
    assert result.returncode == 3
    assert result.stderr == ""


def test_worker_stops_on_a_refused_token(fake_server: Any, cli: Any, one_line_error: Any) -> None:
    fake_server.on(
        "POST",
        f"{CAL}/runs",
        {"title": "Forbidden", "status": 403, "detail": "wrong token for this calibration"},
        status=403,
    )
    result = cli("worker", "c1", "-q", "--", "true", url=fake_server.url, token="bad")
    assert result.returncode == 1
    one_line_error(result, "Forbidden (403): wrong token")


def test_a_refused_value_is_reported_as_a_failed_run(fake_server: Any, cli: Any) -> None:
    leases = iter([{"runs": [{"run_id": "r1", "parameters": {"a": 1.0}}], "status": "collecting"}])
    fake_server.on_call(
        "POST",
        f"{CAL}/runs",
        lambda body: (200, next(leases, {"runs": [], "status": "budget_exhausted"}), {}),
    )

    def report(body: dict[str, Any]) -> tuple[int, Any, dict[str, str]]:
        if "outputs" in body:
            return (
                422,
                {
                    "title": "Invalid outputs",
                    "status": 422,
                    "detail": "outputs do not fit",
                    "errors": [{"loc": ["outputs", "y", 0], "msg": "must be a finite number"}],
                },
                {},
            )
        return 200, {"run_id": "r1", "state": "failed", "trust": None}, {}

    fake_server.on_call("PUT", f"{CAL}/runs/r1", report)
    code = "import json, os; json.dump({'y': [1]}, open(os.environ['HONING_OUTPUTS'], 'w'))"
    result = cli(
        "worker", "c1", "-q", "--", sys.executable, "-c", code, url=fake_server.url, token="t"
    )
    assert result.returncode == 3, result.stderr
    puts = fake_server.bodies("PUT", f"{CAL}/runs/r1")
    assert puts[0] == {"outputs": {"y": [1.0]}}
    assert "outputs.y.0: must be a finite number" in puts[1]["error"]


def test_worker_honours_retry_after_while_the_server_refits(fake_server: Any, cli: Any) -> None:
    answers = iter(
        [
            ({"runs": [], "status": "fitting"}, {"Retry_After": "0"}),
            ({"runs": [{"run_id": "r1", "parameters": {"a": 2.0}}], "status": "collecting"}, {}),
        ]
    )

    def lease(body: dict[str, Any]) -> tuple[int, Any, dict[str, str]]:
        answer, headers = next(answers, ({"runs": [], "status": "converged"}, {}))
        return 200, answer, headers

    fake_server.on_call("POST", f"{CAL}/runs", lease)
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    code = (
        "import json, os; a = float(os.environ['HONING_P_a']);"
        "json.dump({'y': [a]}, open(os.environ['HONING_OUTPUTS'], 'w'))"
    )
    result = cli(
        "worker",
        "c1",
        "--name",
        "bench-3",
        "--",
        sys.executable,
        "-c",
        code,
        url=fake_server.url,
        token="t",
    )
    assert result.returncode == 0, result.stderr
    assert fake_server.bodies("PUT", f"{CAL}/runs/r1") == [{"outputs": {"y": [2.0]}}]
    leases = fake_server.bodies("POST", f"{CAL}/runs")
    assert len(leases) == 3
    assert leases[0] == {"count": 1, "worker": "bench-3", "lease_seconds": 900.0}


# -- Ctrl-C ------------------------------------------------------------------------------


def _slow_run_server(fake_server: Any) -> None:
    leases = iter([{"runs": [{"run_id": "r1", "parameters": {"a": 1.5}}], "status": "collecting"}])
    fake_server.on_call(
        "POST",
        f"{CAL}/runs",
        lambda body: (
            200,
            next(leases, {"runs": [], "status": "collecting"}),
            {"Retry_After": "1"},
        ),
    )
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})


def _start_worker(
    cli_process: Any, fake_server: Any, tmp_path: Path, hold: str
) -> tuple[subprocess.Popen, Path]:
    started = tmp_path / "started"
    # The command signals that it runs, then waits for the test to release it (or forever).
    code = f"""
import json, os, pathlib, time
pathlib.Path({str(started)!r}).write_text("yes")
while not pathlib.Path({hold!r}).exists():
    time.sleep(0.05)
json.dump({{"y": [float(os.environ["HONING_P_a"])]}}, open(os.environ["HONING_OUTPUTS"], "w"))
"""
    proc = cli_process(
        "worker", "c1", "-q", "--", sys.executable, "-c", code, url=fake_server.url, token="t"
    )
    while not started.exists():
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        time.sleep(0.05)
    return proc, started


def test_ctrl_c_finishes_and_reports_the_run_in_hand(
    fake_server: Any, tmp_path: Path, cli_process: Any
) -> None:
    _slow_run_server(fake_server)
    release = tmp_path / "release"
    proc, _ = _start_worker(cli_process, fake_server, tmp_path, str(release))
    proc.send_signal(signal.SIGINT)
    # The worker keeps waiting for its command; let the command finish now.
    while "stopping" not in (line := proc.stderr.readline()):
        assert line, "worker ended before announcing the stop"
    release.write_text("go")
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert fake_server.bodies("PUT", f"{CAL}/runs/r1") == [{"outputs": {"y": [1.5]}}]
    assert len(fake_server.bodies("POST", f"{CAL}/runs")) == 1, "no leasing after Ctrl-C"
    assert "Traceback" not in err


def test_second_ctrl_c_terminates_and_reports_failed(
    fake_server: Any, tmp_path: Path, cli_process: Any
) -> None:
    _slow_run_server(fake_server)
    proc, _ = _start_worker(cli_process, fake_server, tmp_path, str(tmp_path / "never"))
    proc.send_signal(signal.SIGINT)
    while "stopping" not in (line := proc.stderr.readline()):
        assert line, "worker ended before announcing the stop"
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    (report,) = fake_server.bodies("PUT", f"{CAL}/runs/r1")
    assert "interrupted" in report["error"]


def test_sigterm_is_handled_like_ctrl_c(fake_server: Any, tmp_path: Path, cli_process: Any) -> None:
    _slow_run_server(fake_server)
    release = tmp_path / "release"
    proc, _ = _start_worker(cli_process, fake_server, tmp_path, str(release))
    proc.send_signal(signal.SIGTERM)
    while "stopping" not in (line := proc.stderr.readline()):
        assert line, "worker ended before announcing the stop"
    release.write_text("go")
    proc.communicate(timeout=120)
    assert proc.returncode == 143
    assert fake_server.bodies("PUT", f"{CAL}/runs/r1") == [{"outputs": {"y": [1.5]}}]


def test_sigterm_stops_status_wait_with_143(fake_server: Any, cli_process: Any) -> None:
    # EPILOG: 143 for SIGTERM, for every command (here one waiting on the server, not a worker).
    fake_server.on("GET", CAL, calibration("collecting"))
    argv = ["status", "c1", "--wait", "--interval", "0.1"]
    proc = cli_process(*argv, url=fake_server.url, token="t")
    deadline = time.monotonic() + 60
    while len(fake_server.bodies("GET", CAL)) < 2:  # it is polling
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.05)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert err.strip().endswith("terminated") and "Traceback" not in err


def test_serve_without_the_server_extra_is_one_line(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # A None entry in sys.modules makes the import fail, as a missing extra would.
    import honing.api

    monkeypatch.setitem(sys.modules, "honing.api.server", None)
    monkeypatch.delattr(honing.api, "server", raising=False)
    assert main(["serve", "--store", "sqlite:////tmp/unused.db"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "pip install 'honing[server]'" in err


def test_serve_passes_its_options_and_a_default_store(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    import types

    calls: list[tuple] = []
    fake = types.ModuleType("honing.api.server")
    fake.run_server = lambda *a, **k: calls.append((a, k))  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "honing.api.server", fake)
    monkeypatch.setattr("honing.api.server", fake, raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path))
    assert main(["serve", "--port", "9001", "--refit-workers", "2"]) == 0
    ((args, kwargs),) = calls
    assert args == ("127.0.0.1", 9001, f"sqlite:///{tmp_path}/honing/honing.db")
    assert kwargs == {"admin_key_file": None, "refit_workers": 2}


@pytest.mark.parametrize("refit_workers", ["1", "0"])
def test_serve_stops_gracefully_on_sigterm_with_0(
    unused_port: Callable[[], int], tmp_path: Path, cli_process: Any, refit_workers: str
) -> None:
    # SIGTERM is how a service is stopped: after the graceful shutdown (refit worker stopped
    # by the server itself, not left to notice its parent is gone) the exit status is 0.
    # Without refit workers the log says that fits need a refitter elsewhere: calibrations
    # otherwise wait in "fitting" with nothing to say why.
    port = unused_port()
    store = f"sqlite:///{tmp_path}/s.db"
    proc = cli_process(
        "serve", "--port", str(port), "--store", store, "--refit-workers", refit_workers
    )
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                if httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert proc.poll() is None and time.monotonic() < deadline, "server did not start"
            time.sleep(0.1)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    assert "Traceback" not in err and "serving process is gone" not in err
    assert ("no refit workers in this process" in err) is (refit_workers == "0"), err


@pytest.mark.parametrize(
    ("argv", "fragment"),
    [
        (["serve", "--store", "bogus://x"], "unsupported store URL"),
        (
            ["serve", "--store", "sqlite:////tmp/x.db", "--admin-key-file", "/nonexistent"],
            "key file",
        ),
        (["refitter", "--store", "bogus://x"], "unsupported store URL"),
        (["refitter", "--store", "redis://localhost:abc/0"], "Port could not be cast"),
        (["refitter", "--store", "redis://localhost:6379/x"], "database must be a number"),
    ],
)
def test_server_settings_it_cannot_use_are_one_line_and_exit_1(
    cli: Any, one_line_error: Any, argv: list[str], fragment: str
) -> None:
    # Checked before the server starts; once running, such a mistake ended it with uvicorn's
    # status 3 (which reads as "budget exhausted") and a traceback.
    result = cli(*argv)
    assert result.returncode == 1
    one_line_error(result, fragment)


def test_a_key_file_that_is_not_text_is_one_line(
    cli: Any, one_line_error: Any, tmp_path: Path
) -> None:
    key = tmp_path / "key"
    key.write_bytes(b"\xff\xfe\x00key")
    result = cli("serve", "--store", f"sqlite:///{tmp_path}/x.db", "--admin-key-file", str(key))
    assert result.returncode == 1
    one_line_error(result, "not UTF-8")


def test_a_store_file_that_cannot_be_made_is_one_line(
    cli: Any, one_line_error: Any, tmp_path: Path
) -> None:
    # Opened before the server starts; before, the app's start-up failed inside uvicorn.
    blocker = tmp_path / "file"
    blocker.write_text("")
    result = cli("serve", "--store", f"sqlite:///{blocker}/sub/x.db")
    assert result.returncode == 1
    one_line_error(result, "cannot use the store")


def test_a_server_that_fails_to_start_exits_1(cli: Any, tmp_path: Path) -> None:
    # A port another process listens on: uvicorn cannot bind, and stops with its own status,
    # which must not leak out as one of honing's (3 reads as "budget exhausted").
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = str(taken.getsockname()[1])
        result = cli("serve", "--port", port, "--store", f"sqlite:///{tmp_path}/x.db")
    assert result.returncode == 1
    assert (
        result.stderr.splitlines()[-1]
        == "honing: the server could not start; its log above says why"
    )
