import json
from datetime import datetime

import pytest
from helpers_api import SPEC, AppClient, Calibration, FakeClock, create, lease, report, simulate
from test_api_auth import assert_problem

from honing.api import service as service_module
from honing.api.refitter import Refitter


def test_lease_expires_and_its_point_is_handed_out_again(
    client: AppClient, calibration: Calibration, clock: FakeClock
) -> None:
    (old,) = lease(client, calibration, lease_seconds=60)
    expires = datetime.fromisoformat(old["lease_expires_at"]).timestamp()
    assert abs(expires - (clock.now + 60)) < 0.01
    clock.now += 59
    (fresh,) = lease(client, calibration)
    assert fresh["parameters"] != old["parameters"]
    clock.now += 2
    (again,) = lease(client, calibration)
    assert again["parameters"] == old["parameters"] and again["run_id"] != old["run_id"]
    states = {
        r["run_id"]: r["state"]
        for r in client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    }
    assert states == {
        old["run_id"]: "expired",
        fresh["run_id"]: "leased",
        again["run_id"]: "leased",
    }


def test_late_result_of_an_expired_run_is_kept_and_both_count(
    client: AppClient, calibration: Calibration, clock: FakeClock
) -> None:
    (old,) = lease(client, calibration, lease_seconds=10)
    clock.now += 11
    (again,) = lease(client, calibration)
    assert report(client, calibration, old)["state"] == "done"
    assert report(client, calibration, again)["state"] == "done"
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert (info["runs_completed"], info["runs_leased"]) == (2, 0)


def test_report_after_expiry_without_a_new_lease_is_accepted(
    client: AppClient, calibration: Calibration, clock: FakeClock
) -> None:
    (run,) = lease(client, calibration, lease_seconds=5)
    clock.now += 6
    assert report(client, calibration, run)["state"] == "done"
    # No one else had the point: its result is in, so it is not handed out again (that
    # would spend a run of the budget on a point already evaluated).
    (after,) = lease(client, calibration)
    assert after["parameters"] != run["parameters"]
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert (info["runs_completed"], info["runs_leased"]) == (1, 1)


def test_empty_lease_says_when_to_come_back(client: AppClient, calibration: Calibration) -> None:
    handed = lease(client, calibration, 1000)
    # Round 0 proposes the initial design plus one batch of spares.
    assert len(handed) == SPEC["design"]["initial_runs"] + SPEC["design"]["batch_size"]
    response = client.post(
        f"{calibration.url}/runs", json={"count": 3}, headers=calibration.headers
    )
    assert response.json() == {"runs": [], "status": "collecting"}
    assert int(response.headers["retry-after"]) >= 1


def test_never_beyond_the_budget(client: AppClient) -> None:
    cal = create(client, {**SPEC, "budget": {"max_runs": 5}})
    runs = lease(client, cal, 100)
    assert len(runs) == 5
    report(client, cal, runs[0])
    assert lease(client, cal, 100) == []
    info = client.get(cal.url, headers=cal.headers).json()
    assert info["runs_completed"] + info["runs_failed"] + info["runs_leased"] == 5


def test_expired_runs_free_budget_for_their_points(client: AppClient, clock: FakeClock) -> None:
    cal = create(client, {**SPEC, "budget": {"max_runs": 2}})
    first = lease(client, cal, 5, lease_seconds=10)
    assert len(first) == 2
    clock.now += 11
    second = lease(client, cal, 5)
    assert [r["parameters"] for r in second] == [r["parameters"] for r in first]


def test_remembered_leases_keep_to_their_byte_budget(
    client: AppClient, refitter: Refitter, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Each remembered lease holds its prediction (every output value, base64): the cache is
    # bounded in bytes as well as in runs. Room for 2 here, with 24 characters each
    # (4 float32 outputs); runs it forgot are read back from the store when reported.
    monkeypatch.setattr(service_module, "_LEASED_CACHE_BYTES", 50)
    cal = create(client)
    for run in lease(client, cal, SPEC["design"]["initial_runs"]):
        report(client, cal, run)
    assert refitter.step() == ["written"]
    service = client.app.state.service  # type: ignore[attr-defined]
    runs = lease(client, cal, 4)
    assert len(service._leased) == 2 and service._leased_bytes == 48
    for run in runs:
        assert report(client, cal, run)["state"] == "done"
    assert len(service._leased) == 0 and service._leased_bytes == 0


def test_an_overdue_lease_reads_as_expired(client: AppClient, clock: FakeClock) -> None:
    # API.md: an overdue lease becomes "expired"; reads show it so without waiting for the
    # next lease or report to notice.
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=10)
    clock.now += 11
    info = client.get(cal.url, headers=cal.headers).json()
    assert info["runs_leased"] == 0
    (view,) = client.get(f"{cal.url}/runs", headers=cal.headers).json()["runs"]
    assert view["run_id"] == run["run_id"] and view["state"] == "expired"
    # its point is handed out again, and a late result is still kept
    (again,) = lease(client, cal, 1)
    assert again["parameters"] == run["parameters"] and again["run_id"] != run["run_id"]
    assert report(client, cal, run)["state"] == "done"


def test_leases_expired_by_a_report_are_counted_in_the_metrics(
    client: AppClient, clock: FakeClock
) -> None:
    # The honing_runs counter counts every lease that becomes "expired", whichever step
    # noticed it: here the report of another run, with no lease or read in between.
    cal = create(client)
    short, long = lease(client, cal, 1, lease_seconds=10)[0], lease(client, cal, 1)[0]
    clock.now += 11
    assert report(client, cal, long)["state"] == "done"
    text = client.get("/metrics").text
    assert 'honing_runs_total{state="expired"} 1.0' in text
    (view,) = [
        r
        for r in client.get(f"{cal.url}/runs", headers=cal.headers).json()["runs"]
        if r["run_id"] == short["run_id"]
    ]
    assert view["state"] == "expired"
    assert 'honing_runs_total{state="expired"} 1.0' in client.get("/metrics").text


def test_leasing_goes_on_while_a_refit_runs(
    client: AppClient, calibration: Calibration, refitter: Refitter
) -> None:
    runs = lease(client, calibration, SPEC["design"]["initial_runs"])
    for run in runs:
        report(client, calibration, run)
    store = client.app.state.store  # type: ignore[attr-defined]
    assert store.acquire_refit_lock(calibration.id, "someone-fitting", 60.0)
    response = client.post(
        f"{calibration.url}/runs", json={"count": 2}, headers=calibration.headers
    )
    assert response.json()["status"] == "fitting" and len(response.json()["runs"]) == 2
    assert refitter.step() == ["locked"]
    store.release_refit_lock(calibration.id, "someone-fitting")
    assert refitter.step() == ["written"]
    # The spares of round 0 that were leased meanwhile still take results.
    for run in response.json()["runs"]:
        assert report(client, calibration, run)["state"] == "done"


def test_trust_uses_the_prediction_stored_at_lease_time(
    client: AppClient, calibration: Calibration, refitter: Refitter
) -> None:
    for run in lease(client, calibration, SPEC["design"]["initial_runs"]):
        report(client, calibration, run)
    refitter.step()
    lease(client, calibration, SPEC["design"]["batch_size"])  # the round-0 spares
    (run,) = lease(client, calibration)
    good = report(client, calibration, run)["trust"]
    (other,) = lease(client, calibration)
    bad_outputs = {k: [v + 50.0 for v in vs] for k, vs in simulate(other["parameters"]).items()}
    response = client.put(
        f"{calibration.url}/runs/{other['run_id']}",
        json={"outputs": bad_outputs},
        headers=calibration.headers,
    )
    assert 0.0 < response.json()["trust"] < good <= 1.0
    stored = client.app.state.store.get_run(calibration.id, other["run_id"])  # type: ignore[attr-defined]
    assert stored.point["prediction"] is not None and stored.point["round"] == 1


def test_a_refit_that_keeps_failing_marks_the_calibration_failed(
    client: AppClient, calibration: Calibration, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    def broken(*args, **kwargs):  # type: ignore[no-untyped-def]
        raise FloatingPointError("singular system")

    monkeypatch.setattr("honing.api.refitter.refit", broken)
    refitter = Refitter(client.app.state.store, max_failures=2, retry_delay=0.0)  # type: ignore[attr-defined]
    for run in lease(client, calibration, SPEC["design"]["initial_runs"]):
        report(client, calibration, run)
    assert refitter.step() == ["retry"]
    assert client.get(calibration.url, headers=calibration.headers).json()["status"] == "fitting"
    assert refitter.step() == ["failed"]
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert info["status"] == "failed" and "singular system" in info["error"]
    response = client.post(
        f"{calibration.url}/runs", json={"count": 1}, headers=calibration.headers
    )
    assert response.json() == {"runs": [], "status": "failed"}
    assert refitter.step() == []


def test_a_dead_workers_job_is_retried_after_its_lock_expires(
    client: AppClient, calibration: Calibration, refitter: Refitter
) -> None:
    import time

    for run in lease(client, calibration, SPEC["design"]["initial_runs"]):
        report(client, calibration, run)
    store = client.app.state.store  # type: ignore[attr-defined]
    # A worker took the job and died: its lock stays until it expires.
    assert store.acquire_refit_lock(calibration.id, "dead-worker", 0.3)
    assert refitter.step() == ["locked"]
    while store.refit_queue_depth() and refitter.step() == ["locked"]:
        time.sleep(0.05)
    assert (
        client.get(f"{calibration.url}/posterior", headers=calibration.headers).json()["round"] == 1
    )


def test_a_stale_refit_never_overwrites_a_newer_state(
    client: AppClient, calibration: Calibration, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    from honing.engine import rounds

    store = client.app.state.store  # type: ignore[attr-defined]
    for run in lease(client, calibration, SPEC["design"]["initial_runs"]):
        report(client, calibration, run)

    def racing(spec, state, runs):  # type: ignore[no-untyped-def]
        new = rounds.refit(spec, state, runs)
        # Another worker (whose lock had lapsed) writes its newer state first.
        version, blob = store.load_state(calibration.id)
        assert store.swap_state(calibration.id, version, blob, 7, "collecting", [])
        written.append(blob)
        return new

    written: list[bytes] = []
    monkeypatch.setattr("honing.api.refitter.refit", racing)
    assert Refitter(store).step() == ["stale"]
    assert store.load_state(calibration.id) == (2, written[0])
    assert store.get_meta(calibration.id).round == 7


def test_renewed_lock_keeps_a_slow_refit_exclusive(
    client: AppClient, calibration: Calibration, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    from honing.engine import rounds

    store = client.app.state.store  # type: ignore[attr-defined]
    for run in lease(client, calibration, SPEC["design"]["initial_runs"]):
        report(client, calibration, run)
    seen = []

    def slow(spec, state, runs):  # type: ignore[no-untyped-def]
        import time

        new = rounds.refit(spec, state, runs)
        time.sleep(0.6)  # longer than the lock's ttl: only renewal keeps it
        seen.append(store.acquire_refit_lock(calibration.id, "intruder", 5.0))
        return new

    monkeypatch.setattr("honing.api.refitter.refit", slow)
    assert Refitter(store, lock_ttl=0.3).step() == ["written"]
    assert seen == [False]


def test_points_carry_json_only(client: AppClient, calibration: Calibration) -> None:
    (run,) = lease(client, calibration)
    stored = client.app.state.store.get_run(calibration.id, run["run_id"])  # type: ignore[attr-defined]
    assert json.loads(json.dumps(stored.point)) == stored.point
    assert_problem(
        client.get(f"{calibration.url}/runs/{run['run_id']}", headers=calibration.headers), 405
    )


# -- extending a lease (an extension of the HTTP contract) ---------------------------------


def _extend(client: AppClient, cal: Calibration, run_id: str, **body: object):  # type: ignore[no-untyped-def]
    return client.put(f"{cal.url}/runs/{run_id}/lease", json=body, headers=cal.headers)


def _states(client: AppClient, cal: Calibration) -> dict[str, str]:
    runs = client.get(f"{cal.url}/runs", headers=cal.headers).json()["runs"]
    return {r["run_id"]: r["state"] for r in runs}


def test_an_extended_lease_keeps_a_long_run(client: AppClient, clock: FakeClock) -> None:
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=60)
    for _ in range(3):  # 150 s in all: well past the first 60 s lease
        clock.now += 50
        answer = _extend(client, cal, run["run_id"], lease_seconds=60)
        assert answer.status_code == 200, answer.text
        body = answer.json()
        assert body["run_id"] == run["run_id"] and body["state"] == "leased"
        expires = datetime.fromisoformat(body["lease_expires_at"]).timestamp()
        assert abs(expires - (clock.now + 60)) < 0.01
    # Not handed out again: the next lease gets a fresh point.
    (other,) = lease(client, cal, 1)
    assert other["parameters"] != run["parameters"]
    assert _states(client, cal)[run["run_id"]] == "leased"
    assert report(client, cal, run)["state"] == "done"


def test_extending_without_seconds_uses_the_server_lease_time(
    client: AppClient, clock: FakeClock
) -> None:
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=10)
    body = _extend(client, cal, run["run_id"]).json()
    expires = datetime.fromisoformat(body["lease_expires_at"]).timestamp()
    assert abs(expires - (clock.now + client.app.state.settings.lease_seconds)) < 0.01


def test_an_overdue_lease_cannot_be_extended(client: AppClient, clock: FakeClock) -> None:
    # The lease ran out before the extension arrived: the run is expired (counted once) and its
    # point goes out again; the answer says so, and a late result is still kept.
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=10)
    clock.now += 11
    problem = assert_problem(_extend(client, cal, run["run_id"], lease_seconds=60), 409)
    assert "expired" in problem["detail"] and "handed out again" in problem["detail"]
    assert _states(client, cal)[run["run_id"]] == "expired"
    assert 'honing_runs_total{state="expired"} 1.0' in client.get("/metrics").text
    (again,) = lease(client, cal, 1)
    assert again["parameters"] == run["parameters"]
    assert report(client, cal, run)["state"] == "done"


def test_a_finished_run_cannot_be_extended(client: AppClient) -> None:
    cal = create(client)
    (run,) = lease(client, cal, 1)
    report(client, cal, run)
    problem = assert_problem(_extend(client, cal, run["run_id"], lease_seconds=60), 409)
    assert "result is in" in problem["detail"]


@pytest.mark.parametrize("run_id", ["r999", "nope"])
def test_extending_an_unknown_run_is_404(client: AppClient, run_id: str) -> None:
    cal = create(client)
    lease(client, cal, 1)
    assert_problem(_extend(client, cal, run_id, lease_seconds=60), 404)


@pytest.mark.parametrize("seconds", [0, 604801, "60", True])
def test_a_bad_extension_is_422_and_changes_nothing(
    client: AppClient, clock: FakeClock, seconds: object
) -> None:
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=10)
    problem = assert_problem(_extend(client, cal, run["run_id"], lease_seconds=seconds), 422)
    assert "lease_seconds" in json.dumps(problem)
    clock.now += 11  # the lease was not extended: it is overdue now
    assert _states(client, cal)[run["run_id"]] == "expired"


def test_an_extension_never_shortens_a_lease_and_stops_at_seven_days(
    client: AppClient, clock: FakeClock
) -> None:
    cal = create(client)
    (run,) = lease(client, cal, 1, lease_seconds=7200)
    leased = clock.now
    body = _extend(client, cal, run["run_id"], lease_seconds=60).json()
    assert (
        abs(datetime.fromisoformat(body["lease_expires_at"]).timestamp() - (leased + 7200)) < 0.01
    )
    # A run that hangs cannot hold its point for good: at most 7 days after it was leased.
    clock.now += 100
    body = _extend(client, cal, run["run_id"], lease_seconds=604800).json()
    week = leased + 604800
    assert abs(datetime.fromisoformat(body["lease_expires_at"]).timestamp() - week) < 0.01
    clock.now = week + 1
    assert _states(client, cal)[run["run_id"]] == "expired"


@pytest.mark.parametrize("route", ["lease", "extend"])
def test_bodies_are_read_after_the_calibration_and_the_token(client: AppClient, route: str) -> None:
    # API.md: an unknown calibration is 404 whatever token comes with it; a missing token is
    # 401. Neither depends on what the body holds.
    cal = create(client)
    path = "runs" if route == "lease" else "runs/r1/lease"
    method = client.post if route == "lease" else client.put
    bad = {"content": b"{not json", "headers": {"Content-Type": "application/json"}}
    unknown = method(
        f"/v1/calibrations/nope/{path}", **{**bad, "headers": {**bad["headers"], **cal.headers}}
    )  # type: ignore[dict-item]
    assert_problem(unknown, 404)
    assert_problem(method(f"{cal.url}/{path}", **bad), 401)  # type: ignore[arg-type]
    assert_problem(
        method(f"{cal.url}/{path}", **{**bad, "headers": {**bad["headers"], **cal.headers}}), 422
    )  # type: ignore[dict-item]


def test_a_body_with_a_byte_order_mark_is_read(client: AppClient) -> None:
    # RFC 8259 section 8.1: a parser may ignore a leading UTF-8 byte order mark; some clients
    # on Windows send one.
    cal = create(client)
    body = b"\xef\xbb\xbf" + json.dumps({"count": 1}).encode()
    headers = {**cal.headers, "Content-Type": "application/json"}
    answer = client.post(f"{cal.url}/runs", content=body, headers=headers)
    assert answer.status_code == 200, answer.text
    assert len(answer.json()["runs"]) == 1


def test_a_result_for_a_calibration_the_store_lost_says_the_calibration_is_gone(
    client: AppClient, calibration: Calibration
) -> None:
    # The store loses the calibration behind the service's back (deleted through another
    # replica, a Redis server restarted without persistence); the token is still cached.
    (run,) = lease(client, calibration)
    client.app.state.store.delete(calibration.id)  # type: ignore[attr-defined]
    response = client.put(
        f"{calibration.url}/runs/{run['run_id']}",
        json={"outputs": simulate(run["parameters"])},
        headers=calibration.headers,
    )
    assert response.status_code == 404
    assert response.json()["detail"] == f"calibration {calibration.id!r} does not exist"
