import csv
import io

import httpx
import pytest
from helpers_api import SPEC, AppClient, Calibration, create, lease, report, simulate

from honing.api.refitter import Refitter


def test_create_answers_id_token_status(client: AppClient) -> None:
    response = client.post("/v1/calibrations", json=SPEC)
    assert response.status_code == 201
    body = response.json()
    assert set(body) == {"id", "token", "status"} and body["status"] == "collecting"


def test_describe_has_spec_status_counts_round(client: AppClient, calibration: Calibration) -> None:
    body = client.get(calibration.url, headers=calibration.headers).json()
    assert body["status"] == "collecting" and body["round"] == 0
    assert (body["runs_completed"], body["runs_failed"], body["runs_leased"]) == (0, 0, 0)
    assert body["spec"]["design"] == {"initial_runs": 8, "batch_size": 4}
    assert body["spec"]["parameters"][1]["unit"] == "m"


def test_full_loop_to_convergence_or_budget(
    client: AppClient, calibration: Calibration, refitter: Refitter
) -> None:
    prior = client.get(f"{calibration.url}/posterior", headers=calibration.headers).json()
    assert prior["round"] == 0 and prior["status"] == "collecting"
    assert list(prior["parameters"]) == ["slope", "offset"]
    rounds = []
    for _ in range(12):
        runs = lease(client, calibration, 100)
        for run in runs:
            assert report(client, calibration, run)["state"] == "done"
        status = client.get(calibration.url, headers=calibration.headers).json()["status"]
        if status in ("converged", "budget_exhausted"):
            break
        # Every batch's worth of results queues a refit, and leasing stays open meanwhile.
        assert status == "fitting"
        assert refitter.step() == ["written"]
        posterior = client.get(f"{calibration.url}/posterior", headers=calibration.headers)
        rounds.append(posterior.json()["round"])
    assert rounds == list(range(1, len(rounds) + 1)) and rounds
    final = client.get(calibration.url, headers=calibration.headers).json()
    assert final["status"] in ("converged", "budget_exhausted"), final
    assert final["runs_completed"] <= SPEC["budget"]["max_runs"]
    # A finished calibration hands out nothing and promises nothing more.
    response = client.post(
        f"{calibration.url}/runs", json={"count": 5}, headers=calibration.headers
    )
    assert response.json() == {"runs": [], "status": final["status"]}
    assert "retry-after" not in response.headers
    posterior = client.get(f"{calibration.url}/posterior", headers=calibration.headers).json()
    slope = posterior["parameters"]["slope"]
    # The data are exactly slope 0.9, offset 0.2; allow four posterior sd either way.
    assert abs(slope["mean"] - 0.9) < 4 * slope["sd"], slope
    assert set(posterior["diagnostics"]) >= {"trust_mean", "validation_error", "converged"}
    assert set(posterior["predictive"]) == {"y", "z"}


def test_report_stores_outputs_and_trust(client: AppClient, calibration: Calibration) -> None:
    (run,) = lease(client, calibration, worker="w-7")
    answer = report(client, calibration, run)
    assert answer == {"run_id": run["run_id"], "state": "done", "trust": 1.0}
    (stored,) = client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    assert stored["outputs"] == simulate(run["parameters"])
    assert stored["parameters"] == run["parameters"] and stored["worker"] == "w-7"
    assert stored["leased_at"].endswith("Z") and stored["completed_at"].endswith("Z")
    assert stored["error"] is None and stored["state"] == "done"


def test_failed_report_keeps_the_error(client: AppClient, calibration: Calibration) -> None:
    (run,) = lease(client, calibration)
    response = client.put(
        f"{calibration.url}/runs/{run['run_id']}",
        json={"error": "solver diverged"},
        headers=calibration.headers,
    )
    assert response.json() == {"run_id": run["run_id"], "state": "failed", "trust": None}
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert (info["runs_failed"], info["runs_completed"]) == (1, 0)
    (failed,) = client.get(
        f"{calibration.url}/runs?state=failed", headers=calibration.headers
    ).json()["runs"]
    assert failed["error"] == "solver diverged" and failed["outputs"] is None


def test_runs_filter_and_csv(client: AppClient, calibration: Calibration) -> None:
    runs = lease(client, calibration, 3)
    report(client, calibration, runs[0])
    listed = client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    assert [r["state"] for r in listed] == ["done", "leased", "leased"]
    leased = client.get(f"{calibration.url}/runs?state=leased", headers=calibration.headers)
    assert [r["run_id"] for r in leased.json()["runs"]] == [r["run_id"] for r in runs[1:]]
    response = client.get(f"{calibration.url}/runs?format=csv", headers=calibration.headers)
    assert response.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(response.text)))
    assert [r["run_id"] for r in rows] == [r["run_id"] for r in runs]
    assert float(rows[0]["slope"]) == runs[0]["parameters"]["slope"]
    assert float(rows[0]["y[2]"]) == simulate(runs[0]["parameters"])["y"][2]
    assert rows[1]["y[0]"] == "" and rows[1]["state"] == "leased"


def test_samples_json_and_csv(client: AppClient, calibration: Calibration) -> None:
    body = client.get(
        f"{calibration.url}/posterior/samples?count=7", headers=calibration.headers
    ).json()
    assert body["names"] == ["slope", "offset"]
    assert len(body["samples"]) == 7 and all(len(row) == 2 for row in body["samples"])
    response = client.get(
        f"{calibration.url}/posterior/samples?count=5&format=csv", headers=calibration.headers
    )
    lines = response.text.strip().splitlines()
    assert lines[0] == "slope,offset" and len(lines) == 6
    assert [float(v) for v in lines[1].split(",")] == body["samples"][0]


def test_import_counts_as_completed(client: AppClient, calibration: Calibration) -> None:
    archive = [
        {
            "parameters": {"slope": s, "offset": 0.1},
            "outputs": simulate({"slope": s, "offset": 0.1}),
        }
        for s in (0.5, 1.0, 1.5)
    ]
    response = client.post(
        f"{calibration.url}/runs/import", json={"runs": archive}, headers=calibration.headers
    )
    assert response.status_code == 200 and response.json() == {"imported": 3}
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert info["runs_completed"] == 3
    runs = client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    assert [r["trust"] for r in runs] == [1.0, 1.0, 1.0]
    assert all(r["state"] == "done" and r["imported"] for r in runs)


def test_import_enough_runs_queues_a_refit(
    client: AppClient, calibration: Calibration, refitter: Refitter
) -> None:
    archive = [
        {"parameters": p, "outputs": simulate(p)}
        for p in ({"slope": 0.1 * i, "offset": 0.05 * i - 0.3} for i in range(1, 13))
    ]
    client.post(
        f"{calibration.url}/runs/import", json={"runs": archive}, headers=calibration.headers
    )
    assert client.get(calibration.url, headers=calibration.headers).json()["status"] == "fitting"
    assert refitter.step() == ["written"]
    posterior = client.get(f"{calibration.url}/posterior", headers=calibration.headers).json()
    assert posterior["round"] == 1
    assert posterior["runs_completed"] == posterior["runs_fitted"] == 12
    # A result that arrives after the fit counts at once; the posterior still rests on 12.
    one = {"slope": 0.7, "offset": 0.0}
    client.post(
        f"{calibration.url}/runs/import",
        json={"runs": [{"parameters": one, "outputs": simulate(one)}]},
        headers=calibration.headers,
    )
    posterior = client.get(f"{calibration.url}/posterior", headers=calibration.headers).json()
    assert (posterior["runs_completed"], posterior["runs_fitted"]) == (13, 12)


def test_delete_removes_everything(client: AppClient, calibration: Calibration) -> None:
    other = create(client)
    (run,) = lease(client, calibration)
    report(client, calibration, run)
    response = client.delete(calibration.url, headers=calibration.headers)
    assert response.status_code == 204 and response.content == b""
    assert client.get(calibration.url, headers=calibration.headers).status_code == 404
    assert client.delete(calibration.url, headers=calibration.headers).status_code == 404
    assert client.get(other.url, headers=other.headers).status_code == 200
    store = client.app.state.store  # type: ignore[attr-defined]
    assert store.list_runs(calibration.id) == [] and store.get_meta(calibration.id) is None


def test_delete_leaves_no_redis_key(redis_url: str) -> None:
    import redis
    from helpers_api import make_client

    from honing.api.settings import Settings

    with make_client(Settings(store_url=redis_url)) as client:
        cal = create(client)
        keep = create(client)
        for run in lease(client, cal, 3):
            report(client, cal, run)
        lease(client, cal, 2)
        client.delete(cal.url, headers=cal.headers)
    r = redis.Redis.from_url(redis_url)
    keys = [k.decode() for k in r.keys("*")]
    r.close()
    assert keys and not [k for k in keys if cal.id in k]
    assert all(f"{{{keep.id}}}" in k for k in keys)


def test_health_and_metrics(client: AppClient, settings) -> None:  # type: ignore[no-untyped-def]
    kind = "redis" if settings.store_url.startswith("redis") else "sqlite"
    assert client.get("/healthz").json() == {"status": "ok", "store": kind}
    cal = create(client)
    report(client, cal, lease(client, cal)[0])
    text = client.get("/metrics").text
    assert (
        'honing_http_requests_total{method="POST",route="/v1/calibrations",status="201"} 1.0'
        in text
    )
    assert 'honing_runs_total{state="done"} 1.0' in text
    assert "honing_refit_queue_depth 0.0" in text
    assert "honing_http_request_duration_seconds_bucket" in text


def _drive(client: AppClient, cal: Calibration, refitter: Refitter) -> dict:
    """Lease, run and report a batch at a time, each refit keeping up, until the calibration
    stops; its final description. (Workers that run more than a batch between refits fold
    several batches into one round.)"""
    for _ in range(30):
        for run in lease(client, cal, SPEC["design"]["batch_size"]):
            report(client, cal, run)
        info = client.get(cal.url, headers=cal.headers).json()
        if info["status"] in ("converged", "budget_exhausted"):
            return dict(info)
        refitter.step()
    raise AssertionError("the calibration did not stop")


def _budget(client: AppClient, cal: Calibration, max_runs: object) -> httpx.Response:
    return client.patch(cal.url, json={"budget": {"max_runs": max_runs}}, headers=cal.headers)


def test_a_spent_budget_says_how_to_go_on_and_that_way_works(
    client: AppClient, refitter: Refitter
) -> None:
    # 12 runs: the initial design and one batch, so round 2 spends the budget. Round 2
    # passed every check, so the warning asks for one more batch; raised to that, the
    # calibration collects again from where it stood and has its third round.
    cal = create(client, {**SPEC, "budget": {"max_runs": 12}})
    assert _drive(client, cal, refitter)["status"] == "budget_exhausted"
    before = client.get(f"{cal.url}/posterior", headers=cal.headers).json()
    (warning,) = [w for w in before["diagnostics"]["warnings"] if "budget spent" in w]
    assert "raise the budget to at least 16 runs" in warning  # 12 spent, a batch of 4
    assert "16 runs, a batch for the round the stop rule still needs if it passes" in warning
    # The same advice, structured (an extension), for scripts: the budget and the reasons.
    diagnostics = before["diagnostics"]
    assert diagnostics["suggested_max_runs"] == 16
    assert diagnostics["unmet_conditions"] and all(
        u in warning for u in diagnostics["unmet_conditions"]
    )
    response = _budget(client, cal, diagnostics["suggested_max_runs"])
    assert response.status_code == 200, response.text
    info = response.json()
    assert info["status"] == "collecting" and info["spec"]["budget"] == {"max_runs": 16}
    after = client.get(f"{cal.url}/posterior", headers=cal.headers).json()
    assert after["round"] == 2 and after["parameters"] == before["parameters"]
    assert not any("budget spent" in w for w in after["diagnostics"]["warnings"])
    assert after["diagnostics"]["suggested_max_runs"] is None
    final = _drive(client, cal, refitter)
    assert final["runs_completed"] == 16
    assert client.get(f"{cal.url}/posterior", headers=cal.headers).json()["round"] == 3
    assert final["status"] in ("converged", "budget_exhausted")


@pytest.mark.parametrize("max_runs", [39, 12, 100_001, "60", 60.0, None])
def test_a_budget_that_does_not_grow_is_refused_and_nothing_changes(
    client: AppClient, calibration: Calibration, max_runs: object
) -> None:
    before = client.get(calibration.url, headers=calibration.headers).json()
    response = _budget(client, calibration, max_runs)
    assert response.status_code == 422, response.text
    assert "max_runs" in response.text
    assert client.get(calibration.url, headers=calibration.headers).json() == before


def test_the_current_budget_again_is_a_harmless_success(
    client: AppClient, calibration: Calibration
) -> None:
    before = client.get(calibration.url, headers=calibration.headers).json()
    response = _budget(client, calibration, SPEC["budget"]["max_runs"])
    assert response.status_code == 200 and response.json() == before


def test_a_budget_below_the_runs_already_imported_is_refused(
    client: AppClient, refitter: Refitter
) -> None:
    # Imported runs count towards the budget: 20 of them against a budget of 12. A budget
    # of 15 would reopen the calibration with no room for a single run.
    cal = create(client, {**SPEC, "budget": {"max_runs": 12}})
    archive = [
        {"parameters": p, "outputs": simulate(p)}
        for p in ({"slope": 0.1 * i, "offset": 0.02 * i - 0.2} for i in range(20))
    ]
    client.post(f"{cal.url}/runs/import", json={"runs": archive}, headers=cal.headers)
    assert refitter.step() == ["written"]
    assert client.get(cal.url, headers=cal.headers).json()["status"] == "budget_exhausted"
    response = _budget(client, cal, 15)
    assert response.status_code == 422 and "20 runs spent or out" in response.text
    assert _budget(client, cal, 24).json()["status"] == "collecting"
    assert len(lease(client, cal, 100)) == 4


def test_a_failed_calibration_cannot_be_reopened(
    client: AppClient, calibration: Calibration
) -> None:
    store = client.app.state.store  # type: ignore[attr-defined]
    assert store.record_refit_failure(calibration.id, "refit failed: boom", 1, 0.0)
    response = _budget(client, calibration, 80)
    assert response.status_code == 409 and "failed" in response.text
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert info["status"] == "failed" and info["spec"]["budget"]["max_runs"] == 40
    same = _budget(client, calibration, 40)  # the current budget: a success, as ever
    assert same.status_code == 200 and same.json()["status"] == "failed"


def test_only_the_budget_can_change(client: AppClient, calibration: Calibration) -> None:
    body = {"budget": {"max_runs": 80}, "seed": 3}
    response = client.patch(calibration.url, json=body, headers=calibration.headers)
    assert response.status_code == 422 and "seed" in response.text


def test_a_raised_budget_is_kept_by_an_open_calibration_and_leases_follow_it(
    client: AppClient, refitter: Refitter
) -> None:
    cal = create(client, {**SPEC, "budget": {"max_runs": 9}})
    # Round 0 proposes the initial design and a batch of spares, 12 points.
    assert len(lease(client, cal, 100)) == 9  # as far as the budget goes
    assert _budget(client, cal, 11).json()["status"] == "collecting"
    assert len(lease(client, cal, 100)) == 2  # 3 points left, 2 runs of budget


def test_a_refit_begun_under_the_old_budget_does_not_land(
    client: AppClient, refitter: Refitter
) -> None:
    # The budget moves the state's version on: a refit that read the old budget fails its
    # swap, and runs again under the new one.
    cal = create(client, {**SPEC, "budget": {"max_runs": 12}})
    for run in lease(client, cal, 8):
        report(client, cal, run)
    assert refitter.step() == ["written"]
    for run in lease(client, cal, 4):
        report(client, cal, run)  # the 12th result: the next refit would spend the budget
    service = client.app.state.service  # type: ignore[attr-defined]
    meta = service.meta(cal.id)
    assert _budget(client, cal, 30).status_code == 200
    stale = service.store.swap_state(cal.id, meta.state_version, b"x", 9, "budget_exhausted", [])
    assert stale is False
    assert refitter.step() == ["written"]
    assert client.get(cal.url, headers=cal.headers).json()["status"] in ("collecting", "fitting")


def test_a_converged_calibration_keeps_its_budget(client: AppClient, refitter: Refitter) -> None:
    cal = create(client, {**SPEC, "budget": {"max_runs": 200}})
    assert _drive(client, cal, refitter)["status"] == "converged"
    response = _budget(client, cal, 300)
    assert response.status_code == 409 and "converged" in response.text
    assert client.get(cal.url, headers=cal.headers).json()["spec"]["budget"]["max_runs"] == 200
