"""A small typed client over one `httpx.Client` for every endpoint of the honing HTTP API."""

from __future__ import annotations

import email.utils
import math
import os
import random
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any
from urllib.parse import quote

import httpx

from honing.client.errors import (
    ConnectionFailed,
    ProblemError,
    RateLimited,
    ServerError,
    SettingsError,
    problem_from_response,
)

__all__ = [
    "DEFAULT_URL",
    "FINISHED",
    "MAX_OUTAGE",
    "TRANSIENT",
    "Client",
    "Lease",
    "Outage",
    "RetryPolicy",
]

#: Where a server started with ``honing serve`` and no options listens.
DEFAULT_URL = "http://127.0.0.1:8750"

#: Calibration states after which no more work is handed out.
FINISHED = frozenset({"converged", "budget_exhausted", "failed"})

_IDEMPOTENT = frozenset({"GET", "HEAD", "PUT", "DELETE"})
#: Errors a long-lived loop (a worker, a wait) rides out: the server is down, restarting or
#: overloaded, and each call has already retried for a few seconds.
TRANSIENT = (ConnectionFailed, ServerError, RateLimited)
#: Seconds of such errors in a row after which a long-lived loop gives up (a restart or a
#: failover takes well under this).
MAX_OUTAGE = 300.0


@dataclass
class Outage:
    """How long a server has been failing a long-lived loop, and whether to go on waiting.

    Only a server that answered once is waited for: one that never did is a wrong address
    or token, and its first error is the answer.
    """

    limit: float = MAX_OUTAGE
    clock: Callable[[], float] = time.monotonic
    since: float | None = None
    reached: bool = False

    def answered(self) -> None:
        """The server answered: any outage is over."""
        self.since, self.reached = None, True

    def rides_out(self) -> bool:
        """After a `TRANSIENT` error: whether to try again rather than give up."""
        now = self.clock()
        self.since = now if self.since is None else self.since
        return self.reached and now - self.since < self.limit


@dataclass(frozen=True)
class RetryPolicy:
    """How often and how patiently a call is repeated.

    Connection errors, 429 and 5xx answers are retried (a POST only when the request
    surely never reached the server, or on 429/503). Waits grow from ``backoff`` by a
    factor of two up to ``max_backoff``, with jitter; a ``Retry-After`` header is honoured
    up to ``max_retry_after`` seconds. Persistent calls (reporting a result) retry until
    acknowledged, however many attempts that takes.
    """

    attempts: int = 5
    backoff: float = 0.5
    max_backoff: float = 30.0
    max_retry_after: float = 300.0

    def delay(self, attempt: int, rng: random.Random) -> float:
        """Wait before retry number ``attempt`` (0-based) when the server gave no hint."""
        base = min(self.max_backoff, self.backoff * 2.0**attempt)
        return base * (0.5 + 0.5 * rng.random())


@dataclass(frozen=True)
class Lease:
    """The answer to a lease request: runs to evaluate, the calibration's status, a hint."""

    runs: list[dict[str, Any]]
    status: str
    retry_after: float | None = None


def parse_retry_after(value: str | None, now: datetime | None = None) -> float | None:
    """Seconds to wait from a ``Retry-After`` header (delta seconds or an HTTP date)."""
    if value is None or not value.strip():
        return None
    value = value.strip()
    try:
        seconds = float(value)
    except ValueError:
        try:
            when = email.utils.parsedate_to_datetime(value)
        except (TypeError, ValueError):
            return None
        if when.tzinfo is None:
            when = when.replace(tzinfo=UTC)
        seconds = (when - (now or datetime.now(UTC))).total_seconds()
    if not math.isfinite(seconds):
        return None
    return max(0.0, seconds)


class Client:
    """Typed access to a honing server.

    Parameters
    ----------
    url
        Base URL of the server; default ``$HONING_URL`` or ``http://127.0.0.1:8750``.
    token
        Calibration token sent as ``Authorization: Bearer``; default ``$HONING_TOKEN``.
    admin_key
        Key for creating calibrations on a server started with one; default ``$HONING_ADMIN_KEY``.
    transport
        An `httpx.BaseTransport` to use instead of the network (tests use `httpx.MockTransport`).
    timeout
        Seconds for connecting and for each read.
    retry
        The `RetryPolicy`.
    sleep
        Function used to wait between retries (tests pass a recorder).
    """

    def __init__(
        self,
        url: str | None = None,
        token: str | None = None,
        *,
        admin_key: str | None = None,
        transport: httpx.BaseTransport | None = None,
        timeout: float = 60.0,
        retry: RetryPolicy | None = None,
        sleep: Callable[[float], None] | None = None,
    ) -> None:
        self.url = (url or os.environ.get("HONING_URL") or DEFAULT_URL).rstrip("/")
        if not self.url.startswith(("http://", "https://")):
            raise SettingsError(f"the server URL must start with http:// or https://: {self.url}")
        self.token = token or os.environ.get("HONING_TOKEN") or None
        self.admin_key = admin_key or os.environ.get("HONING_ADMIN_KEY") or None
        self.retry = retry or RetryPolicy()
        #: Since when (time.time) and why calls are being retried, or None once the server
        #: answers: a long-lived caller can say why it is waiting.
        self.trouble: tuple[float, str] | None = None
        self._cancelled = threading.Event()
        self._sleep = sleep or self._cancellable_sleep
        self._rng = random.Random()
        self._http = httpx.Client(
            base_url=self.url,
            transport=transport,
            timeout=httpx.Timeout(timeout),
            headers={"User-Agent": "honing-client", "Accept": "application/json"},
        )

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection pool."""
        self._http.close()

    def cancel(self) -> None:
        """Stop waiting: calls that are retrying give up with `ConnectionFailed`."""
        self._cancelled.set()

    # -- service -------------------------------------------------------------------------

    def health(self) -> dict[str, Any]:
        """``GET /healthz``."""
        return self._json("GET", "/healthz", auth=None)

    def metrics(self) -> str:
        """``GET /metrics`` in Prometheus text format."""
        return self._request("GET", "/metrics", auth=None).text

    # -- calibrations --------------------------------------------------------------------

    def create(self, spec: Mapping[str, Any]) -> dict[str, Any]:
        """Create a calibration; returns ``{"id", "token", "status"}``.

        The answer's token is not kept: set ``client.token`` to work on the new calibration.
        """
        return self._json("POST", "/v1/calibrations", json=dict(spec), auth="admin")

    def calibration(self, calibration_id: str) -> dict[str, Any]:
        """Spec, status, run counts and round of one calibration."""
        return self._json("GET", _path(calibration_id))

    def raise_budget(self, calibration_id: str, max_runs: int) -> dict[str, Any]:
        """Raise the run budget; a calibration the old budget stopped collects again.
        Returns the calibration as `calibration` does."""
        body = {"budget": {"max_runs": max_runs}}
        return self._json("PATCH", _path(calibration_id), json=body)

    def delete(self, calibration_id: str) -> None:
        """Delete a calibration with all its runs."""
        self._request("DELETE", _path(calibration_id))

    # -- runs ----------------------------------------------------------------------------

    def lease(
        self,
        calibration_id: str,
        count: int = 1,
        worker: str | None = None,
        lease_seconds: float | None = None,
    ) -> Lease:
        """Lease up to ``count`` points to evaluate.

        Retried on connection errors too: a lease that was granted but whose answer was
        lost only expires on the server and its point is handed out again.
        """
        body: dict[str, Any] = {"count": count}
        if worker is not None:
            body["worker"] = worker
        if lease_seconds is not None:
            body["lease_seconds"] = lease_seconds
        response = self._request(
            "POST", _path(calibration_id, "runs"), json=body, retry_unsafe=True
        )
        data = _object(response, _path(calibration_id, "runs"))
        return Lease(
            runs=list(data.get("runs") or []),
            status=str(data.get("status", "")),
            retry_after=parse_retry_after(response.headers.get("Retry-After")),
        )

    def extend_lease(
        self,
        calibration_id: str,
        run_id: str,
        lease_seconds: float | None = None,
        *,
        retry: bool = True,
        timeout: float | None = None,
    ) -> dict[str, Any]:
        """Keep a leased run for ``lease_seconds`` more from now (the server's lease time by
        default); `Conflict` once its lease is over. Extending again is harmless, so it is
        retried like any PUT; ``retry=False`` tries once and ``timeout`` (seconds) bounds the
        try, for a caller that keeps its own schedule (the worker)."""
        body: dict[str, Any] = {}
        if lease_seconds is not None:
            body["lease_seconds"] = lease_seconds
        path = _path(calibration_id, "runs", run_id, "lease")
        attempts = None if retry else 1
        return self._json("PUT", path, json=body, attempts=attempts, timeout=timeout)

    def report(
        self,
        calibration_id: str,
        run_id: str,
        outputs: Mapping[str, Sequence[float]] | None = None,
        error: str | None = None,
        *,
        persistent: bool = True,
    ) -> dict[str, Any]:
        """Report one run's ``outputs`` or its ``error``; returns ``{"run_id", "state", "trust"}``.

        The call is idempotent, so by default it is retried until the server acknowledges
        it (connection errors, 429 and 5xx); answers such as 409 or 422 are raised at once.
        """
        if (outputs is None) == (error is None):
            raise ValueError("give exactly one of outputs and error")
        body: dict[str, Any] = (
            {"outputs": {k: list(v) for k, v in outputs.items()}}
            if outputs is not None
            else {"error": error}
        )
        return self._json(
            "PUT", _path(calibration_id, "runs", run_id), json=body, persistent=persistent
        )

    def import_runs(self, calibration_id: str, runs: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
        """Add runs evaluated elsewhere (``[{"parameters", "outputs"}]``); all or nothing."""
        return self._json(
            "POST", _path(calibration_id, "runs", "import"), json={"runs": [dict(r) for r in runs]}
        )

    def runs(self, calibration_id: str, state: str | None = None) -> list[dict[str, Any]]:
        """Every run with parameters, outputs, state and trust (``state`` filters)."""
        params = {"state": state} if state else None
        return list(self._json("GET", _path(calibration_id, "runs"), params=params)["runs"])

    def runs_csv(self, calibration_id: str, state: str | None = None) -> str:
        """The runs table as CSV text."""
        params = {"format": "csv", **({"state": state} if state else {})}
        return self._request("GET", _path(calibration_id, "runs"), params=params).text

    # -- results -------------------------------------------------------------------------

    def posterior(self, calibration_id: str) -> dict[str, Any]:
        """The latest posterior summary and diagnostics."""
        return self._json("GET", _path(calibration_id, "posterior"))

    def samples(self, calibration_id: str, count: int = 1000) -> dict[str, Any]:
        """``count`` posterior draws: ``{"names": [...], "samples": [[...], ...]}``."""
        return self._json(
            "GET", _path(calibration_id, "posterior", "samples"), params={"count": count}
        )

    def samples_csv(self, calibration_id: str, count: int = 1000) -> str:
        """``count`` posterior draws as CSV text."""
        params = {"count": count, "format": "csv"}
        return self._request(
            "GET", _path(calibration_id, "posterior", "samples"), params=params
        ).text

    def report_html(self, calibration_id: str) -> str:
        """The self-contained HTML report."""
        return self._request(
            "GET", _path(calibration_id, "report"), headers={"Accept": "text/html"}
        ).text

    def wait(
        self,
        calibration_id: str,
        timeout: float | None = None,
        interval: float = 2.0,
        clock: Callable[[], float] = time.monotonic,
        max_outage: float = MAX_OUTAGE,
    ) -> dict[str, Any]:
        """Poll until the calibration's status is final or ``timeout`` seconds pass.

        Returns the last calibration document; its ``status`` tells which happened. A server
        that answered once and then becomes unreachable or fails (`TRANSIENT` errors) is
        polled on for up to ``max_outage`` seconds, as a restart takes, and its error raised
        after that; one that never answered (a wrong address, say) fails at once.
        """
        deadline = None if timeout is None else clock() + timeout
        outage = Outage(max_outage, clock)
        while True:
            try:
                info = self.calibration(calibration_id)
                outage.answered()
            except TRANSIENT:
                if not outage.rides_out():
                    raise
            if info.get("status") in FINISHED:
                return info
            if deadline is not None and clock() >= deadline:
                return info
            pause = interval if deadline is None else min(interval, max(0.0, deadline - clock()))
            self._sleep(pause)
            if self._cancelled.is_set():
                return info

    # -- plumbing ------------------------------------------------------------------------

    def _json(self, method: str, path: str, **kwargs: Any) -> dict[str, Any]:
        return _object(self._request(method, path, **kwargs), path)

    def _request(
        self,
        method: str,
        path: str,
        *,
        json: Any = None,
        params: Mapping[str, Any] | None = None,
        headers: Mapping[str, str] | None = None,
        auth: str | None = "token",
        persistent: bool = False,
        retry_unsafe: bool = False,
        attempts: int | None = None,
        timeout: float | None = None,
    ) -> httpx.Response:
        request_headers = dict(headers or {})
        secret = self.admin_key if auth == "admin" else self.token if auth == "token" else None
        if secret:
            request_headers["Authorization"] = f"Bearer {secret}"
        repeatable = method in _IDEMPOTENT or retry_unsafe
        attempt = 0
        while True:
            last_try = not persistent and attempt + 1 >= (attempts or self.retry.attempts)
            try:
                response = self._http.request(
                    method,
                    path,
                    json=json,
                    params=params,
                    headers=request_headers,
                    timeout=httpx.USE_CLIENT_DEFAULT if timeout is None else timeout,
                )
            except httpx.TransportError as exc:
                unsent = isinstance(exc, httpx.ConnectError | httpx.ConnectTimeout)
                if last_try or not (repeatable or unsent) or self._cancelled.is_set():
                    tries = attempt + 1
                    raise ConnectionFailed(
                        f"cannot reach {self.url} ({type(exc).__name__}: {exc or 'no detail'})"
                        + (f" after {tries} attempts" if tries > 1 else "")
                    ) from None
                wait = self.retry.delay(attempt, self._rng)
                trouble = f"cannot reach {self.url} ({type(exc).__name__})"
            else:
                status = response.status_code
                if status < 400:
                    self.trouble = None
                    return response
                hint = parse_retry_after(response.headers.get("Retry-After"))
                retryable = status in (429, 503) or (status >= 500 and repeatable)
                if not retryable:  # an answer, if a refusal: the server is there
                    self.trouble = None
                if last_try or not retryable or self._cancelled.is_set():
                    raise problem_from_response(response, hint)
                wait = (
                    min(hint, self.retry.max_retry_after)
                    if hint is not None
                    else self.retry.delay(attempt, self._rng)
                )
                trouble = f"the server answers {status}"
            self.trouble = (self.trouble[0] if self.trouble else time.time(), trouble)
            self._sleep(wait)
            if self._cancelled.is_set() and persistent:
                raise ConnectionFailed(f"gave up waiting for {self.url}: cancelled")
            attempt += 1

    def _cancellable_sleep(self, seconds: float) -> None:
        self._cancelled.wait(seconds)


def _object(response: httpx.Response, path: str) -> dict[str, Any]:
    """A successful answer's JSON object; anything else (a page from some other service at
    this address, say) is a `ProblemError` in one line."""
    try:
        data = response.json()
    except ValueError:  # not JSON, or not UTF-8
        data = None
    if not isinstance(data, dict):
        snippet = " ".join(response.text.split())[:80]
        raise ProblemError(
            response.status_code,
            "Unexpected answer",
            f"expected a JSON object from {path}, got {snippet!r}: is this a honing server?",
        )
    return data


def _path(calibration_id: str, *parts: str) -> str:
    segments = [quote(str(calibration_id), safe=""), *(quote(str(p), safe="") for p in parts)]
    return "/v1/calibrations/" + "/".join(segments)
