import json
from pathlib import Path

import pytest
from helpers_api import SPEC, AppClient, Calibration, create, lease, make_client, report

from honing.api.settings import Settings
from honing.engine import spec as spec_module


def assert_problem(response, status: int) -> dict:  # type: ignore[no-untyped-def]
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == "application/problem+json"
    body = response.json()
    assert body["status"] == status and body["title"] and body["detail"] and body["type"]
    return dict(body)


@pytest.fixture
def admin_client(sqlite_url: str, tmp_path: Path):  # type: ignore[no-untyped-def]
    key_file = tmp_path / "admin.key"
    key_file.write_text("the-admin-key\n")
    with make_client(Settings(store_url=sqlite_url, admin_key_file=key_file)) as client:
        yield client


def test_admin_key_guards_creation(admin_client: AppClient) -> None:
    response = admin_client.post("/v1/calibrations", json=SPEC)
    assert_problem(response, 401)
    assert response.headers["www-authenticate"] == "Bearer"
    # Whoever creates a calibration has no token yet: the answer names the admin key and how
    # the command line sends it, with or without a wrong key.
    assert "admin key" in response.json()["detail"]
    assert "HONING_ADMIN_KEY" in response.json()["detail"]
    wrong = {"Authorization": "Bearer not-the-key"}
    refused = admin_client.post("/v1/calibrations", json=SPEC, headers=wrong)
    assert_problem(refused, 403)
    assert refused.json()["detail"].startswith("wrong key: this server creates calibrations")
    right = {"Authorization": "Bearer the-admin-key"}
    created = admin_client.post("/v1/calibrations", json=SPEC, headers=right)
    assert created.status_code == 201
    # The admin key is not a calibration token.
    url = f"/v1/calibrations/{created.json()['id']}"
    assert_problem(admin_client.get(url, headers=right), 403)


def test_creation_is_open_without_admin_key(client: AppClient) -> None:
    assert client.post("/v1/calibrations", json=SPEC).status_code == 201


def test_calibration_token_is_needed(client: AppClient, calibration: Calibration) -> None:
    assert_problem(client.get(calibration.url), 401)
    assert_problem(client.get(calibration.url, headers={"Authorization": "Bearer nope"}), 403)
    assert_problem(client.get(calibration.url, headers={"Authorization": "Basic eDp5"}), 401)
    assert client.get(calibration.url, headers=calibration.headers).status_code == 200


def test_store_keeps_only_a_hash_of_the_token(client: AppClient, calibration: Calibration) -> None:
    meta = client.app.state.store.get_meta(calibration.id)  # type: ignore[attr-defined]
    assert calibration.token not in meta.token_hash and len(meta.token_hash) == 64


@pytest.mark.parametrize("calibration_id", ["0123456789abcdef", "x}y{z", "a" * 65, "%7B%7D"])
def test_unknown_calibration_is_404_whatever_the_token(
    client: AppClient, calibration: Calibration, calibration_id: str
) -> None:
    url = f"/v1/calibrations/{calibration_id}"
    for headers in ({}, {"Authorization": "Bearer nope"}, calibration.headers):
        assert_problem(client.get(url, headers=headers), 404)
        assert_problem(client.post(f"{url}/runs", json={"count": 1}, headers=headers), 404)


def test_a_token_opens_no_route_of_b(client: AppClient) -> None:
    a, b = create(client), create(client)
    (run,) = lease(client, b)
    report(client, b, run)
    before = client.get(f"{b.url}/runs", headers=b.headers).json()
    routes = [
        (method.upper(), path)
        for path, item in client.get("/openapi.json").json()["paths"].items()
        if "{calibration_id}" in path
        for method in item
    ]
    assert len(routes) >= 9
    for method, path in routes:
        url = path.replace("{calibration_id}", b.id).replace("{run_id}", run["run_id"])
        response = client.request(method, url, json={}, headers=a.headers)
        assert_problem(response, 403)
        missing = path.replace("{calibration_id}", "feedc0de00000000").replace("{run_id}", "r1")
        assert_problem(client.request(method, missing, json={}, headers=a.headers), 404)
    assert client.get(f"{b.url}/runs", headers=b.headers).json() == before
    assert client.get(b.url, headers=b.headers).status_code == 200


def test_tokens_differ_per_calibration(client: AppClient) -> None:
    tokens = {create(client).token for _ in range(5)}
    assert len(tokens) == 5 and all(len(t) >= 40 for t in tokens)


def test_a_calibration_deleted_on_one_replica_is_gone_on_another(settings: Settings) -> None:
    # Two apps on one store are two replicas; the second has the token hash cached from
    # earlier requests, so only the operations themselves can notice the deletion.
    with make_client(settings) as first, make_client(settings) as second:
        cal = create(first)
        (run,) = lease(second, cal)
        assert second.get(cal.url, headers=cal.headers).status_code == 200
        assert first.delete(cal.url, headers=cal.headers).status_code == 204
        assert_problem(second.get(cal.url, headers=cal.headers), 404)
        assert_problem(second.post(f"{cal.url}/runs", json={}, headers=cal.headers), 404)
        body = {"outputs": {"y": [1.0, 2.0, 3.0], "z": [0.5]}}
        url = f"{cal.url}/runs/{run['run_id']}"
        assert_problem(second.put(url, json=body, headers=cal.headers), 404)
        for path in ("/runs", "/posterior", "/posterior/samples"):
            assert_problem(second.get(cal.url + path, headers=cal.headers), 404)
        # 404 whatever the token, as for an id never created (API.md), not 401 or 403
        for headers in ({}, {"Authorization": "Bearer not-the-token"}):
            assert_problem(second.get(cal.url, headers=headers), 404)


def test_a_calibration_stored_before_a_stricter_rule_still_opens(
    settings: Settings, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A replica started after an upgrade reads specs stored before it: the checks added
    # since (here: a shorter unit limit) must not refuse them on every request.
    with make_client(settings) as first:
        cal = create(first)  # the offset's unit is "m"
    monkeypatch.setattr(spec_module, "MAX_UNIT_CHARS", 0)
    with make_client(settings) as second:
        assert second.get(cal.url, headers=cal.headers).status_code == 200
        assert lease(second, cal)
        spec = json.loads(json.dumps(SPEC))
        assert second.post("/v1/calibrations", json=spec).status_code == 422
