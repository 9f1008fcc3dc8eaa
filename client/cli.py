"""The ``honing`` command line.

This module is the one place that writes to the terminal: results to stdout, progress and
errors to stderr (errors as one line, the server's problem title and detail). Exit codes are
listed in `EPILOG` and shown by ``honing --help``.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import signal
import sys
import tempfile
import threading
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import FrameType, ModuleType
from typing import Any, TextIO

from honing.client._client import DEFAULT_URL, MAX_OUTAGE, Client, RetryPolicy
from honing.client.errors import ClientError, SettingsError
from honing.client.files import load_spec, read_runs
from honing.client.tables import (
    CAUTION,
    diagnostics_line,
    format_number,
    posterior_table,
    warning_lines,
)
from honing.client.worker import Progress, Worker, WorkerOptions

__all__ = ["EXIT", "main"]

#: Exit status of the command line, by meaning.
EXIT = {
    "ok": 0,
    "error": 1,
    "usage": 2,
    "budget_exhausted": 3,
    "timeout": 4,
    "failed": 5,
    "interrupted": 130,
    "terminated": 143,
}

EPILOG = f"""\
exit codes:
  0    success; for worker, status and demo: the calibration converged
  1    error: the server refused the request or could not be reached, an input file
       is unusable, or a server cannot start (one line on stderr says which)
  2    usage error: unknown command or option, missing argument
  3    the run budget was used up before convergence (worker, status, demo)
  4    status: not finished when --timeout ran out (at once, without --wait)
  5    the calibration failed on the server (worker, status, demo)
  130  interrupted by Ctrl-C; a worker first reports the runs it had in hand
  143  stopped by SIGTERM, handled like Ctrl-C
serve and refitter stop gracefully on Ctrl-C or SIGTERM and exit 0.

settings: --url and --token, or HONING_URL and HONING_TOKEN (default URL {DEFAULT_URL});
creating on a server with an admin key needs --admin-key-file or HONING_ADMIN_KEY.
"""

WORKER_HELP = """\
Lease parameter points from the calibration, run COMMAND once for each, report the outputs.

For each run COMMAND gets in its environment:
  HONING_PARAMS     path of a JSON file {parameter name: value}
  HONING_P_<name>   each parameter's value as text (also with '-' and '.' in the name as '_',
                    unless another parameter has that name)
  HONING_RUN_ID     the run's id
  HONING_OUTPUTS    path where COMMAND must write a JSON object {observation name: [numbers]}
and "{name}" in its arguments is replaced by that parameter's value. COMMAND runs in the
current folder. A non-zero exit, a missing or malformed outputs file, or a run longer than
--run-timeout is reported as a failed run, with the end of COMMAND's stderr as the message.
The first failure of each kind is printed with that message. A COMMAND that cannot start
at all, or whose outputs are refused for their shape (an observation missing, misnamed or
of the wrong length) or size, stops the worker (exit 1) and reports nothing. While
COMMAND runs, its lease is extended, so a run may take longer than --lease-seconds; the
extensions stop at --run-timeout or, without one, a day after the lease (a COMMAND that
hangs then gives its point back): set --run-timeout for runs that can take longer.

The worker exits when the calibration stops handing out work: 0 once converged, 3 when the
run budget is used up. Ctrl-C stops leasing and waits for the runs in hand to finish and be
reported, then exits 130; a second Ctrl-C terminates those runs and reports them as failed;
a third quits without waiting for the server to acknowledge (their leases then expire and
the points are handed out again).

example:
  honing worker $ID -j 4 --run-timeout 600 -- ./simulate --velocity {velocity} --out out.json
"""

FINISHED_EXIT = {"converged": 0, "budget_exhausted": 3, "failed": 5}
#: How the engine's warning about a spent budget begins (after "warning: ").
_SPENT = "warning: run budget spent"
#: The server's bounds on one lease request (API.md): runs at once, and seconds held.
MAX_JOBS = 1000
#: Kinds of run failure the worker prints a line for (the first run of each); beyond them,
#: one line points to the full list.
FAILURE_KINDS_SHOWN = 5
MAX_LEASE_SECONDS = 604_800.0
#: Seconds a default lease outlasts --run-timeout, for reporting after the command ends.
LEASE_MARGIN = 60.0


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    words = list(sys.argv[1:] if argv is None else argv)
    # After 'worker', everything after the first '--' is its COMMAND, verbatim: argparse
    # would drop a second '--' inside it, or not, depending on where the options stand.
    # Elsewhere '--' keeps its usual meaning for argparse (the end of options).
    command: list[str] | None = None
    if "--" in words and "worker" in words[: words.index("--")]:
        cut = words.index("--")
        words, command = words[:cut], words[cut + 1 :]
    try:
        args = parser.parse_args(words)
    except SystemExit as exc:
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT["usage"]
    if not getattr(args, "handler", None):
        parser.print_help(sys.stderr)
        return EXIT["usage"]
    if command is not None:
        args.command = [*args.command, *command]
    try:
        with _terminate_on_sigterm():
            return int(args.handler(args))
    except ClientError as exc:
        _error(str(exc))
        return EXIT["error"]
    except KeyboardInterrupt:
        _error("interrupted")
        return EXIT["interrupted"]
    except Terminated:
        _error("terminated")
        return EXIT["terminated"]
    except BrokenPipeError:
        # The reader of stdout went away (``honing runs ID | head``); silence the final flush.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT["error"]


class Terminated(BaseException):
    """SIGTERM arrived: raised where the command stands, as Ctrl-C raises KeyboardInterrupt
    (a BaseException, so that no handler of ordinary errors swallows it)."""


@contextlib.contextmanager
def _terminate_on_sigterm() -> Iterator[None]:
    """While inside, SIGTERM raises `Terminated` (exit 143), as documented for every command;
    the worker installs its own step-by-step handler over this one. Signal handlers belong to
    the main thread, so elsewhere (the CLI called from a thread) nothing changes."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: FrameType | None) -> None:
        raise Terminated

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


# -- parser ------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every command."""
    connection = argparse.ArgumentParser(add_help=False)
    group = connection.add_argument_group("connection")
    group.add_argument(
        "--url",
        default=argparse.SUPPRESS,
        help=f"server URL (default: $HONING_URL or {DEFAULT_URL})",
    )
    group.add_argument(
        "--token",
        default=argparse.SUPPRESS,
        help="the calibration's token, printed by 'honing create' (default: $HONING_TOKEN)",
    )

    parser = argparse.ArgumentParser(
        prog="honing",
        description=(
            "Calibrate an expensive simulator: the server proposes parameter points, workers\n"
            "run the simulator and report outputs, and the server refits a surrogate and\n"
            "samples the posterior of the parameters given the measured data."
        ),
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        parents=[connection],
    )
    parser.add_argument("--version", action="version", version=f"honing {_version()}")
    commands = parser.add_subparsers(title="commands", metavar="COMMAND")

    def command(name: str, summary: str, description: str | None = None) -> argparse.ArgumentParser:
        sub = commands.add_parser(
            name,
            help=summary,
            description=description or summary,
            epilog=EPILOG,
            formatter_class=argparse.RawDescriptionHelpFormatter,
            parents=[connection],
        )
        return sub

    p = command(
        "serve",
        "run the HTTP API",
        "Run the HTTP API and its background refits. Listens on loopback unless --host says "
        "otherwise; Ctrl-C stops it.",
    )
    p.add_argument(
        "--host", default="127.0.0.1", help="address to listen on (default: %(default)s)"
    )
    p.add_argument("--port", type=int, default=8750, help="port (default: %(default)s)")
    p.add_argument(
        "--store",
        metavar="URL",
        help="sqlite:///relative.db, sqlite:////absolute.db or redis://host:port/db "
        "(default: a SQLite file under the user's data folder)",
    )
    p.add_argument(
        "--admin-key-file",
        metavar="FILE",
        help="file holding the key that creating a calibration needs (default: open creation)",
    )
    p.add_argument(
        "--refit-workers",
        type=int,
        default=1,
        metavar="N",
        help="background refits run at once (default: %(default)s)",
    )
    p.set_defaults(handler=_serve)

    p = command(
        "refitter",
        "run background refits only, against a shared store",
        "Run the refit loop without the HTTP API, for deployments where several API "
        "processes share one Redis store.",
    )
    p.add_argument("--store", metavar="URL", required=True, help="store URL, as for 'serve'")
    p.set_defaults(handler=_refitter)

    p = command(
        "demo",
        "calibrate a synthetic tracer-column model end to end",
        "Start a server in this process on a free port with a temporary store, calibrate a "
        "packed soil column model (a chloride tracer and a sorbing, decaying solute pulsed in "
        "together, three probes; invented data with known true values) with a local worker, "
        "then print the posterior beside the true values and write the HTML report.",
    )
    p.add_argument("-j", "--jobs", type=int, default=2, help="runs at once (default: 2)")
    p.add_argument(
        "--report",
        metavar="FILE",
        default="honing-demo-report.html",
        help="where to write the HTML report (default: %(default)s)",
    )
    p.add_argument(
        "--max-runs",
        type=int,
        metavar="N",
        help="smaller run budget, for a quicker look (default: the demo spec's)",
    )
    p.add_argument("-q", "--quiet", action="store_true", help="no progress line")
    p.set_defaults(handler=_demo)

    p = command(
        "create",
        "create a calibration from a spec file",
        "Create a calibration from SPEC (.toml or .json) and print '<id> <token>' on one "
        "line. Keep the token: every other command on the calibration needs it.",
    )
    p.add_argument("spec", metavar="SPEC", help="calibration spec, .toml or .json")
    p.add_argument("--json", action="store_true", help="print the server's JSON answer")
    p.add_argument(
        "--admin-key-file",
        metavar="FILE",
        help="file holding the server's admin key (default: $HONING_ADMIN_KEY)",
    )
    p.set_defaults(handler=_create)

    p = command("worker", "evaluate leased points with a command", WORKER_HELP)
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("command", metavar="COMMAND", nargs="*", help="the simulator, after '--'")
    p.add_argument(
        "-j", "--jobs", type=int, default=1, metavar="N", help="runs at once (default: 1)"
    )
    p.add_argument(
        "--run-timeout",
        type=float,
        metavar="S",
        help="seconds one run may take before it is stopped and reported failed (its lease "
        "is extended that long; without this option, a day)",
    )
    p.add_argument(
        "--lease-seconds",
        type=float,
        metavar="S",
        help="lease length: the worker extends each run's lease while its command runs, so "
        "this is how soon the points of a worker that died are handed out again "
        "(default: 900, or --run-timeout plus 60 if longer)",
    )
    p.add_argument("--name", help="worker name shown in the runs table (default: host:pid)")
    _max_outage_option(p, "")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress line")
    p.set_defaults(handler=_worker)

    p = command(
        "status",
        "show a calibration's status; optionally wait for it to finish",
        "Print the status, round and run counts. Exit 0 once converged, 3 when the budget "
        "was used up without convergence, 5 if it failed, 4 if not finished (when --timeout "
        "runs out with --wait, at once without).",
    )
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("--wait", action="store_true", help="wait until converged, exhausted or failed")
    p.add_argument("--timeout", type=float, metavar="S", help="give up waiting after S seconds")
    _max_outage_option(p, "with --wait: ")
    p.add_argument(
        "--interval", type=float, default=2.0, metavar="S", help="seconds between polls (default 2)"
    )
    p.add_argument("--json", action="store_true", help="print the calibration document as JSON")
    p.set_defaults(handler=_status)

    p = command("posterior", "print the posterior summary as a table")
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("--json", action="store_true", help="print the server's JSON summary")
    p.set_defaults(handler=_posterior)

    p = command("samples", "write posterior draws as CSV")
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("-n", "--count", type=int, default=1000, help="draws (default: %(default)s)")
    p.add_argument("-o", "--output", metavar="FILE", help="CSV file (default: stdout)")
    p.set_defaults(handler=_samples)

    p = command("runs", "write every run (parameters, outputs, state, trust) as CSV")
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument(
        "-o",
        "--output",
        metavar="FILE",
        help="CSV file, JSON if it ends in .json (default: stdout)",
    )
    p.add_argument("--state", choices=["leased", "done", "failed", "expired"], help="only these")
    p.add_argument("--json", action="store_true", help="JSON instead of CSV")
    p.set_defaults(handler=_runs)

    p = command("report", "write the HTML report with plots")
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument(
        "-o", "--output", metavar="FILE", help="HTML file (default: honing-report-<ID>.html)"
    )
    p.set_defaults(handler=_report)

    p = command(
        "import",
        "add runs evaluated elsewhere as extra design points",
        "Add archived runs (.csv or .json) to a calibration; all or nothing. A CSV file has a "
        "column per parameter and one per output value named <observation>[<i>] (0-based); "
        "a table written by 'honing runs -o' works as is.",
    )
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("file", metavar="RUNS", help="runs.csv or runs.json")
    p.set_defaults(handler=_import)

    p = command(
        "budget",
        "raise a calibration's run budget",
        "Allow up to MAX_RUNS runs in all. A calibration that spent its old budget collects "
        "again from where it stood, with its runs and posterior; start workers again to go on.",
    )
    p.add_argument("id", metavar="ID", help="calibration id")
    p.add_argument("max_runs", metavar="MAX_RUNS", type=int, help="the new budget, in runs")
    p.set_defaults(handler=_budget)

    p = command("delete", "delete a calibration and all its runs")
    p.add_argument("id", metavar="ID", help="calibration id")
    p.set_defaults(handler=_delete)

    p = command("health", "check that the server answers")
    p.set_defaults(handler=_health)
    return parser


# -- commands ----------------------------------------------------------------------------


def _serve(args: argparse.Namespace) -> int:
    """Serve until stopped; SIGTERM is the usual way to stop a service, so after the graceful
    shutdown (requests finished, refit workers stopped) it exits 0, as `honing refitter` does."""
    server = _server_module()
    store = args.store or _default_store_url()
    _check_server_settings(store, args.admin_key_file)
    try:
        server.run_server(
            args.host,
            args.port,
            store,
            admin_key_file=args.admin_key_file,
            refit_workers=args.refit_workers,
        )
    except Terminated:
        pass
    except SystemExit as exc:  # uvicorn's own exit when the app fails to start (status 3)
        if exc.code in (0, None):
            raise
        raise SettingsError("the server could not start; its log above says why") from None
    return EXIT["ok"]


def _refitter(args: argparse.Namespace) -> int:
    server = _server_module()
    _check_server_settings(args.store, None)
    server.run_refitter(args.store)
    return EXIT["ok"]


def _check_server_settings(store: str, admin_key_file: str | None) -> None:
    """One-line errors (exit 1) for a store URL, SQLite file or key file the server cannot
    use, before it starts: once it runs, such a mistake ends it with a traceback in its log.
    A SQLite file is opened, which writes to it once (a Redis server may come up later)."""
    import sqlite3

    from honing.api.store import StoreUnavailable, check_store_url, open_store

    try:
        check_store_url(store)
    except ValueError as exc:
        raise SettingsError(str(exc)) from None
    if store.startswith("sqlite:"):
        try:
            open_store(store).close()
        except (StoreUnavailable, OSError, sqlite3.Error) as exc:
            raise SettingsError(f"cannot use the store {store}: {exc}") from None
    if admin_key_file:
        _read_secret(admin_key_file)


def _max_outage_option(parser: argparse.ArgumentParser, when: str) -> None:
    parser.add_argument(
        "--max-outage",
        type=float,
        default=MAX_OUTAGE,
        metavar="S",
        help=f"{when}keep asking a server that answered before and is now down or failing "
        "for S seconds before giving up (default: %(default)g)",
    )


def _create(args: argparse.Namespace) -> int:
    spec = load_spec(args.spec)
    admin_key = _read_secret(args.admin_key_file) if args.admin_key_file else None
    with _client(args, need_token=False, admin_key=admin_key) as client:
        answer = client.create(spec)
    if args.json:
        _out(json.dumps(answer, indent=2))
    else:
        _out(f"{answer['id']} {answer['token']}")
    return EXIT["ok"]


def _worker(args: argparse.Namespace) -> int:
    if not args.command:
        return _usage("worker: COMMAND is missing (give it after '--')")
    if not 1 <= args.jobs <= MAX_JOBS:
        return _usage(f"worker: -j must be from 1 to {MAX_JOBS}")
    longest = MAX_LEASE_SECONDS - LEASE_MARGIN
    if args.run_timeout is not None and not 0 < args.run_timeout <= longest:
        return _usage(f"worker: --run-timeout must be above 0 and at most {longest:g} s")
    if args.lease_seconds is not None and not 1 <= args.lease_seconds <= MAX_LEASE_SECONDS:
        return _usage(f"worker: --lease-seconds must be from 1 to {MAX_LEASE_SECONDS:g}")
    lease = args.lease_seconds
    if lease is None:
        lease = max(900.0, (args.run_timeout or 0.0) + LEASE_MARGIN)
    options = WorkerOptions(
        command=args.command,
        jobs=args.jobs,
        run_timeout=args.run_timeout,
        lease_seconds=lease,
        name=args.name or "",
        max_outage=max(args.max_outage, 0.0),
    )
    with _client(args) as client:
        return _run_worker(client, args.id, options, quiet=args.quiet)


def _status(args: argparse.Namespace) -> int:
    with _client(args) as client:
        if args.wait:
            info = client.wait(
                args.id,
                timeout=args.timeout,
                interval=max(args.interval, 0.1),
                max_outage=max(args.max_outage, 0.0),
            )
        else:
            info = client.calibration(args.id)
        status = str(info.get("status"))
        if args.json:
            _out(json.dumps(info, indent=2))
        else:
            _out(
                f"{args.id}  {status}  round {format_number(info.get('round'))}  runs "
                f"{format_number(info.get('runs_completed'))} done, "
                f"{format_number(info.get('runs_failed'))} failed, "
                f"{format_number(info.get('runs_leased'))} leased"
            )
            if status == "budget_exhausted":
                for line in _budget_lines(client, args.id):
                    _note(line)
    return FINISHED_EXIT.get(status, EXIT["timeout"])


def _budget_lines(client: Client, cid: str) -> list[str]:
    """Why the budget ran out before convergence, and the budget that would let it go on,
    from the posterior's diagnostics.

    One attempt, and nothing if it fails: the status line and the exit code already say
    what matters, and a retried read could hold them back for minutes.
    """
    client.retry = RetryPolicy(attempts=1)
    try:
        summary = client.posterior(cid)
    except ClientError:
        return []
    diagnostics = summary.get("diagnostics") if isinstance(summary, dict) else None
    if not isinstance(diagnostics, dict):
        return []
    if "unmet_conditions" not in diagnostics:  # a posterior stored before the field existed
        warnings = [w for w in warning_lines(summary) if w.startswith(_SPENT)]
        return warnings[:1]
    lines = []
    reasons = diagnostics.get("unmet_conditions")
    if isinstance(reasons, list) and reasons:
        reason = "; ".join(map(str, reasons))
        lines.append(f"{_SPENT} before convergence: {reason}")
    least = diagnostics.get("suggested_max_runs")
    if isinstance(least, int) and not isinstance(least, bool):
        lines.append(f"to go on, raise the budget: honing budget {cid} {least}")
    return lines


def _posterior(args: argparse.Namespace) -> int:
    with _client(args) as client:
        summary = client.posterior(args.id)
        if args.json:
            _out(json.dumps(summary, indent=2))
            return EXIT["ok"]
        info = client.calibration(args.id)
    _out(posterior_table(summary, units=_units(info)))
    _out(diagnostics_line(summary))
    for line in warning_lines(summary):
        _out(line)
    _out(CAUTION)
    return EXIT["ok"]


def _samples(args: argparse.Namespace) -> int:
    if args.count < 1:
        return _usage("samples: --count must be at least 1")
    with _client(args) as client:
        _write(args.output, client.samples_csv(args.id, args.count))
    return EXIT["ok"]


def _runs(args: argparse.Namespace) -> int:
    as_json = args.json or str(args.output or "").lower().endswith(".json")
    with _client(args) as client:
        if as_json:
            text = json.dumps({"runs": client.runs(args.id, args.state)}, indent=2) + "\n"
        else:
            text = client.runs_csv(args.id, args.state)
    _write(args.output, text)
    return EXIT["ok"]


def _report(args: argparse.Namespace) -> int:
    with _client(args) as client:
        html = client.report_html(args.id)
    path = args.output or f"honing-report-{args.id}.html"
    _write(path, html)
    return EXIT["ok"]


def _import(args: argparse.Namespace) -> int:
    with _client(args) as client:
        archive = read_runs(args.file, client.calibration(args.id))
        if not archive.runs:
            raise SettingsError(f"{args.file} holds no finished runs to import")
        answer = client.import_runs(args.id, archive.runs)
    skipped = f" (skipped {archive.skipped} not done or without outputs)" if archive.skipped else ""
    _out(f"imported {answer.get('imported', len(archive.runs))} runs into {args.id}{skipped}")
    return EXIT["ok"]


def _budget(args: argparse.Namespace) -> int:
    with _client(args) as client:
        info = client.raise_budget(args.id, args.max_runs)
    budget = info.get("spec", {}).get("budget", {}).get("max_runs")
    _out(f"{args.id}  {info.get('status')}  budget {format_number(budget)} runs")
    return EXIT["ok"]


def _delete(args: argparse.Namespace) -> int:
    with _client(args) as client:
        client.delete(args.id)
    _out(f"deleted {args.id}")
    return EXIT["ok"]


def _health(args: argparse.Namespace) -> int:
    with _client(args, need_token=False) as client:
        answer = client.health()
    _out(f"{client.url}: {answer.get('status')} (store: {answer.get('store', '-')})")
    return EXIT["ok"]


def _demo(args: argparse.Namespace) -> int:
    server = _server_module()
    try:
        from honing.api import demo
    except ImportError as exc:
        raise SettingsError(_missing_extra(exc)) from None
    if args.jobs < 1:
        return _usage("demo: -j must be at least 1")
    started = time.monotonic()
    spec = demo.demo_spec()
    if args.max_runs is not None:
        spec["budget"] = {"max_runs": args.max_runs}
    with tempfile.TemporaryDirectory(prefix="honing-demo-") as folder:
        base_url, stop = server.start_background_server(f"sqlite:///{folder}/demo.db")
        try:
            with Client(base_url) as client:
                created = client.create(spec)
                client.token = created["token"]
                cid = created["id"]
                _note(
                    f"demo: server at {base_url}; calibration {cid}: "
                    f"{len(spec['parameters'])} parameters, "
                    f"{sum(len(o['values']) for o in spec['observations'])} measured values, "
                    f"budget {spec['budget']['max_runs']} runs, {args.jobs} at once"
                )
                options = WorkerOptions(
                    command=[sys.executable, "-m", "honing.api.demo", "simulate"],
                    jobs=args.jobs,
                    run_timeout=60.0,
                    name="demo",
                )
                code = _run_worker(client, cid, options, quiet=args.quiet)
                if code not in (EXIT["ok"], EXIT["budget_exhausted"]):
                    return code
                summary = client.posterior(cid)
                html = client.report_html(cid)
        finally:
            stop()
    report = Path(args.report).resolve()
    _write(str(report), html)
    _out("")
    _out(posterior_table(summary, units=_units({"spec": spec}), truth=demo.TRUE_PARAMETERS))
    _out(diagnostics_line(summary))
    for line in warning_lines(summary):  # on a spent budget, what kept it from converging
        _out(line)
    if code == EXIT["budget_exhausted"]:
        _out("In this demo the store is temporary: rerun with a larger --max-runs to go on.")
    _out(f"report: {report}")
    _out(f"finished in {time.monotonic() - started:.0f} s")
    _out("The true values are known only because the data are synthetic. " + CAUTION)
    return code


# -- worker with progress and signals ----------------------------------------------------


class ProgressLine:
    """A live progress line on a terminal; on a pipe or file, one line per change of state."""

    def __init__(self, stream: TextIO, enabled: bool = True) -> None:
        self.stream = stream
        self.enabled = enabled
        self.tty = stream.isatty()
        self._last: Progress | None = None
        self._written = 0.0
        self._key: tuple[Any, ...] | None = None
        self._shown = ""

    def update(self, progress: Progress) -> None:
        """Show ``progress`` (throttled)."""
        self._last = progress
        if not self.enabled:
            return
        now = time.monotonic()
        if self.tty:
            if now - self._written >= 0.1:
                self._draw(progress)
            return
        key = (progress.round, progress.status, progress.stopping, progress.trouble)
        if key != self._key or now - self._written >= 30.0:
            self._key = key
            self._line(progress)

    def note(self, text: str) -> None:
        """Print a line of its own above the live line (on a terminal, which is redrawn)."""
        if not self.enabled:
            return
        if self.tty:
            self.stream.write("\r\x1b[K" + text + "\n")
            if self._last is not None:
                self._draw(self._last)
            else:
                self.stream.flush()
        else:
            self.stream.write(text + "\n")
            self.stream.flush()

    def close(self) -> None:
        """Show the final state and end the line."""
        if not self.enabled or self._last is None:
            return
        if self.tty:
            self._draw(self._last)
            self.stream.write("\n")
            self.stream.flush()
        elif self._text(self._last) != self._shown:
            self._line(self._last)

    def _line(self, progress: Progress) -> None:
        self._written = time.monotonic()
        self._shown = self._text(progress)
        self.stream.write(self._shown + "\n")
        self.stream.flush()

    def _draw(self, progress: Progress) -> None:
        self._written = time.monotonic()
        self.stream.write("\r" + self._text(progress) + "\x1b[K")
        self.stream.flush()

    @staticmethod
    def _text(p: Progress) -> str:
        text = (
            f"runs {p.done} done, {p.failed} failed, {p.running} running"
            f" | round {format_number(p.round)}"
            f" | validation error {format_number(p.validation_error, 3)}"
            f" | {p.status or '-'}"
        )
        if p.trouble_since is not None:
            since = time.strftime("%H:%M:%S", time.localtime(p.trouble_since))
            text += f" | retrying since {since}: {p.trouble}"
        return text + (" | stopping" if p.stopping else "")


class FailureNotes:
    """The first failure of each kind, as a line of its own: a progress line that only
    counts failed runs does not say why they fail."""

    def __init__(self, line: ProgressLine, calibration_id: str) -> None:
        self.line = line
        self.calibration_id = calibration_id
        self._seen: set[str] = set()

    def __call__(self, run_id: str, message: str) -> None:
        key = " ".join(message.split())[:200]
        if key in self._seen or len(self._seen) > FAILURE_KINDS_SHOWN:
            return
        self._seen.add(key)
        if len(self._seen) > FAILURE_KINDS_SHOWN:
            self.line.note(
                f"more kinds of failure: honing runs {self.calibration_id} --state failed"
            )
            return
        problem, _, tail = message.partition("; stderr: ")
        last = tail.strip().splitlines()[-1].strip() if tail.strip() else ""
        text = " ".join(problem.split())[:300] or "failed"
        ending = f"; stderr ends: {last[:300]}" if last else ""
        self.line.note(f"run {run_id} failed: {text}{ending}")


def _run_worker(client: Client, cid: str, options: WorkerOptions, quiet: bool) -> int:
    line = ProgressLine(sys.stderr, enabled=not quiet)
    worker = Worker(
        client, cid, options, on_progress=line.update, on_failure=FailureNotes(line, cid)
    )
    with _stop_on_signals(worker) as received:
        progress = worker.run()
    line.close()
    if worker.error is not None and not received:
        raise worker.error
    if received:
        if worker.error is not None:
            _error(str(worker.error))
        return EXIT["terminated"] if received[0] == signal.SIGTERM else EXIT["interrupted"]
    return FINISHED_EXIT.get(progress.status, EXIT["error"])


@contextlib.contextmanager
def _stop_on_signals(worker: Worker) -> Iterator[list[int]]:
    """While inside, SIGINT and SIGTERM stop the worker step by step; yields the signals seen."""
    received: list[int] = []
    messages = [
        "stopping: no new runs; finishing and reporting the runs in hand "
        "(Ctrl-C again to terminate them)",
        "terminating the running commands and reporting them as failed "
        "(Ctrl-C again to quit without waiting for the server)",
        "quitting; unacknowledged runs will be handed out again when their leases expire",
    ]

    def handler(signum: int, frame: FrameType | None) -> None:
        received.append(signum)
        _error(messages[min(len(received), len(messages)) - 1])
        worker.stop()

    previous = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield received
    finally:
        for s, h in previous.items():
            signal.signal(s, h)


# -- helpers -----------------------------------------------------------------------------


def _client(
    args: argparse.Namespace, need_token: bool = True, admin_key: str | None = None
) -> Client:
    client = Client(getattr(args, "url", None), getattr(args, "token", None), admin_key=admin_key)
    if need_token and not client.token:
        client.close()
        raise SettingsError(
            "no token: pass --token or set HONING_TOKEN (printed by 'honing create')"
        )
    return client


def _server_module() -> ModuleType:
    try:
        from honing.api import server
    except ImportError as exc:
        raise SettingsError(_missing_extra(exc)) from None
    return server


def _missing_extra(exc: ImportError) -> str:
    return (
        f"the server part is not available ({exc}); install it with: pip install 'honing[server]'"
    )


def _default_store_url() -> str:
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    folder = Path(base) / "honing"
    folder.mkdir(parents=True, exist_ok=True)
    return f"sqlite:///{folder / 'honing.db'}"


def _read_secret(path: str) -> str:
    try:
        secret = Path(path).read_text(encoding="utf-8").strip()
    except OSError as exc:
        raise SettingsError(f"cannot read the key file {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise SettingsError(f"the key file {path} is not UTF-8 text") from None
    if not secret:
        raise SettingsError(f"the key file {path} is empty")
    return secret


def _units(info: dict[str, Any]) -> dict[str, str | None]:
    spec = info.get("spec") or {}
    return {p["name"]: p.get("unit") for p in spec.get("parameters", [])}


def _write(path: str | None, text: str) -> None:
    if path is None or path == "-":
        sys.stdout.write(text)
        sys.stdout.flush()
        return
    try:
        Path(path).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise SettingsError(f"cannot write {path}: {exc.strerror or exc}") from None
    _note(f"wrote {path}")


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("honing")
    except PackageNotFoundError:
        return "unknown"


def _out(text: str) -> None:
    sys.stdout.write(text + "\n")
    sys.stdout.flush()


def _note(text: str) -> None:
    sys.stderr.write(text + "\n")
    sys.stderr.flush()


def _error(text: str) -> None:
    _note("honing: " + " ".join(text.split()))


def _usage(text: str) -> int:
    _error(text)
    return EXIT["usage"]


if __name__ == "__main__":
    sys.exit(main())
