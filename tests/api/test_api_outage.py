import logging
import threading
import time

import pytest
from helpers_api import create, lease, make_client, report
from test_api_auth import assert_problem

from honing.api import refitter as refitter_module
from honing.api.settings import Settings
from honing.api.store.redis_store import RedisStore

#: Bounded wait for the client to reconnect after Redis is back (not a speed assertion).
RECONNECT_WAIT = 30.0


def test_redis_outage_is_503_with_retry_after_then_recovers(redis_factory) -> None:  # type: ignore[no-untyped-def]
    server = redis_factory(appendonly=True)
    with make_client(Settings(store_url=server.url)) as client:
        cal = create(client)
        first, second = lease(client, cal, 2)
        report(client, cal, first)
        server.stop()
        attempts = [
            client.get("/healthz"),
            client.get(cal.url, headers=cal.headers),
            client.post(f"{cal.url}/runs", json={"count": 1}, headers=cal.headers),
            client.put(
                f"{cal.url}/runs/{second['run_id']}", json={"error": "x"}, headers=cal.headers
            ),
            client.post(
                "/v1/calibrations", json={"name": "n", "parameters": [], "observations": []}
            ),
        ]
        for response in attempts[:4]:
            assert_problem(response, 503)
            assert int(response.headers["retry-after"]) >= 1
        # Bad input is still refused as bad input, not as an outage.
        assert_problem(attempts[4], 422)
        server.start()
        deadline = time.monotonic() + RECONNECT_WAIT
        while client.get("/healthz").status_code != 200:
            assert time.monotonic() < deadline, "did not reconnect to Redis"
            time.sleep(0.1)
        assert report(client, cal, second)["state"] == "done"
        info = client.get(cal.url, headers=cal.headers).json()
        assert (info["runs_completed"], info["runs_leased"]) == (2, 0)


def test_unreachable_redis_at_start_still_serves_503(unused_port) -> None:  # type: ignore[no-untyped-def]
    url = f"redis://127.0.0.1:{unused_port()}/0"
    with make_client(Settings(store_url=url)) as client:
        assert_problem(client.get("/healthz"), 503)
        response = client.post(
            "/v1/calibrations",
            json={
                "name": "n",
                "parameters": [{"name": "a", "prior": {"kind": "normal", "mean": 0, "sd": 1}}],
                "observations": [{"name": "y", "values": [1.0], "sd": 1.0}],
            },
        )
        assert_problem(response, 503)


def test_durability_warnings(
    redis_url: str, redis_factory, caplog: pytest.LogCaptureFixture
) -> None:  # type: ignore[no-untyped-def]
    # The session's server runs without AOF: that must be said loudly at start-up.
    with caplog.at_level(logging.WARNING, logger="honing"):
        with make_client(Settings(store_url=redis_url)):
            pass
    assert any("appendonly is off" in r.getMessage() for r in caplog.records)
    durable = RedisStore(redis_factory(appendonly=True).url)
    try:
        # AOF on, appendfsync always, noeviction: nothing to warn about.
        assert durable.startup_warnings() == []
    finally:
        durable.close()


def test_redis_out_of_memory_is_503_not_500(redis_url: str) -> None:
    import redis

    admin = redis.Redis.from_url(redis_url)
    with make_client(Settings(store_url=redis_url)) as client:
        cal = create(client)
        admin.config_set("maxmemory", "1")  # under noeviction every write is now refused
        try:
            response = client.post(f"{cal.url}/runs", json={"count": 1}, headers=cal.headers)
            assert_problem(response, 503)
            assert "retry-after" in response.headers
        finally:
            admin.config_set("maxmemory", "0")
            admin.close()
        assert len(lease(client, cal)) == 1


def test_a_refitter_logs_a_store_outage_when_it_begins_and_ends(
    unused_port, caplog, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    # Nothing listens on the port: every poll meets an unavailable store. The refitter used
    # to log a warning on every poll, twice a second, for as long as the outage lasted.
    monkeypatch.setattr(refitter_module, "OUTAGE_POLL", 0.0)
    store = RedisStore(f"redis://127.0.0.1:{unused_port()}/0")
    worker = refitter_module.Refitter(store)
    stop = threading.Event()
    polls = []
    step = worker.step

    def counted(limit: int = 16) -> list[str]:
        polls.append(1)
        if len(polls) == 6:
            monkeypatch.setattr(worker, "step", lambda limit=16: stop.set() or [])
        return step(limit)

    monkeypatch.setattr(worker, "step", counted)
    with caplog.at_level(logging.INFO, logger="honing.api.refitter"):
        worker.run_forever(stop, poll=0.0)
    messages = [r.getMessage() for r in caplog.records]
    assert len(polls) == 6
    assert messages == ["store unavailable", "store available again"]
