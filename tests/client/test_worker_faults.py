"""The worker and the command line when things go wrong: odd outputs, oversized results, a
command that cannot start, a server that goes away for a while, awkward command lines and
files. Each runs the real command line as a subprocess against a fake server."""

from __future__ import annotations

import json
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from honing.client import worker as worker_module
from honing.client._client import Client
from honing.client.worker import ERROR_CHARS, parameter_environment

CAL = "/v1/calibrations/c1"
RUN = {"run_id": "r1", "parameters": {"a": 1.0}}
SERVICE_UNAVAILABLE = {"title": "Service Unavailable", "status": 503, "detail": "restarting"}


def one_run_then(fake_server: Any, final: str = "budget_exhausted") -> None:
    """The server leases r1 once, then says the calibration is ``final``."""
    leases = iter([{"runs": [RUN], "status": "collecting"}])
    fake_server.on_call(
        "POST", f"{CAL}/runs", lambda body: (200, next(leases, {"runs": [], "status": final}), {})
    )


def writes(outputs_json: str) -> list[str]:
    """A command that writes this text as its outputs file."""
    code = f"import os; open(os.environ['HONING_OUTPUTS'], 'w').write({outputs_json!r})"
    return [sys.executable, "-c", code]


def test_an_integer_beyond_floats_fails_the_run_and_the_worker_goes_on(
    fake_server: Any, cli: Any
) -> None:
    # float(10**400) overflows; the run's thread used to die unreported and the worker
    # waited for it forever.
    one_run_then(fake_server)
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "failed", "trust": None})
    big = "1" + "0" * 400
    result = cli(
        "worker", "c1", "-q", "--", *writes(f'{{"y": [{big}, 1]}}'), url=fake_server.url, token="t"
    )
    assert result.returncode == 3, result.stderr
    (put,) = fake_server.bodies("PUT", f"{CAL}/runs/r1")
    assert put["error"].startswith("outputs['y'][0] is not a finite number: 1000")
    assert len(put["error"]) < 200


def test_outputs_over_the_servers_body_limit_stop_the_worker(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    # Outputs of the spec's lengths are the same size for every run: a 413 for one is a 413
    # for all, so the worker stops (exit 1) instead of spending the budget on failed runs.
    one_run_then(fake_server)
    too_large = {"title": "Payload Too Large", "status": 413, "detail": "over 8 MiB"}
    fake_server.on("PUT", f"{CAL}/runs/r1", too_large, status=413)
    result = cli("worker", "c1", "-q", "--", *writes('{"y": [1]}'), url=fake_server.url, token="t")
    assert result.returncode == 1
    one_line_error(result, "outputs as too large", "Payload Too Large (413)")
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r1")) == 1


@pytest.mark.parametrize("status", [422])
def test_a_refused_result_is_reported_as_a_short_failure(
    fake_server: Any, cli: Any, status: int
) -> None:
    # A 422 with a detail of 100,000 characters (and no field located in the outputs'
    # shape) becomes a failed run whose message fits the server's cap (65,536), and the
    # worker goes on to exit 3 when the budget is spent.
    one_run_then(fake_server)
    detail = "x" * 100_000

    def report(body: dict[str, Any]) -> tuple[int, Any, dict[str, str]]:
        if "outputs" in body:
            return status, {"title": "Refused", "status": status, "detail": detail}, {}
        return 200, {"run_id": "r1", "state": "failed", "trust": None}, {}

    fake_server.on_call("PUT", f"{CAL}/runs/r1", report)
    result = cli("worker", "c1", "-q", "--", *writes('{"y": [1]}'), url=fake_server.url, token="t")
    assert result.returncode == 3, result.stderr
    error = fake_server.bodies("PUT", f"{CAL}/runs/r1")[1]["error"]
    assert error.startswith(f"outputs refused by the server: Refused ({status})")
    assert len(error) <= ERROR_CHARS and "characters in all ...]" in error


def _refused_at(loc: list[Any]) -> Any:
    """A report handler refusing outputs with one field error at ``loc``, as the server does."""

    def report(body: dict[str, Any]) -> tuple[int, Any, dict[str, str]]:
        if "outputs" in body:
            error = {"loc": ["body", *loc], "msg": "expected 3 values, got 2"}
            problem = {"title": "Unprocessable Entity", "status": 422, "errors": [error]}
            return 422, problem, {}
        return 200, {"run_id": "r1", "state": "failed", "trust": None}, {}

    return report


def test_outputs_of_the_wrong_shape_stop_the_worker_and_report_nothing(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    # An observation missing, misnamed or of the wrong length is the command's mistake, the
    # same for every run: reported as failures, it spent a whole budget of 400 runs, and the
    # calibration then advised raising the budget.
    one_run_then(fake_server)
    fake_server.on_call("PUT", f"{CAL}/runs/r1", _refused_at(["outputs", "y"]))
    result = cli(
        "worker", "c1", "-q", "--", *writes('{"y": [1, 2]}'), url=fake_server.url, token="t"
    )
    assert result.returncode == 1
    one_line_error(result, "refuses the command's outputs", "outputs.y: expected 3 values")
    assert ["outputs" in body for body in fake_server.bodies("PUT", f"{CAL}/runs/r1")] == [True]


def test_the_worker_says_why_runs_fail(fake_server: Any, cli: Any) -> None:
    # The progress line counts failed runs; the first failure of each kind gets a line of
    # its own with the command's status and the end of its stderr.
    one_run_then(fake_server)
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "failed", "trust": None})
    code = (
        "import sys; print('step 1 ok', file=sys.stderr); "
        "print('singular matrix', file=sys.stderr); sys.exit(2)"
    )
    result = cli("worker", "c1", "--", sys.executable, "-c", code, url=fake_server.url, token="t")
    assert result.returncode == 3, result.stderr
    assert "run r1 failed: the command exited with status 2; stderr ends: singular matrix" in (
        result.stderr
    )


def test_a_command_that_cannot_start_stops_the_worker_and_reports_nothing(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    # A typing mistake, not a property of the point: no run is reported failed (each would
    # tell the server's failure model a lie, and the budget would burn on them).
    fake_server.on("POST", f"{CAL}/runs", {"runs": [RUN], "status": "collecting"})
    result = cli(
        "worker", "c1", "-q", "--", "/nonexistent/simulator", "{a}", url=fake_server.url, token="t"
    )
    assert result.returncode == 1
    one_line_error(result, "cannot start '/nonexistent/simulator'")
    assert fake_server.bodies("PUT", CAL) == []
    assert len(fake_server.bodies("POST", f"{CAL}/runs")) == 1


def test_the_shell_safe_alias_never_overwrites_another_parameter() -> None:
    env = parameter_environment({"k_1": 0.25, "k-1": 10.5, "x.y": 2.0})
    assert env["HONING_P_k_1"] == "0.25"  # k-1's alias would be HONING_P_k_1 too
    assert env["HONING_P_k-1"] == "10.5"
    assert env["HONING_P_x_y"] == env["HONING_P_x.y"] == "2.0"


def test_the_worker_rides_out_a_server_restart(fake_server: Any, cli: Any) -> None:
    # After one answer the server is unavailable for 12 lease requests (each call retries
    # 5 times, Retry-After 0), then answers again; the worker carries on and finishes.
    answers = iter(
        [(200, {"runs": [], "status": "fitting"}, {"Retry_After": "0"})]
        + [(503, SERVICE_UNAVAILABLE, {"Retry_After": "0"})] * 12
    )
    fake_server.on_call(
        "POST",
        f"{CAL}/runs",
        lambda body: next(answers, (200, {"runs": [], "status": "converged"}, {})),
    )
    result = cli("worker", "c1", "-q", "--", "true", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert len(fake_server.bodies("POST", f"{CAL}/runs")) == 14


def test_the_worker_says_while_it_holds_a_result_the_server_does_not_take(
    fake_server: Any, cli: Any
) -> None:
    # The result is retried until the server takes it (it must not be lost), which
    # --max-outage does not cut short; the progress line said nothing meanwhile.
    one_run_then(fake_server)
    answers = iter([(503, SERVICE_UNAVAILABLE, {"Retry_After": "1"})] * 3)
    fake_server.on_call(
        "PUT",
        f"{CAL}/runs/r1",
        lambda body: next(answers, (200, {"run_id": "r1", "state": "done", "trust": 1.0}, {})),
    )
    result = cli("worker", "c1", "--", *writes('{"y": [1]}'), url=fake_server.url, token="t")
    assert result.returncode == 3, result.stderr
    lines = result.stderr.splitlines()
    waiting = [line for line in lines if "retrying since" in line]
    assert waiting and waiting[0].endswith("the server answers 503"), lines
    assert "retrying" not in lines[-1], lines  # over once the result is in


def test_an_outage_longer_than_allowed_ends_the_worker(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    answers = iter([(200, {"runs": [], "status": "fitting"}, {"Retry_After": "0"})])
    fake_server.on_call(
        "POST",
        f"{CAL}/runs",
        lambda body: next(answers, (503, SERVICE_UNAVAILABLE, {"Retry_After": "0"})),
    )
    result = cli(
        "worker", "c1", "-q", "--max-outage", "0", "--", "true", url=fake_server.url, token="t"
    )
    assert result.returncode == 1
    one_line_error(result, "Service Unavailable (503)")


def test_status_wait_rides_out_a_server_restart(fake_server: Any, cli: Any) -> None:
    collecting = {"id": "c1", "status": "collecting", "round": 1}
    answers = iter(
        [(200, collecting, {})] + [(503, SERVICE_UNAVAILABLE, {"Retry_After": "0"})] * 12
    )
    fake_server.on_call(
        "GET", CAL, lambda body: next(answers, (200, {**collecting, "status": "converged"}, {}))
    )
    result = cli("status", "c1", "--wait", "--interval", "0.1", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert result.stdout.startswith("c1  converged")


def test_status_wait_on_a_server_that_never_answered_fails_at_once(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    fake_server.on("GET", CAL, SERVICE_UNAVAILABLE, status=503, Retry_After="0")
    result = cli("status", "c1", "--wait", url=fake_server.url, token="t")
    assert result.returncode == 1
    one_line_error(result, "Service Unavailable (503)")
    assert len(fake_server.bodies("GET", CAL)) == 5  # one call's attempts, no more


@pytest.mark.parametrize("options", [[], ["-q"]])
def test_a_second_double_dash_reaches_the_command(
    fake_server: Any, cli: Any, tmp_path: Path, options: list[str]
) -> None:
    # Everything after the first '--' is the command, wherever the worker's options are.
    one_run_then(fake_server, "converged")
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    seen = tmp_path / "argv.json"
    code = (
        "import json, os, sys; json.dump(sys.argv[1:], open(sys.argv[-1], 'w'));"
        "json.dump({'y': [1]}, open(os.environ['HONING_OUTPUTS'], 'w'))"
    )
    command = [sys.executable, "-c", code, "--", "--velocity", "{a}", str(seen)]
    result = cli("worker", "c1", *options, "--", *command, url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert json.loads(seen.read_text()) == ["--", "--velocity", "1.0", str(seen)]


@pytest.mark.parametrize(
    ("options", "named"),
    [
        (["-j", "1001"], "-j"),
        (["--run-timeout", "604800"], "--run-timeout"),
        (["--lease-seconds", "0.5"], "--lease-seconds"),
        ([], "COMMAND"),
    ],
)
def test_worker_options_out_of_range_are_usage_errors(
    cli: Any, options: list[str], named: str
) -> None:
    command = [] if named == "COMMAND" else ["--", "true"]
    result = cli("worker", "c1", *options, *command, url="http://127.0.0.1:9", token="t")
    assert result.returncode == 2
    assert named in result.stderr and "Traceback" not in result.stderr


def test_an_answer_that_is_not_json_is_one_line(
    fake_server: Any, cli: Any, one_line_error: Any
) -> None:
    # Some other service at the address, answering 200 with a page.
    fake_server.on("GET", CAL, "<html>a login page</html>")
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 1
    one_line_error(result, "expected a JSON object", "is this a honing server?")


@pytest.mark.parametrize(
    ("name", "content", "fragment"),
    [
        ("runs.json", "[1, 2]", "run 0 must be an object"),
        ("runs.json", '{"runs": ["ab"]}', "run 0 must be an object"),
        ("runs.csv", "a,y[0]\n1.0,2.0\n,3.0\n", "line 3, column a: not a finite number: ''"),
        ("runs.csv", "a,y[0]\n1.0,abc\n", "line 2, column y[0]: not a finite number: 'abc'"),
    ],
)
def test_import_files_with_odd_content_are_one_line(
    fake_server: Any,
    cli: Any,
    one_line_error: Any,
    tmp_path: Path,
    name: str,
    content: str,
    fragment: str,
) -> None:
    spec = {"parameters": [{"name": "a"}], "observations": [{"name": "y", "values": [1.0]}]}
    fake_server.on("GET", CAL, {"id": "c1", "status": "collecting", "spec": spec})
    path = tmp_path / name
    path.write_text(content)
    result = cli("import", "c1", str(path), url=fake_server.url, token="t")
    assert result.returncode == 1
    one_line_error(result, fragment)
    assert fake_server.bodies("POST", f"{CAL}/runs/import") == []


def test_a_toml_spec_with_a_date_is_one_line(cli: Any, one_line_error: Any, tmp_path: Path) -> None:
    spec = tmp_path / "spec.toml"
    spec.write_text('name = "column"\n[notes]\nmeasured_on = 2024-05-01\n')
    result = cli("create", str(spec), url="http://127.0.0.1:9")
    assert result.returncode == 1
    one_line_error(result, "notes.measured_on is a date or time")


def test_runs_that_cannot_start_stop_the_worker_once(
    fake_server: Any, cli: Any, tmp_path: Path
) -> None:
    # Three runs at once; the command's name depends on the run ({a}), and only sim1.0
    # exists. The two that cannot start stop the worker once, not twice: a second stop
    # would terminate the healthy run, which must finish and be reported done.
    sim = tmp_path / "sim1.0"
    sim.write_text(
        '#!/bin/sh\nsleep 1\nprintf \'{"y": [1]}\' > "$HONING_OUTPUTS"\n', encoding="utf-8"
    )
    sim.chmod(0o755)
    runs = [{"run_id": f"r{i}", "parameters": {"a": float(i)}} for i in (1, 2, 3)]
    fake_server.on("POST", f"{CAL}/runs", {"runs": runs, "status": "collecting"})
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    result = cli(
        "worker",
        "c1",
        "-q",
        "-j",
        "3",
        "--",
        str(tmp_path / "sim{a}"),
        url=fake_server.url,
        token="t",
    )
    assert result.returncode == 1
    assert "cannot start" in result.stderr
    assert fake_server.bodies("PUT", f"{CAL}/runs/r1") == [{"outputs": {"y": [1.0]}}]
    assert fake_server.bodies("PUT", f"{CAL}/runs/r2") == []
    assert fake_server.bodies("PUT", f"{CAL}/runs/r3") == []


def test_a_double_dash_keeps_its_usual_meaning_for_other_commands(
    fake_server: Any, cli: Any
) -> None:
    fake_server.on("GET", CAL, {"id": "c1", "status": "converged", "round": 3})
    result = cli("status", "--", "c1", url=fake_server.url, token="t")
    assert result.returncode == 0, result.stderr
    assert result.stdout.startswith("c1  converged")


def test_status_falls_back_to_the_warning_of_a_posterior_stored_earlier(
    fake_server: Any, cli: Any
) -> None:
    # Posteriors stored before the structured fields carry only the warning's text.
    fake_server.on("GET", CAL, {"id": "c1", "status": "budget_exhausted", "round": 4})
    reason = "run budget spent before convergence: round 4 had no earlier posterior"
    diagnostics = {"warnings": ["prior check: fine", reason]}
    fake_server.on("GET", f"{CAL}/posterior", {"diagnostics": diagnostics})
    result = cli("status", "c1", url=fake_server.url, token="t")
    assert result.returncode == 3
    assert result.stderr == f"warning: {reason}\n"


# -- lease extension --------------------------------------------------------------------

#: A command that outlives a one-second lease.
SLOW = [
    sys.executable,
    "-c",
    "import json, os, time; time.sleep(1.8); "
    "json.dump({'y': [1.0]}, open(os.environ['HONING_OUTPUTS'], 'w'))",
]


def reports(fake_server: Any) -> list[Any]:
    """The bodies of r1's result reports (not of its lease extensions)."""
    return [b for b in fake_server.bodies("PUT", f"{CAL}/runs/r1") if "lease_seconds" not in b]


def extensions_granted(fake_server: Any, report_state: str = "done") -> None:
    """The server grants r1's lease extensions and takes its report."""
    fake_server.on(
        "PUT",
        f"{CAL}/runs/r1/lease",
        {"run_id": "r1", "state": "leased", "lease_expires_at": "2026-01-01T00:00:01Z"},
    )
    trust = 1.0 if report_state == "done" else None
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": report_state, "trust": trust})


def test_a_run_longer_than_its_lease_has_it_extended(fake_server: Any, cli: Any) -> None:
    one_run_then(fake_server)
    extensions_granted(fake_server)
    result = cli(
        "worker", "c1", "-q", "--lease-seconds", "1", "--", *SLOW, url=fake_server.url, token="t"
    )
    assert result.returncode == 3, result.stderr
    # Extended each time half of the lease has passed: at about 0.5, 1.0 and 1.5 s of 1.8 s.
    extensions = fake_server.bodies("PUT", f"{CAL}/runs/r1/lease")
    assert len(extensions) >= 2 and all(b == {"lease_seconds": 1.0} for b in extensions)
    assert reports(fake_server) == [{"outputs": {"y": [1.0]}}]


@pytest.mark.parametrize("status", [409, 404])
def test_a_lease_that_cannot_be_extended_is_left_and_the_run_goes_on(
    fake_server: Any, cli: Any, status: int
) -> None:
    # 409: the lease ran out before the extension arrived; 404: a server without extensions.
    # Either way the run finishes and its result is reported (a late result is kept).
    one_run_then(fake_server)
    problem = {"title": "Conflict", "status": status, "detail": "run 'r1' is expired"}
    fake_server.on("PUT", f"{CAL}/runs/r1/lease", problem, status=status)
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    result = cli(
        "worker", "c1", "-q", "--lease-seconds", "1", "--", *SLOW, url=fake_server.url, token="t"
    )
    assert result.returncode == 3, result.stderr
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r1/lease")) == 1
    assert reports(fake_server) == [{"outputs": {"y": [1.0]}}]


def test_an_extension_the_server_cannot_take_now_is_tried_again_soon(
    fake_server: Any, cli: Any
) -> None:
    # 503 with a five-minute Retry-After: the worker does not sit out the hint inside one
    # call (its lease would lapse meanwhile); it tries again a tenth of a lease later.
    one_run_then(fake_server)
    fake_server.on(
        "PUT", f"{CAL}/runs/r1/lease", SERVICE_UNAVAILABLE, status=503, Retry_After="300"
    )
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    result = cli(
        "worker", "c1", "-q", "--lease-seconds", "1", "--", *SLOW, url=fake_server.url, token="t"
    )
    assert result.returncode == 3, result.stderr
    # From 0.5 s to 1.8 s, every 0.1 s: about 13 tries; 3 is far below, 1 is a stalled call.
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r1/lease")) >= 3
    assert reports(fake_server) == [{"outputs": {"y": [1.0]}}]


def test_the_worker_ends_without_waiting_for_a_hung_extension(
    fake_server: Any, cli_process: Any
) -> None:
    # The server never answers the extension (until the test lets it): the run finishes, is
    # reported, and the worker exits; the stuck call is left behind.
    one_run_then(fake_server)
    release = threading.Event()

    def hang(body: Any) -> tuple[int, Any, dict[str, str]]:
        release.wait(120)
        return 200, {"run_id": "r1", "state": "leased", "lease_expires_at": "x"}, {}

    fake_server.on_call("PUT", f"{CAL}/runs/r1/lease", hang)
    fake_server.on("PUT", f"{CAL}/runs/r1", {"run_id": "r1", "state": "done", "trust": 1.0})
    argv = ["worker", "c1", "-q", "--lease-seconds", "1", "--", *SLOW]
    proc = cli_process(*argv, url=fake_server.url, token="t")
    try:
        _, err = proc.communicate(timeout=60)  # the hung call would hold it for 120 s
    finally:
        release.set()
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 3, err
    assert reports(fake_server) == [{"outputs": {"y": [1.0]}}]


def test_extensions_stop_a_day_after_the_lease_so_a_hung_command_gives_its_point_back(
    fake_server: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Without --run-timeout a command may hang for good; its lease is extended for at most
    # EXTEND_LIMIT (a day; 1.2 s here), then left to run out so its point goes out again.
    monkeypatch.setattr(worker_module, "EXTEND_LIMIT", 1.2)
    one_run_then(fake_server)
    extensions_granted(fake_server)
    slow = [*SLOW[:2], SLOW[2].replace("1.8", "2.6")]
    options = worker_module.WorkerOptions(command=slow, lease_seconds=1.0)
    with Client(fake_server.url, "t") as client:
        progress = worker_module.Worker(client, "c1", options).run()
    assert progress.done == 1
    # At 0.5 and 1.0 s; the one due at 1.5 s is past the limit, and none follow until 2.6 s.
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r1/lease")) == 2


def test_one_stalled_extension_does_not_hold_up_the_others(fake_server: Any, cli: Any) -> None:
    # The server never answers r1's extension: each try gives up after a quarter of the
    # lease, so r2's lease is still extended on time.
    runs = [{"run_id": f"r{i}", "parameters": {"a": float(i)}} for i in (1, 2)]
    leases = iter([{"runs": runs, "status": "collecting"}])
    fake_server.on_call(
        "POST",
        f"{CAL}/runs",
        lambda body: (200, next(leases, {"runs": [], "status": "budget_exhausted"}), {}),
    )
    release = threading.Event()

    def hang(body: Any) -> tuple[int, Any, dict[str, str]]:
        release.wait(60)
        return 200, {"run_id": "r1", "state": "leased", "lease_expires_at": "x"}, {}

    fake_server.on_call("PUT", f"{CAL}/runs/r1/lease", hang)
    fake_server.on(
        "PUT", f"{CAL}/runs/r2/lease", {"run_id": "r2", "state": "leased", "lease_expires_at": "x"}
    )
    for rid in ("r1", "r2"):
        fake_server.on("PUT", f"{CAL}/runs/{rid}", {"run_id": rid, "state": "done", "trust": 1.0})
    try:
        result = cli(
            "worker", "c1", "-q", "-j", "2", "--lease-seconds", "1", "--", *SLOW,
            url=fake_server.url, token="t",
        )  # fmt: skip
    finally:
        release.set()
    assert result.returncode == 3, result.stderr
    # Due at about 0.5, 1.0 and 1.5 s of its 1.8 s run; at least two of them arrive.
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r2/lease")) >= 2


def test_a_lease_outlasts_the_stopping_of_a_timed_out_command(fake_server: Any, cli: Any) -> None:
    # The command ignores SIGTERM: stopped at --run-timeout 1.5 s, it dies of SIGKILL a grace
    # period (5 s) later. Its lease is extended all that time, until the failure is reported
    # (stopping at 1.5 s let a 1 s lease run out and the point go to another worker).
    one_run_then(fake_server)
    extensions_granted(fake_server, report_state="failed")
    stubborn = "import signal, time; signal.signal(signal.SIGTERM, signal.SIG_IGN); time.sleep(60)"
    result = cli(
        "worker", "c1", "-q", "--lease-seconds", "1", "--run-timeout", "1.5", "--",
        sys.executable, "-c", stubborn, url=fake_server.url, token="t",
    )  # fmt: skip
    assert result.returncode == 3, result.stderr
    (failure,) = reports(fake_server)
    assert "timed out" in failure["error"]
    # Every half second from 0.5 s to about 6.5 s; 2 would mean they stopped at 1.5 s.
    assert len(fake_server.bodies("PUT", f"{CAL}/runs/r1/lease")) >= 8


def test_runs_that_meet_a_setup_error_together_stop_the_worker_once(monkeypatch: Any) -> None:
    # Eight run threads meet a setup error at the same moment (every output refused for its
    # shape): one stop, as a second would terminate the commands that did start. The stop
    # itself is slowed down so that, unguarded, the threads would all pass the check first
    # (1 trial in 8 stopped twice with 11 runs refused at once).
    from types import SimpleNamespace

    from honing.client.errors import SettingsError
    from honing.client.worker import Worker, WorkerOptions

    worker = Worker(SimpleNamespace(), "c1", WorkerOptions(command=["true"]))  # type: ignore[arg-type]
    stop = worker.stop

    def slow_stop() -> None:
        time.sleep(0.01)
        stop()

    monkeypatch.setattr(worker, "stop", slow_stop)
    barrier = threading.Barrier(8)

    def meet() -> None:
        barrier.wait()
        worker._stop_once(SettingsError("outputs refused"))

    threads = [threading.Thread(target=meet) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert worker.stops == 1 and str(worker.error) == "outputs refused"
