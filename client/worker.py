"""The worker loop: lease points, run a command for each, report the outputs.

The command sees, in its environment, ``HONING_PARAMS`` (path of a JSON file
``{name: value}``), ``HONING_P_<name>`` (each value as text), ``HONING_RUN_ID`` and
``HONING_OUTPUTS`` (where it writes ``{observation name: [numbers]}``); ``{name}`` in its
arguments is replaced by that parameter's value. A non-zero exit, a missing or malformed
outputs file, or a timeout is reported as a failed run with the tail of the command's stderr.
While a command runs, the worker extends its run's lease each time half of it has passed, so
a run longer than its lease is not handed out to another worker; the lease length is then
only how soon the point of a worker that died goes out again. While the command runs,
extensions stop at the run timeout (plus the time to stop the command) or, without one, a
day after the lease (`EXTEND_LIMIT`): a command that hangs gives its point back then. Once
the command is over, the lease is extended until its result is reported.

Stopping is gradual: the first `Worker.stop` stops leasing and lets the commands in hand
finish and be reported; the second terminates them and reports them as failed; the third
abandons results the server has not yet acknowledged (their leases expire and the points are
handed out again).

A command that cannot start at all (not found, not executable) is a mistake in the worker's
own setup, not a property of the point: the worker stops with that error and reports
nothing for the run, whose lease then expires and whose point is handed out again.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import queue
import re
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from honing.client._client import FINISHED, MAX_OUTAGE, TRANSIENT, Client, Outage
from honing.client.errors import (
    ClientError,
    Conflict,
    PayloadTooLarge,
    SettingsError,
    ValidationFailed,
)

__all__ = ["Progress", "RunResult", "Worker", "WorkerOptions", "run_command", "substitute"]

#: Characters of stderr kept in a failure message (the end of the stream).
STDERR_TAIL = 2000
#: Longest error message reported for a run (the server keeps up to 65,536 characters).
ERROR_CHARS = 4000
#: Seconds a terminated command gets before it is killed.
KILL_GRACE = 5.0
#: Seconds between progress refreshes from the server (round, validation error).
PROGRESS_POLL = 2.0
#: Share of a lease after which the worker extends it, and again each time (a run longer
#: than its lease is not handed out to another worker meanwhile).
EXTEND_AFTER = 0.5
#: Longest wait before an extension that failed for want of the server is tried again.
EXTEND_RETRY = 30.0
#: Longest wait for one extension's answer (less for short leases: a quarter of the lease),
#: so that one call held up by a stalled server does not hold up the others past their end.
EXTEND_TIMEOUT = 10.0
#: Seconds after its lease that a run's lease is extended at most, when there is no
#: --run-timeout (with one, the command is stopped at it anyway): a command that hangs gives
#: its point back a day later instead of holding it for good.
EXTEND_LIMIT = 86400.0
#: Seconds a worker that is done waits for an extension still in flight; the thread is a
#: daemon, so one held up by a server that does not answer is left behind.
EXTEND_JOIN = 1.0

_PLACEHOLDER = re.compile(r"\{([A-Za-z0-9_.\-]+)\}")


@dataclass(frozen=True)
class WorkerOptions:
    """How a worker runs: the command, parallelism, timeouts and its name on the server."""

    command: Sequence[str]
    jobs: int = 1
    run_timeout: float | None = None
    lease_seconds: float = 900.0
    name: str = ""
    max_idle_wait: float = 5.0
    max_outage: float = MAX_OUTAGE


@dataclass(frozen=True)
class Progress:
    """What a worker has done so far, and the calibration's latest state."""

    done: int = 0
    failed: int = 0
    running: int = 0
    round: int | None = None
    validation_error: float | None = None
    status: str = ""
    stopping: bool = False
    #: Since when (time.time) and why calls to the server are being retried, if they are.
    trouble_since: float | None = None
    trouble: str = ""


@dataclass(frozen=True)
class RunResult:
    """The outcome of one command: outputs, or an error message."""

    run_id: str
    outputs: dict[str, list[float]] | None = None
    error: str | None = None
    started: bool = True


def substitute(args: Sequence[str], parameters: Mapping[str, Any]) -> list[str]:
    """Replace ``{name}`` in each argument by that parameter's value; other braces stay."""

    def one(match: re.Match[str]) -> str:
        name = match.group(1)
        return _text(parameters[name]) if name in parameters else match.group(0)

    return [_PLACEHOLDER.sub(one, a) for a in args]


def parameter_environment(parameters: Mapping[str, Any]) -> dict[str, str]:
    """``HONING_P_<name>`` for each parameter, and for a name with '-' or '.' also its alias
    with '_' in their place, unless another parameter has that name exactly."""
    exact = {f"HONING_P_{name}": _text(value) for name, value in parameters.items()}
    aliases = {
        f"HONING_P_{re.sub(r'[^A-Za-z0-9_]', '_', name)}": _text(value)
        for name, value in parameters.items()
    }
    return {**{k: v for k, v in aliases.items() if k not in exact}, **exact}


def run_command(
    command: Sequence[str],
    run: Mapping[str, Any],
    timeout: float | None = None,
    started: Callable[[subprocess.Popen[bytes]], None] | None = None,
    interrupted: Callable[[], bool] = lambda: False,
) -> RunResult:
    """Run ``command`` for one leased run and read its outputs file.

    ``started`` receives the process (so that a caller can terminate it); ``interrupted``
    tells, after a command died of a signal, whether the worker stopped it on purpose.
    """
    run_id = str(run["run_id"])
    parameters = dict(run.get("parameters") or {})
    with tempfile.TemporaryDirectory(prefix="honing-run-") as folder:
        here = Path(folder)
        params_path, outputs_path = here / "params.json", here / "outputs.json"
        params_path.write_text(json.dumps(parameters), encoding="utf-8")
        env = dict(os.environ)
        env.update(
            HONING_PARAMS=str(params_path),
            HONING_OUTPUTS=str(outputs_path),
            HONING_RUN_ID=run_id,
        )
        env.update(parameter_environment(parameters))
        argv = substitute(command, parameters)
        with (here / "stdout").open("wb") as out, (here / "stderr").open("wb") as err:
            try:
                proc = subprocess.Popen(
                    argv,
                    env=env,
                    stdin=subprocess.DEVNULL,
                    stdout=out,
                    stderr=err,
                    start_new_session=True,
                )
            except OSError as exc:
                why = f"cannot start {argv[0]!r}: {exc.strerror or exc}"
                return RunResult(run_id, error=why, started=False)
            if started is not None:
                started(proc)
            problem = _wait(proc, timeout, interrupted)
        if problem is None:
            outputs, problem = _read_outputs(outputs_path)
            if outputs is not None:
                return RunResult(run_id, outputs=outputs)
        tail = _tail(here / "stderr")
        return RunResult(run_id, error=problem + (f"; stderr: {tail}" if tail else ""))


class Worker:
    """Lease, run and report until the calibration stops handing out work.

    Parameters
    ----------
    client
        A `Client` holding the calibration's token.
    calibration_id
        The calibration to work on.
    options
        The `WorkerOptions`.
    on_progress
        Called with a `Progress` after every change (from the thread calling `run`).
    on_failure
        Called with a run id and the failure reported for it (from the thread calling `run`).
    """

    def __init__(
        self,
        client: Client,
        calibration_id: str,
        options: WorkerOptions,
        on_progress: Callable[[Progress], None] | None = None,
        on_failure: Callable[[str, str], None] | None = None,
    ) -> None:
        self.client = client
        self.calibration_id = calibration_id
        self.options = options
        self.on_progress = on_progress
        self.on_failure = on_failure
        self.name = options.name or f"{socket.gethostname()}:{os.getpid()}"
        self.progress = Progress()
        self.error: ClientError | None = None
        self._stops = 0
        # run id, outcome ("done", "failed", "conflict", "error") and the failure reported
        self._finished: queue.Queue[tuple[str, str, str]] = queue.Queue()
        self._procs: dict[str, subprocess.Popen[bytes]] = {}
        self._lock = threading.Lock()
        self._stop_lock = threading.Lock()  # not taken by `stop`, which signal handlers call
        self._outage = Outage(options.max_outage)
        # run id -> when to extend its lease next, and until when to extend it at all
        self._extend_due: dict[str, tuple[float, float]] = {}
        self._extend_wake = threading.Event()  # a run joined the schedule, or the end came

    @property
    def stops(self) -> int:
        """How many times `stop` was called."""
        return self._stops

    def stop(self) -> None:
        """Ask the worker to stop; each further call is firmer (see the module docstring)."""
        self._stops += 1

    def run(self) -> Progress:
        """Work until done or stopped; returns the final `Progress` (``status`` tells why).

        A client error that makes further work impossible (the calibration was deleted, the
        token is refused, the server stays unreachable) ends the loop and is kept in `error`.
        """
        active: dict[str, threading.Thread] = {}
        next_lease = 0.0
        next_poll = 0.0
        finished = False
        killed = abandoned = False
        with self._extending():
            while True:
                self._collect(active)
                if self._stops >= 2 and not killed:
                    killed = True
                    self._terminate_all()
                if self._stops >= 3 and not abandoned:
                    abandoned = True
                    self.client.cancel()
                if abandoned or ((finished or self._stops or self.error) and not active):
                    break
                now = time.monotonic()
                can_lease = not (finished or self._stops or self.error)
                if can_lease and len(active) < self.options.jobs and now >= next_lease:
                    lease_wait = self._lease(active)
                    if lease_wait is None:
                        finished = self.progress.status in FINISHED
                        continue
                    next_lease = time.monotonic() + lease_wait
                if self.on_progress is not None and now >= next_poll and not self._stops:
                    next_poll = now + PROGRESS_POLL
                    self._poll()
                self._show_trouble()
                self._collect(active, wait=max(0.05, min(next_lease - time.monotonic(), 0.5)))
        self._show_trouble()
        self._update(running=len(active), stopping=bool(self._stops))
        if not self._stops and not self.error:
            self._poll()
        return self.progress

    # -- internals -----------------------------------------------------------------------

    def _stop_once(self, error: ClientError) -> None:
        """Keep the first setup error and stop, once however many runs meet one at the same
        moment: a second stop would terminate the commands that did start (checked and
        counted under a lock; 1 trial in 8 stopped twice with 11 runs refused at once)."""
        with self._stop_lock:
            self.error = self.error or error
            if not self._stops:
                self.stop()

    def _show_trouble(self) -> None:
        """Show whether, since when and why the client is retrying calls to the server."""
        since, why = self.client.trouble or (None, "")
        self._update(trouble_since=since, trouble=why)

    def _lease(self, active: dict[str, threading.Thread]) -> float | None:
        """Lease for the free slots and start them; seconds until the next try, or None."""
        free = self.options.jobs - len(active)
        try:
            lease = self.client.lease(
                self.calibration_id, free, self.name, self.options.lease_seconds
            )
        except TRANSIENT as exc:
            if self._outage.rides_out():  # down or failing for now: ask again later
                return self.options.max_idle_wait
            self.error = exc
            return None
        except ClientError as exc:
            self.error = exc
            return None
        self._outage.answered()
        self._update(status=lease.status)
        if self._stops and lease.runs:
            # Granted while the worker was stopping (the request was in flight or retrying):
            # not started, their leases expire and the points are handed out again.
            return None
        now = time.monotonic()
        # With --run-timeout the command is stopped then, which may take two grace periods
        # (SIGTERM, then SIGKILL to its group); the lease must last until its failure is in.
        timeout = self.options.run_timeout
        limit = timeout + 2 * KILL_GRACE if timeout else EXTEND_LIMIT
        schedule = (now + EXTEND_AFTER * self.options.lease_seconds, now + limit)
        for run in lease.runs:
            thread = threading.Thread(target=self._execute, args=(run,), daemon=True)
            active[str(run["run_id"])] = thread
            with self._lock:
                self._extend_due[str(run["run_id"])] = schedule
            thread.start()
        if lease.runs:
            self._extend_wake.set()
        self._update(running=len(active))
        if lease.runs:
            return 0.0
        if lease.status in FINISHED:
            return None
        hint = lease.retry_after if lease.retry_after is not None else 1.0
        return min(max(hint, 0.1), self.options.max_idle_wait)

    def _execute(self, run: Mapping[str, Any]) -> None:
        """Run one command and report it; always ends by queueing the run's outcome, so that
        the loop never waits for a run whose thread died."""
        run_id = str(run["run_id"])
        outcome, message = "error", ""
        try:
            result = self._run(run_id, run)
            self._extend_until_reported(run_id)
            if not result.started:
                self._stop_once(SettingsError(result.error or "cannot start"))
                return
            outcome, message = self._report(result)
        except OutputsMisfit as exc:
            # Every run of this command would be refused the same way: stop, as for a
            # command that cannot start, rather than spend the budget on failed runs.
            self._stop_once(exc)
        except ClientError as exc:
            if self.error is None:
                self.error = exc
        finally:
            with self._lock:
                self._extend_due.pop(run_id, None)
            self._finished.put((run_id, outcome, message))

    def _run(self, run_id: str, run: Mapping[str, Any]) -> RunResult:
        """`run_command`, with anything unexpected in it turned into the run's failure."""
        try:
            return run_command(
                self.options.command,
                run,
                self.options.run_timeout,
                started=lambda proc: self._register(run_id, proc),
                interrupted=lambda: self._stops >= 2,
            )
        except Exception as exc:  # a thread that dies unreported would hold the loop forever
            return RunResult(run_id, error=f"the worker failed to run the command: {exc!r}")
        finally:
            with self._lock:
                self._procs.pop(run_id, None)

    def _report(self, result: RunResult) -> tuple[str, str]:
        """Report one result; the outcome, and the failure message reported, if any."""
        cid, rid = self.calibration_id, result.run_id
        error = result.error or "failed"
        if result.outputs is not None:
            try:
                self.client.report(cid, rid, outputs=result.outputs)
                return "done", ""
            except PayloadTooLarge as exc:
                # Outputs of the spec's lengths are the same size for every run: over the
                # server's body limit for one, over it for all.
                raise OutputsMisfit(
                    f"the server refuses the command's outputs as too large ({exc}); every "
                    "run would fail the same way, so nothing was reported: raise the server's "
                    "body limit or shorten the observations"
                ) from None
            except ValidationFailed as exc:
                if _misshapen(exc):
                    raise OutputsMisfit(
                        f"the server refuses the command's outputs ({exc}); every run would "
                        "fail the same way, so nothing was reported: make the command write "
                        "each observation of the spec, with its number of values"
                    ) from None
                # A value the server cannot take (not finite, or far beyond the data): this
                # point failed.
                error = f"outputs refused by the server: {exc}"
            except Conflict:
                return "conflict", ""
        message = _shortened(error)
        try:
            self.client.report(cid, rid, error=message)
        except Conflict:
            return "conflict", ""
        return "failed", message

    def _extend_until_reported(self, run_id: str) -> None:
        """The command is over: its lease is extended, whatever the limit, until the result
        is in (a report the server is slow to take must not lose it meanwhile)."""
        with self._lock:
            if run_id in self._extend_due:
                self._extend_due[run_id] = (self._extend_due[run_id][0], math.inf)

    @contextlib.contextmanager
    def _extending(self) -> Iterator[None]:
        """While inside, a thread extends the leases of the runs in hand (`_extend_leases`)."""
        done = threading.Event()
        thread = threading.Thread(target=self._extend_leases, args=(done,), daemon=True)
        thread.start()
        try:
            yield
        finally:
            done.set()
            self._extend_wake.set()
            thread.join(EXTEND_JOIN)

    def _extend_leases(self, done: threading.Event) -> None:
        """Until ``done``, extend each run's lease once `EXTEND_AFTER` of it has passed."""
        while not done.is_set():
            now = time.monotonic()
            with self._lock:
                due = [rid for rid, (when, _) in self._extend_due.items() if when <= now]
                soonest = min((when for when, _ in self._extend_due.values()), default=now + 1.0)
            for run_id in due:
                if done.is_set():
                    return
                self._extend_one(run_id)
            if not due:
                self._extend_wake.wait(min(max(soonest - now, 0.01), 1.0))
                self._extend_wake.clear()

    def _extend_one(self, run_id: str) -> None:
        """Extend one run's lease (one try) and schedule the next extension. A server that
        is down or busy is asked again soon. Anything else leaves the lease alone (409: it is
        already over; 404: a server without extensions): extending is a courtesy, the run
        goes on, and its result is kept however late."""
        seconds = self.options.lease_seconds
        with self._lock:
            until = self._extend_due.get(run_id, (0.0, 0.0))[1]
        later: float | None = EXTEND_AFTER * seconds
        skipped = time.monotonic() >= until
        if not skipped:
            try:
                self.client.extend_lease(
                    self.calibration_id,
                    run_id,
                    seconds,
                    retry=False,
                    timeout=min(EXTEND_TIMEOUT, 0.25 * seconds),
                )
            except TRANSIENT:
                later = min(EXTEND_RETRY, 0.1 * seconds)
            except Exception:  # nothing here may end the thread: other runs' leases need it
                later = None
        with self._lock:
            entry = self._extend_due.get(run_id)
            if entry is None:
                return  # it finished meanwhile
            # Read again: the command may have ended meanwhile, lifting the limit (then a
            # skipped extension is due at once).
            now = time.monotonic()
            if later is None or now >= entry[1]:
                del self._extend_due[run_id]  # refused, or held as long as allowed
            else:
                self._extend_due[run_id] = (now + (0.0 if skipped else later), entry[1])

    def _register(self, run_id: str, proc: subprocess.Popen[bytes]) -> None:
        with self._lock:
            self._procs[run_id] = proc
        if self._stops >= 2:
            _terminate(proc)

    def _terminate_all(self) -> None:
        """Terminate every command at once: each may take its whole grace period."""
        with self._lock:
            procs = list(self._procs.values())
        threads = [threading.Thread(target=_terminate, args=(p,), daemon=True) for p in procs]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()

    def _collect(self, active: dict[str, threading.Thread], wait: float = 0.0) -> None:
        """Count the runs reported since the last call, waiting up to ``wait`` s for one."""
        changed = False
        while True:
            try:
                run_id, outcome, message = (
                    self._finished.get(timeout=wait) if wait else self._finished.get_nowait()
                )
            except queue.Empty:
                break
            wait = 0.0
            active.pop(run_id, None)
            changed = True
            if outcome == "done":
                self._update(done=self.progress.done + 1)
            elif outcome == "failed":
                self._update(failed=self.progress.failed + 1)
                if self.on_failure is not None:
                    self.on_failure(run_id, message)
        if changed:
            self._update(running=len(active), stopping=bool(self._stops))
        elif self._stops and not self.progress.stopping:
            self._update(stopping=True)

    def _poll(self) -> None:
        try:
            summary = self.client.posterior(self.calibration_id)
        except ClientError:
            return  # progress only: leasing and reporting surface real problems
        diagnostics = summary.get("diagnostics") or {}
        error = diagnostics.get("validation_error")
        self._update(
            round=summary.get("round"),
            validation_error=float(error) if isinstance(error, int | float) else None,
            status=str(summary.get("status") or self.progress.status),
        )

    def _update(self, **changes: Any) -> None:
        new = replace(self.progress, **changes)
        if new != self.progress:
            self.progress = new
            if self.on_progress is not None:
                self.on_progress(new)


class OutputsMisfit(SettingsError):
    """The server refused a command's outputs for their shape: a setup mistake."""


def _misshapen(exc: ValidationFailed) -> bool:
    """Whether a refusal is about the outputs' shape (an observation missing, unknown, not a
    list, or of the wrong length: located at ``outputs.<name>`` or above) rather than about
    one value (located at ``outputs.<name>.<index>``), which only that point's run gets."""
    for error in exc.errors:
        loc = [part for part in error.get("loc") or [] if part != "body"]
        if loc[:1] == ["outputs"] and len(loc) <= 2:
            return True
    return False


def _shortened(message: str) -> str:
    """A run's error message cut to `ERROR_CHARS`, keeping its start and its end."""
    if len(message) <= ERROR_CHARS:
        return message
    marker = f" [... {len(message)} characters in all ...] "
    keep = (ERROR_CHARS - len(marker)) // 2
    return message[:keep] + marker + message[-keep:]


def _text(value: Any) -> str:
    if isinstance(value, float):
        return repr(value)
    return str(value)


def _wait(
    proc: subprocess.Popen[bytes], timeout: float | None, interrupted: Callable[[], bool]
) -> str | None:
    """Wait for the command; None when it exited with status 0, else why it failed."""
    try:
        code = proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        _terminate(proc)
        return f"timed out after {timeout:g} s (--run-timeout)"
    if code == 0:
        return None
    if interrupted():
        return "interrupted: the worker was stopped before the command finished"
    if code < 0:
        try:
            name = signal.Signals(-code).name
        except ValueError:
            name = f"signal {-code}"
        return f"the command was killed by {name}"
    return f"the command exited with status {code}"


def _terminate(proc: subprocess.Popen[bytes]) -> None:
    """SIGTERM to the command's process group, SIGKILL to whatever of it lingers.

    The group outlives its leader when the command started children of its own, so the
    whole group is waited for, not only the process we started.
    """
    if proc.poll() is not None:
        return
    try:
        os.killpg(proc.pid, signal.SIGTERM)
    except ProcessLookupError:
        proc.wait()
        return
    deadline = time.monotonic() + KILL_GRACE
    while _group_alive(proc) and time.monotonic() < deadline:
        time.sleep(0.02)
    if _group_alive(proc):
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    while _group_alive(proc) and time.monotonic() < deadline + KILL_GRACE:
        time.sleep(0.02)


def _group_alive(proc: subprocess.Popen[bytes]) -> bool:
    """Whether any process of the command's group is still running (zombies excluded)."""
    proc.poll()
    try:
        os.killpg(proc.pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return _group_has_live_member(proc.pid)


def _group_has_live_member(pgid: int) -> bool:
    """Scan /proc for a member of the group that is not a zombie; True where /proc is absent."""
    proc_dir = Path("/proc")
    if not proc_dir.is_dir():
        return True
    for entry in proc_dir.iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if int(fields[2]) == pgid and fields[0] != "Z":
            return True
    return False


def _read_outputs(path: Path) -> tuple[dict[str, list[float]] | None, str]:
    """Parse and check an outputs file: (outputs, "") or (None, why it is unusable)."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None, "the command wrote no outputs file (the path is in HONING_OUTPUTS)"
    except (OSError, UnicodeDecodeError) as exc:
        return None, f"cannot read the outputs file: {exc}"

    def no_constants(name: str) -> float:
        raise ValueError(f"{name} is not allowed")

    try:
        data = json.loads(text, parse_constant=no_constants)
    except ValueError as exc:
        return None, f"the outputs file is not valid JSON ({exc})"
    if not isinstance(data, dict) or not data:
        return None, "the outputs file must hold a JSON object {observation name: [numbers]}"
    outputs: dict[str, list[float]] = {}
    for name, values in data.items():
        if not isinstance(values, list):
            return None, f"outputs[{name!r}] must be a list of numbers"
        for i, v in enumerate(values):
            if not _finite_number(v):
                shown = repr(v) if len(repr(v)) <= 40 else repr(v)[:37] + "..."
                return None, f"outputs[{name!r}][{i}] is not a finite number: {shown}"
        outputs[str(name)] = [float(v) for v in values]
    return outputs, ""


def _finite_number(value: Any) -> bool:
    """A JSON number a float holds finitely (an integer of 400 digits does not)."""
    if not isinstance(value, int | float) or isinstance(value, bool):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:
        return False


def _tail(path: Path) -> str:
    try:
        with path.open("rb") as f:
            f.seek(0, os.SEEK_END)
            size = f.tell()
            f.seek(max(0, size - 4 * STDERR_TAIL))
            raw = f.read()
    except OSError:
        return ""
    text = raw.decode("utf-8", errors="replace").strip()
    return text[-STDERR_TAIL:]
