"""Fixtures of the API tests: stores of each backend, the app, a small calibration."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from anyio.from_thread import BlockingPortal, start_blocking_portal
from helpers_api import AppClient, Calibration, FakeClock, create, make_client

from honing.api.refitter import Refitter
from honing.api.settings import Settings
from honing.api.store import Store, open_store


@pytest.fixture(params=["sqlite", "redis"])
def store_url(request: pytest.FixtureRequest) -> str:
    """A fresh store URL, once per backend."""
    fixture = "sqlite_url" if request.param == "sqlite" else "redis_url"
    return str(request.getfixturevalue(fixture))


@pytest.fixture
def store(store_url: str) -> Iterator[Store]:
    opened = open_store(store_url)
    yield opened
    opened.close()


@pytest.fixture
def portal(store: Store) -> Iterator[BlockingPortal]:
    """An event loop in a thread, as the server has: the service's lease and report are
    coroutines, called from any thread through it."""
    with start_blocking_portal() as p:
        yield p
        p.call(store.aclose)


@pytest.fixture
def settings(store_url: str) -> Settings:
    return Settings(store_url=store_url, admin_key=None)


@pytest.fixture
def client(settings: Settings) -> Iterator[AppClient]:
    with make_client(settings) as c:
        yield c


@pytest.fixture
def clock(client: AppClient) -> FakeClock:
    fake = FakeClock()
    client.app.state.service.clock = fake  # type: ignore[attr-defined]
    return fake


@pytest.fixture
def calibration(client: AppClient) -> Calibration:
    return create(client)


@pytest.fixture
def refitter(client: AppClient) -> Refitter:
    return Refitter(client.app.state.store)  # type: ignore[attr-defined]
