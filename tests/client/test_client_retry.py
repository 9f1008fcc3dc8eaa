from __future__ import annotations

import json
import random
from collections.abc import Callable, Iterator
from datetime import UTC, datetime

import httpx
import pytest

from honing.client import (
    Client,
    Conflict,
    ConnectionFailed,
    Forbidden,
    NotFound,
    RateLimited,
    RetryPolicy,
    ServerError,
    ValidationFailed,
)
from honing.client._client import parse_retry_after

Responder = Callable[[httpx.Request], httpx.Response]


def problem(status: int, title: str, detail: str = "", **extra: object) -> httpx.Response:
    body = {"type": "about:blank", "title": title, "status": status, "detail": detail, **extra}
    return httpx.Response(status, json=body, headers={"Content-Type": "application/problem+json"})


def scripted(*steps: Responder | httpx.Response | Exception) -> tuple[Responder, list]:
    """A handler that plays ``steps`` in order (the last one repeats) and records requests."""
    seen: list[httpx.Request] = []
    queue: Iterator = iter(steps)
    last: list = [None]

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        step = next(queue, last[0])
        last[0] = step
        if isinstance(step, Exception):
            raise step
        if isinstance(step, httpx.Response):
            return step
        return step(request)

    return handler, seen


def make_client(handler: Responder, attempts: int = 3, **kwargs: object) -> tuple[Client, list]:
    waits: list[float] = []
    client = Client(
        "http://honing.test",
        "tok-1",
        transport=httpx.MockTransport(handler),
        retry=RetryPolicy(attempts=attempts, backoff=0.5, max_backoff=4.0),
        sleep=waits.append,
        **kwargs,  # type: ignore[arg-type]
    )
    return client, waits


OK_CAL = httpx.Response(200, json={"id": "c1", "status": "collecting", "round": 0})
ACK = httpx.Response(200, json={"run_id": "r1", "state": "done", "trust": 0.9})


def test_retry_after_seconds_is_honoured() -> None:
    # RFC 9110, section 10.2.3: Retry-After as delay-seconds.
    handler, seen = scripted(
        httpx.Response(503, headers={"Retry-After": "7"}, json={"title": "Busy", "status": 503}),
        OK_CAL,
    )
    client, waits = make_client(handler)
    assert client.calibration("c1")["status"] == "collecting"
    assert waits == [7.0]
    assert len(seen) == 2


def test_retry_after_on_429_for_a_post() -> None:
    handler, seen = scripted(
        httpx.Response(429, headers={"Retry-After": "3"}, json={"title": "Slow down"}),
        httpx.Response(201, json={"id": "c2", "token": "t", "status": "collecting"}),
    )
    client, waits = make_client(handler)
    assert client.create({"name": "x"})["id"] == "c2"
    assert waits == [3.0]
    assert len(seen) == 2


def test_retry_after_http_date() -> None:
    # RFC 9110, section 10.2.3 example: "Retry-After: Fri, 31 Dec 1999 23:59:59 GMT".
    now = datetime(1999, 12, 31, 23, 59, 0, tzinfo=UTC)
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now) == 59.0
    assert parse_retry_after("120") == 120.0
    assert parse_retry_after("Fri, 31 Dec 1999 23:58:00 GMT", now) == 0.0
    assert parse_retry_after("soon") is None
    assert parse_retry_after(None) is None


def test_long_retry_after_is_capped() -> None:
    handler, _ = scripted(
        httpx.Response(503, headers={"Retry-After": "86400"}, json={"title": "Down"}), OK_CAL
    )
    client, waits = make_client(handler)
    client.calibration("c1")
    assert waits == [client.retry.max_retry_after]


def test_report_is_retried_until_acknowledged() -> None:
    # Far more failures than the ordinary attempt limit: a finished run is never dropped.
    failures = [httpx.ConnectError("connection refused")] * 6 + [
        httpx.Response(502, text="<html>bad gateway</html>"),
        httpx.Response(503, json={"title": "Unavailable"}, headers={"Retry-After": "1"}),
        httpx.ReadTimeout("no answer"),
    ]
    handler, seen = scripted(*failures, ACK)
    client, waits = make_client(handler, attempts=3)
    answer = client.report("c1", "r1", outputs={"y": [1.0, 2.0]})
    assert answer["state"] == "done"
    assert len(seen) == len(failures) + 1
    assert len(waits) == len(failures)
    assert {r.method for r in seen} == {"PUT"}
    assert all(json.loads(r.content) == {"outputs": {"y": [1.0, 2.0]}} for r in seen)
    assert waits[7] == 1.0, "Retry-After of the 503 honoured"


def test_report_conflict_is_not_retried() -> None:
    handler, seen = scripted(problem(409, "Conflict", "run 'r1' already has a different result"))
    client, waits = make_client(handler)
    with pytest.raises(Conflict, match="already has a different result"):
        client.report("c1", "r1", error="solver diverged")
    assert len(seen) == 1 and waits == []


def test_report_needs_exactly_one_of_outputs_and_error() -> None:
    client, _ = make_client(scripted(ACK)[0])
    with pytest.raises(ValueError, match="exactly one"):
        client.report("c1", "r1")
    with pytest.raises(ValueError, match="exactly one"):
        client.report("c1", "r1", outputs={"y": [1.0]}, error="x")


def test_get_gives_up_after_the_attempt_limit() -> None:
    handler, seen = scripted(httpx.Response(502, text="<html><body>Bad Gateway</body></html>"))
    client, waits = make_client(handler, attempts=4)
    with pytest.raises(ServerError) as caught:
        client.posterior("c1")
    assert len(seen) == 4 and len(waits) == 3
    assert "\n" not in str(caught.value)
    assert "Bad Gateway" in str(caught.value)


def test_waits_grow_and_stay_capped() -> None:
    policy = RetryPolicy(backoff=0.5, max_backoff=4.0)
    rng = random.Random(1)
    for attempt in range(10):
        base = min(4.0, 0.5 * 2**attempt)
        delay = policy.delay(attempt, rng)
        assert base / 2 <= delay <= base, (attempt, delay)


def test_create_is_not_repeated_once_the_request_may_have_arrived() -> None:
    # A read timeout after sending could mean the calibration exists already: no retry.
    handler, seen = scripted(httpx.ReadTimeout("no answer"))
    client, _ = make_client(handler)
    with pytest.raises(ConnectionFailed, match=r"cannot reach http://honing\.test"):
        client.create({"name": "x"})
    assert len(seen) == 1


def test_create_is_repeated_when_the_connection_failed() -> None:
    handler, seen = scripted(
        httpx.ConnectError("refused"),
        httpx.Response(201, json={"id": "c3", "token": "t", "status": "collecting"}),
    )
    client, _ = make_client(handler)
    assert client.create({"name": "x"})["id"] == "c3"
    assert len(seen) == 2


def test_create_500_is_not_repeated() -> None:
    handler, seen = scripted(problem(500, "Internal Server Error", "store failed"))
    client, _ = make_client(handler)
    with pytest.raises(ServerError):
        client.create({"name": "x"})
    assert len(seen) == 1


def test_lease_is_repeated_on_a_lost_answer_and_reads_the_hint() -> None:
    handler, seen = scripted(
        httpx.ReadTimeout("no answer"),
        httpx.Response(200, json={"runs": [], "status": "fitting"}, headers={"Retry-After": "2"}),
    )
    client, _ = make_client(handler)
    lease = client.lease("c1", count=3, worker="w1", lease_seconds=60)
    assert lease.runs == [] and lease.status == "fitting" and lease.retry_after == 2.0
    assert json.loads(seen[0].content) == {"count": 3, "worker": "w1", "lease_seconds": 60}


def test_rate_limited_after_the_attempt_limit() -> None:
    handler, _ = scripted(httpx.Response(429, json={"title": "Too Many Requests"}))
    client, _ = make_client(handler, attempts=2)
    with pytest.raises(RateLimited):
        client.runs("c1")


@pytest.mark.parametrize(
    ("status", "error"),
    [(404, NotFound), (403, Forbidden), (422, ValidationFailed), (400, ValidationFailed)],
)
def test_problem_documents_map_to_error_classes(status: int, error: type) -> None:
    handler, _ = scripted(problem(status, "Refused", "because"))
    client, _ = make_client(handler)
    with pytest.raises(error) as caught:
        client.calibration("c1")
    assert caught.value.status == status
    assert str(caught.value) == f"Refused ({status}): because"


def test_validation_errors_are_listed_on_one_line() -> None:
    handler, _ = scripted(
        problem(
            422,
            "Invalid outputs",
            "the outputs do not fit the spec",
            errors=[
                {"loc": ["body", "outputs", "y"], "msg": "expected 4 values, got 3"},
                {"loc": ["body", "outputs", "z"], "msg": "unknown observation 'z'"},
            ],
        )
    )
    client, _ = make_client(handler)
    with pytest.raises(ValidationFailed) as caught:
        client.report("c1", "r1", outputs={"y": [1.0, 2.0, 3.0]})
    text = str(caught.value)
    assert "\n" not in text
    assert "outputs.y: expected 4 values, got 3" in text
    assert "outputs.z: unknown observation 'z'" in text
    assert len(caught.value.errors) == 2


def test_tokens_go_where_they_belong() -> None:
    handler, seen = scripted(
        httpx.Response(201, json={"id": "c", "token": "t", "status": "collecting"}), OK_CAL
    )
    client, _ = make_client(handler, admin_key="admin-1")
    client.create({"name": "x"})
    client.calibration("c")
    assert seen[0].headers["Authorization"] == "Bearer admin-1"
    assert seen[1].headers["Authorization"] == "Bearer tok-1"
    assert seen[1].url.path == "/v1/calibrations/c"


def test_ids_are_quoted_into_one_path_segment() -> None:
    handler, seen = scripted(OK_CAL)
    client, _ = make_client(handler)
    client.calibration("../admin")
    assert seen[0].url.raw_path == b"/v1/calibrations/..%2Fadmin"


def test_settings_come_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HONING_URL", "http://example.test:9000/")
    monkeypatch.setenv("HONING_TOKEN", "env-token")
    client = Client()
    assert client.url == "http://example.test:9000"
    assert client.token == "env-token"
    assert Client("http://other.test", "given").token == "given"
    client.close()


def test_cancel_ends_persistent_retries() -> None:
    handler, seen = scripted(httpx.ConnectError("refused"))
    waits: list[float] = []
    client = Client(
        "http://honing.test", "t", transport=httpx.MockTransport(handler), sleep=waits.append
    )

    def sleep_then_cancel(seconds: float) -> None:
        waits.append(seconds)
        if len(waits) == 5:
            client.cancel()

    client._sleep = sleep_then_cancel
    with pytest.raises(ConnectionFailed):
        client.report("c1", "r1", error="x")
    assert len(seen) == 5
