"""Fixtures of the API tests: a store of each backend."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
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
