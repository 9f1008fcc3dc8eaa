import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from helpers_api import SPEC, AppClient, Calibration, lease, report

from honing.api.server import start_background_server

# The endpoint table of the HTTP contract, with each route's success status.
CONTRACT = {
    ("post", "/v1/calibrations"): "201",
    ("get", "/v1/calibrations/{calibration_id}"): "200",
    ("delete", "/v1/calibrations/{calibration_id}"): "204",
    # An extension of the contract: raising the run budget.
    ("patch", "/v1/calibrations/{calibration_id}"): "200",
    ("post", "/v1/calibrations/{calibration_id}/runs"): "200",
    ("put", "/v1/calibrations/{calibration_id}/runs/{run_id}"): "200",
    # An extension of the contract: keeping a long run's lease.
    ("put", "/v1/calibrations/{calibration_id}/runs/{run_id}/lease"): "200",
    ("post", "/v1/calibrations/{calibration_id}/runs/import"): "200",
    ("get", "/v1/calibrations/{calibration_id}/runs"): "200",
    ("get", "/v1/calibrations/{calibration_id}/posterior"): "200",
    ("get", "/v1/calibrations/{calibration_id}/posterior/samples"): "200",
    ("get", "/v1/calibrations/{calibration_id}/report"): "200",
    ("get", "/healthz"): "200",
    ("get", "/metrics"): "200",
}


@pytest.fixture
def openapi(client: AppClient) -> dict:
    return dict(client.get("/openapi.json").json())


def _schema(doc: dict, ref_holder: dict) -> dict:
    ref = ref_holder["$ref"]
    return dict(doc["components"]["schemas"][ref.rsplit("/", 1)[1]])


def test_every_contract_route_and_no_other(openapi: dict) -> None:
    routes = {(m, p) for p, item in openapi["paths"].items() for m in item}
    assert routes == set(CONTRACT)
    for (method, path), status in CONTRACT.items():
        assert status in openapi["paths"][path][method]["responses"], (method, path)


def test_request_bodies_have_the_contract_fields(openapi: dict) -> None:
    def body(method: str, path: str) -> dict:
        op = openapi["paths"][path][method]
        return _schema(openapi, op["requestBody"]["content"]["application/json"]["schema"])

    lease_body = body("post", "/v1/calibrations/{calibration_id}/runs")
    assert set(lease_body["properties"]) == {"count", "worker", "lease_seconds"}
    assert lease_body["properties"]["count"]["maximum"] == 1000
    report_body = body("put", "/v1/calibrations/{calibration_id}/runs/{run_id}")
    assert set(report_body["properties"]) == {"outputs", "error"}
    assert set(body("post", "/v1/calibrations/{calibration_id}/runs/import")["properties"]) == {
        "runs"
    }
    spec = body("post", "/v1/calibrations")
    assert set(spec["required"]) == {"name", "parameters", "observations"}
    assert set(spec["properties"]) == set(SPEC) | {"noise", "surrogate"}


def test_responses_have_the_contract_fields(openapi: dict) -> None:
    def answer(method: str, path: str, status: str = "200") -> dict:
        op = openapi["paths"][path][method]
        return _schema(openapi, op["responses"][status]["content"]["application/json"]["schema"])

    assert set(answer("post", "/v1/calibrations", "201")["required"]) == {"id", "token", "status"}
    described = answer("get", "/v1/calibrations/{calibration_id}")["properties"]
    assert {"spec", "status", "runs_completed", "runs_failed", "runs_leased", "round"} <= set(
        described
    )
    assert set(answer("post", "/v1/calibrations/{calibration_id}/runs")["required"]) == {
        "runs",
        "status",
    }
    samples = answer("get", "/v1/calibrations/{calibration_id}/posterior/samples")
    assert set(samples["required"]) == {"names", "samples"}
    problem = openapi["components"]["schemas"]["Problem"]
    assert {"type", "title", "status", "detail"} <= set(problem["required"])
    op = openapi["paths"]["/v1/calibrations/{calibration_id}/runs"]["post"]
    assert "application/problem+json" in op["responses"]["422"]["content"]
    assert (
        "text/html"
        in openapi["paths"]["/v1/calibrations/{calibration_id}/report"]["get"]["responses"]["200"][
            "content"
        ]
    )


def test_report_page_is_html(client: AppClient, calibration: Calibration) -> None:
    if not (Path(__file__).parents[2] / "api" / "report.py").exists():
        pytest.fail("api/report.py is part of the service and must exist")
    for run in lease(client, calibration, 3):
        report(client, calibration, run)
    response = client.get(f"{calibration.url}/report", headers=calibration.headers)
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/html")
    assert "<html" in response.text.lower()


@pytest.fixture
def embedded(sqlite_url: str) -> Iterator[str]:
    url, stop = start_background_server(sqlite_url)
    try:
        yield url
    finally:
        stop()


def test_schemathesis_finds_no_server_error(embedded: str, tmp_path: Path) -> None:
    created = httpx.post(f"{embedded}/v1/calibrations", json=SPEC).json()
    config = tmp_path / "schemathesis.toml"
    config.write_text(
        f'headers = {{ Authorization = "Bearer {created["token"]}" }}\n'
        "[parameters]\n"
        f'"path.calibration_id" = "{created["id"]}"\n'
    )
    binary = shutil.which("schemathesis", path=os.path.dirname(sys.executable))
    assert binary, "schemathesis is a test dependency"
    # DELETE is left out so the fixed calibration lives through the run.
    result = subprocess.run(
        [
            binary, "--config-file", str(config), "run", f"{embedded}/openapi.json",
            "--checks", "not_a_server_error", "--phases", "coverage,fuzzing",
            "--max-examples", "5", "--max-time", "20", "--workers", "1",
            "--exclude-method", "DELETE", "--generation-database", "none",
            "--seed", "1", "--no-color",
        ],
        capture_output=True, text=True, cwd=tmp_path, timeout=300,
    )  # fmt: skip
    assert result.returncode == 0, result.stdout[-6000:] + result.stderr[-2000:]
    health = httpx.get(f"{embedded}/healthz").json()
    assert health == {"status": "ok", "store": "sqlite"}
