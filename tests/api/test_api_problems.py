import json

import pytest
from helpers_api import SPEC, AppClient, Calibration, lease, make_client, report, simulate
from test_api_auth import assert_problem

from honing.api.settings import Settings


def locs(body: dict) -> list[list]:
    return [e["loc"] for e in body["errors"]]


def test_unknown_route_is_a_404_problem(client: AppClient) -> None:
    body = assert_problem(client.get("/v1/nothing-here"), 404)
    assert "/v1/nothing-here" in body["detail"]


def test_wrong_method_is_a_405_problem(client: AppClient, calibration: Calibration) -> None:
    response = client.request("PUT", calibration.url, headers=calibration.headers)
    assert_problem(response, 405)
    # RFC 9110, 15.5.6: Allow lists the resource's supported methods, each route's together
    allowed = {m.strip() for m in response.headers["allow"].split(",")}
    assert {"GET", "PATCH", "DELETE"} <= allowed
    assert "PUT" not in allowed


@pytest.mark.parametrize(
    ("body", "loc"),
    [
        ({"count": "5"}, ["body", "count"]),
        ({"count": True}, ["body", "count"]),
        ({"count": 1.5}, ["body", "count"]),
        ({"count": 1001}, ["body", "count"]),
        ({"count": 0}, ["body", "count"]),
        ({"count": 1, "lease_seconds": 0}, ["body", "lease_seconds"]),
        ({"count": 1, "lease_seconds": 604801}, ["body", "lease_seconds"]),
        ({"count": 1, "lease_seconds": "60"}, ["body", "lease_seconds"]),
        ({"count": 1, "colour": "red"}, ["body", "colour"]),
    ],
)
def test_lease_body_is_strict(
    client: AppClient, calibration: Calibration, body: dict, loc: list
) -> None:
    response = client.post(f"{calibration.url}/runs", json=body, headers=calibration.headers)
    assert loc in locs(assert_problem(response, 422))
    assert client.get(calibration.url, headers=calibration.headers).json()["runs_leased"] == 0


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_nan_and_infinity_literals_are_422(
    client: AppClient, calibration: Calibration, literal: str
) -> None:
    (run,) = lease(client, calibration)
    raw = '{"outputs": {"y": [1.0, LITERAL, 2.0], "z": [0.1]}}'.replace("LITERAL", literal)
    response = client.put(
        f"{calibration.url}/runs/{run['run_id']}",
        content=raw,
        headers={**calibration.headers, "Content-Type": "application/json"},
    )
    assert ["body", "outputs", "y", 1] in locs(assert_problem(response, 422))
    raw = '{"count": LITERAL}'.replace("LITERAL", literal)
    response = client.post(
        f"{calibration.url}/runs",
        content=raw,
        headers={**calibration.headers, "Content-Type": "application/json"},
    )
    assert_problem(response, 422)
    assert client.get(f"{calibration.url}/runs?state=done", headers=calibration.headers).json() == {
        "runs": []
    }


@pytest.mark.parametrize(
    ("outputs", "loc"),
    [
        ({"y": [1.0, 2.0, 3.0]}, ["body", "outputs", "z"]),
        ({"y": [1.0, 2.0, 3.0], "z": [1.0], "w": [1.0]}, ["body", "outputs", "w"]),
        ({"y": [1.0, 2.0], "z": [1.0]}, ["body", "outputs", "y"]),
        ({"y": [1.0, "41.0", 3.0], "z": [1.0]}, ["body", "outputs", "y", 1]),
        ({"y": [1.0, False, 3.0], "z": [1.0]}, ["body", "outputs", "y", 1]),
        ({"y": 1.0, "z": [1.0]}, ["body", "outputs", "y"]),
        # 1e200 lies 1e201 noise sd from the data: a fit on it would overflow (and the
        # calibration fail for good), so it is refused where it is reported
        ({"y": [1.0, 1e200, 3.0], "z": [1.0]}, ["body", "outputs", "y", 1]),
    ],
)
def test_bad_outputs_are_422_and_nothing_is_stored(
    client: AppClient, calibration: Calibration, outputs: dict, loc: list
) -> None:
    (run,) = lease(client, calibration)
    url = f"{calibration.url}/runs/{run['run_id']}"
    response = client.put(url, json={"outputs": outputs}, headers=calibration.headers)
    assert loc in locs(assert_problem(response, 422))
    (stored,) = client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    assert stored["state"] == "leased" and stored["outputs"] is None
    # The run still takes a good result afterwards.
    assert report(client, calibration, run)["state"] == "done"


@pytest.mark.parametrize(
    "body", [{}, {"outputs": {"y": [1.0, 2.0, 3.0], "z": [1.0]}, "error": "x"}, {"error": ""}]
)
def test_report_needs_exactly_one_of_outputs_and_error(
    client: AppClient, calibration: Calibration, body: dict
) -> None:
    (run,) = lease(client, calibration)
    url = f"{calibration.url}/runs/{run['run_id']}"
    assert_problem(client.put(url, json=body, headers=calibration.headers), 422)


def test_same_result_is_a_no_op_and_a_different_one_409(
    client: AppClient, calibration: Calibration
) -> None:
    (run,) = lease(client, calibration)
    first = report(client, calibration, run)
    assert report(client, calibration, run) == first
    url = f"{calibration.url}/runs/{run['run_id']}"
    other = simulate(run["parameters"])
    other["z"] = [other["z"][0] + 1.0]
    assert_problem(client.put(url, json={"outputs": other}, headers=calibration.headers), 409)
    assert_problem(client.put(url, json={"error": "late"}, headers=calibration.headers), 409)
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert (info["runs_completed"], info["runs_failed"]) == (1, 0)


def test_same_error_is_a_no_op(client: AppClient, calibration: Calibration) -> None:
    (run,) = lease(client, calibration)
    url = f"{calibration.url}/runs/{run['run_id']}"
    for _ in range(2):
        response = client.put(url, json={"error": "boom"}, headers=calibration.headers)
        assert response.json()["state"] == "failed"
    assert_problem(client.put(url, json={"error": "bang"}, headers=calibration.headers), 409)


@pytest.mark.parametrize("run_id", ["r999", "nope", "r1}"])
def test_unknown_run_is_404(client: AppClient, calibration: Calibration, run_id: str) -> None:
    url = f"{calibration.url}/runs/{run_id}"
    body = {"outputs": {"y": [1.0, 2.0, 3.0], "z": [1.0]}}
    assert_problem(client.put(url, json=body, headers=calibration.headers), 404)


@pytest.mark.parametrize(
    ("change", "loc"),
    [
        (lambda s: s["parameters"][0]["prior"].update(low=3.0), ["body", "parameters", 0]),
        (lambda s: s["parameters"][0]["prior"].update(low="0"), ["body", "parameters", 0]),
        (lambda s: s["observations"][0].update(sd=[0.1]), ["body", "observations", 0, "sd"]),
        (lambda s: s.update(budget={"max_runs": True}), ["body", "budget", "max_runs"]),
        (lambda s: s["parameters"].append(s["parameters"][0]), ["body", "parameters", 2, "name"]),
        (lambda s: s.pop("observations"), ["body", "observations"]),
        (lambda s: s.update(seed=-1), ["body", "seed"]),
        # finite fields whose spread overflows: a 422 at the prior, never a 500
        (
            lambda s: s["parameters"][0].update(
                prior={"kind": "uniform", "low": -1e308, "high": 1e308}
            ),
            ["body", "parameters", 0, "prior"],
        ),
        (
            lambda s: s["parameters"][1].update(prior={"kind": "normal", "mean": 0, "sd": 1e-320}),
            ["body", "parameters", 1, "prior"],
        ),
        (
            lambda s: s["parameters"][0].update(name="noise_scale"),
            ["body", "parameters", 0, "name"],
        ),
        (lambda s: s["parameters"][0].update(unit="m" * 65), ["body", "parameters", 0, "unit"]),
    ],
)
def test_bad_spec_is_422_naming_the_field(client: AppClient, change, loc: list) -> None:  # type: ignore[no-untyped-def]
    spec = json.loads(json.dumps(SPEC))
    change(spec)
    body = assert_problem(client.post("/v1/calibrations", json=spec), 422)
    assert any(e[: len(loc)] == loc for e in locs(body)), body


def test_null_optional_sections_mean_their_defaults(client: AppClient) -> None:
    # The schema marks them nullable; null is taken as "not given".
    spec = {**SPEC, "noise": None, "design": None, "surrogate": None, "budget": None}
    spec["parameters"] = [{**p, "unit": None} for p in SPEC["parameters"]]
    response = client.post("/v1/calibrations", json=spec)
    assert response.status_code == 201, response.text
    created = response.json()
    headers = {"Authorization": f"Bearer {created['token']}"}
    stored = client.get(f"/v1/calibrations/{created['id']}", headers=headers).json()["spec"]
    assert stored["budget"] == {"max_runs": 400} and stored["noise"] == {"scale": "fixed"}


def test_many_unknown_outputs_get_a_short_answer(
    client: AppClient, calibration: Calibration
) -> None:
    # Each unknown name once named the expected ones again: 100,000 names made an answer
    # of tens of megabytes. Now 20 are named, then a count.
    (run,) = lease(client, calibration)
    outputs = {"y": [1.0, 2.0, 3.0], "z": [1.0], **{f"u{i}": [0.0] for i in range(100_000)}}
    url = f"{calibration.url}/runs/{run['run_id']}"
    response = client.put(url, json={"outputs": outputs}, headers=calibration.headers)
    body = assert_problem(response, 422)
    assert len(response.content) < 5_000 and len(body["errors"]) == 21
    assert body["errors"][-1]["msg"] == "99980 more unknown observations"


def test_malformed_json_is_422(client: AppClient) -> None:
    response = client.post(
        "/v1/calibrations", content=b'{"name": ', headers={"Content-Type": "application/json"}
    )
    assert_problem(response, 422)


def test_json_nested_too_deep_is_422_and_leases_nothing(
    client: AppClient, calibration: Calibration
) -> None:
    # Python's parser gives up on 5,000 levels (RecursionError), which FastAPI answers 400.
    body = b'{"count": ' + b"[" * 5000 + b"]" * 5000 + b"}"
    headers = {**calibration.headers, "Content-Type": "application/json"}
    assert_problem(client.post(f"{calibration.url}/runs", content=body, headers=headers), 422)
    info = client.get(calibration.url, headers=calibration.headers).json()
    assert info["runs_leased"] == 0


@pytest.mark.parametrize(
    ("content", "content_type"),
    [
        (b'{"outputs": {"y": [1.0, ', "application/json"),  # cut off
        (b"", "application/json"),  # empty
        (b'{"error": "boom"}', "text/plain"),  # JSON under another media type
    ],
)
def test_unreadable_report_body_is_422_and_changes_nothing(
    client: AppClient, calibration: Calibration, content: bytes, content_type: str
) -> None:
    (run,) = lease(client, calibration)
    response = client.put(
        f"{calibration.url}/runs/{run['run_id']}",
        content=content,
        headers={**calibration.headers, "Content-Type": content_type},
    )
    assert all(loc[0] == "body" for loc in locs(assert_problem(response, 422)))
    listed = client.get(f"{calibration.url}/runs", headers=calibration.headers).json()["runs"]
    assert [r["state"] for r in listed] == ["leased"]


def test_bad_query_is_422(client: AppClient, calibration: Calibration) -> None:
    for query in ("count=0", "count=abc", "count=100001", "format=xml"):
        url = f"{calibration.url}/posterior/samples?{query}"
        assert_problem(client.get(url, headers=calibration.headers), 422)
    url = f"{calibration.url}/runs?state=lost"
    assert_problem(client.get(url, headers=calibration.headers), 422)


def test_import_is_all_or_nothing(client: AppClient, calibration: Calibration) -> None:
    good = {
        "parameters": {"slope": 1.0, "offset": 0.0},
        "outputs": simulate({"slope": 1.0, "offset": 0.0}),
    }
    outside = {"parameters": {"slope": 5.0, "offset": 0.0}, "outputs": good["outputs"]}
    short = {"parameters": {"slope": 1.0, "offset": 0.0}, "outputs": {"y": [1.0], "z": [1.0]}}
    response = client.post(
        f"{calibration.url}/runs/import",
        json={"runs": [good, outside, short]},
        headers=calibration.headers,
    )
    body = assert_problem(response, 422)
    assert ["body", "runs", 1, "parameters", "slope"] in locs(body)
    assert ["body", "runs", 2, "outputs", "y"] in locs(body)
    assert client.get(f"{calibration.url}/runs", headers=calibration.headers).json() == {"runs": []}
    assert client.get(calibration.url, headers=calibration.headers).json()["runs_completed"] == 0


@pytest.fixture
def small_client(sqlite_url: str):  # type: ignore[no-untyped-def]
    with make_client(Settings(store_url=sqlite_url, max_body_bytes=2048)) as client:
        yield client


def _body_of(size: int) -> bytes:
    # A JSON lease request padded with spaces to exactly ``size`` bytes.
    core = b'{"count": 1}'
    return core[:-1] + b" " * (size - len(core)) + b"}"


def test_body_at_the_limit_passes_and_one_byte_over_is_413(small_client: AppClient) -> None:
    created = small_client.post("/v1/calibrations", json=SPEC).json()
    url = f"/v1/calibrations/{created['id']}/runs"
    headers = {"Authorization": f"Bearer {created['token']}", "Content-Type": "application/json"}
    assert small_client.post(url, content=_body_of(2048), headers=headers).status_code == 200
    body = assert_problem(small_client.post(url, content=_body_of(2049), headers=headers), 413)
    assert "2048" in body["detail"]

    async def chunks(size: int):  # type: ignore[no-untyped-def]
        data = _body_of(size)
        for i in range(0, len(data), 100):
            yield data[i : i + 100]

    # A generator body goes out without Content-Length: the limit still applies while reading.
    response = small_client.post(url, content=chunks(2049), headers=headers)
    assert_problem(response, 413)
    assert small_client.post(url, content=chunks(2048), headers=headers).status_code == 200
    info = small_client.get(f"/v1/calibrations/{created['id']}", headers=headers).json()
    assert info["runs_leased"] == 2
