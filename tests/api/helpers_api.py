"""Helpers of the API tests: a small spec, its simulator, a hand-moved clock, a client."""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import anyio.from_thread
import httpx
from fastapi import FastAPI

from honing.api.app import create_app
from honing.api.settings import Settings

SPEC: dict[str, Any] = {
    "name": "line",
    "parameters": [
        {"name": "slope", "prior": {"kind": "uniform", "low": 0.0, "high": 2.0}},
        {"name": "offset", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}, "unit": "m"},
    ],
    "observations": [
        {"name": "y", "values": [1.1, 2.0, 2.9], "sd": 0.1},
        {"name": "z", "values": [0.7], "sd": [0.05]},
    ],
    "design": {"initial_runs": 8, "batch_size": 4},
    "budget": {"max_runs": 40},
    "seed": 11,
}


def simulate(parameters: dict[str, float]) -> dict[str, list[float]]:
    """The test simulator: a line through three points, and its offset."""
    a, b = parameters["slope"], parameters["offset"]
    return {"y": [a * x + b for x in (1.0, 2.0, 3.0)], "z": [b + 0.5]}


class FakeClock:
    """A clock the test moves by hand (installed as the service's clock)."""

    def __init__(self) -> None:
        self.now = time.time()

    def __call__(self) -> float:
        return self.now


@dataclass
class Calibration:
    id: str
    token: str

    @property
    def headers(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.token}"}

    @property
    def url(self) -> str:
        return f"/v1/calibrations/{self.id}"


class AppClient:
    """A synchronous client of the in-process app over `httpx.ASGITransport`, lifespan included.

    (Starlette's own test client now warns about httpx; this one drives the same transport
    from a blocking portal, so it can also be used from many threads at once.)
    """

    def __init__(self, app: FastAPI) -> None:
        self.app = app

    def __enter__(self) -> AppClient:
        self._portal_cm = anyio.from_thread.start_blocking_portal()
        self.portal = self._portal_cm.__enter__()
        self._lifespan = self.portal.wrap_async_context_manager(
            self.app.router.lifespan_context(self.app)
        )
        self._lifespan.__enter__()
        self._client = httpx.AsyncClient(
            transport=httpx.ASGITransport(app=self.app), base_url="http://testserver"
        )
        return self

    def __exit__(self, *exc: object) -> None:
        self.portal.call(self._client.aclose)
        self._lifespan.__exit__(None, None, None)
        self._portal_cm.__exit__(None, None, None)

    def request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        async def call() -> httpx.Response:
            return await self._client.request(method, url, **kwargs)

        return self.portal.call(call)

    def get(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("GET", url, **kwargs)

    def post(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("POST", url, **kwargs)

    def put(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("PUT", url, **kwargs)

    def patch(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("PATCH", url, **kwargs)

    def delete(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("DELETE", url, **kwargs)


def make_client(settings: Settings) -> AppClient:
    return AppClient(create_app(settings))


def create(client: AppClient, spec: dict[str, Any] | None = None) -> Calibration:
    response = client.post("/v1/calibrations", json=spec or SPEC)
    assert response.status_code == 201, response.text
    body = response.json()
    return Calibration(body["id"], body["token"])


def lease(client: AppClient, cal: Calibration, count: int = 1, **extra: Any) -> list[dict]:
    response = client.post(f"{cal.url}/runs", json={"count": count, **extra}, headers=cal.headers)
    assert response.status_code == 200, response.text
    return list(response.json()["runs"])


def report(client: AppClient, cal: Calibration, run: dict[str, Any]) -> dict[str, Any]:
    response = client.put(
        f"{cal.url}/runs/{run['run_id']}",
        json={"outputs": simulate(run["parameters"])},
        headers=cal.headers,
    )
    assert response.status_code == 200, response.text
    return dict(response.json())
