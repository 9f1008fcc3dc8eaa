"""The FastAPI application factory: no I/O at import, the store opened in `lifespan`."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI

from honing.api.auth import hash_token
from honing.api.body import add_body_schemas
from honing.api.limits import BodyLimitMiddleware
from honing.api.metrics import Metrics, RequestMetricsMiddleware
from honing.api.problems import install_problem_handlers
from honing.api.routers import calibrations, health, posterior, runs
from honing.api.service import CalibrationService
from honing.api.settings import Settings
from honing.api.store import Store, StoreUnavailable, open_store

__all__ = ["create_app"]

log = logging.getLogger("honing.api")


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the app; the store named by ``settings.store_url`` opens when it starts."""
    settings = settings or Settings()

    def queue_depth() -> int:
        store: Store = app.state.store
        return store.refit_queue_depth()

    metrics = Metrics(queue_depth)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        admin_key = settings.resolved_admin_key()
        app.state.admin_key_hash = hash_token(admin_key) if admin_key else None
        store = open_store(settings.store_url)
        try:
            for warning in store.startup_warnings():
                log.warning(warning, extra={"store": store.kind})
        except StoreUnavailable as exc:
            log.error("store unreachable at start-up", extra={"error": str(exc)})
        app.state.store = store
        app.state.service = CalibrationService(store, metrics)
        try:
            yield
        finally:
            await store.aclose()
            store.close()

    app = FastAPI(
        title="honing",
        version="1",
        summary="Calibration of expensive simulators: lease points, report outputs, "
        "read the posterior.",
        lifespan=lifespan,
    )

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            app.openapi_schema = add_body_schemas(FastAPI.openapi(app))
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    app.state.settings = settings
    app.state.metrics = metrics
    install_problem_handlers(app)
    modules = (calibrations, runs, posterior, health)
    for module in modules:
        app.include_router(module.router)
    app.state.routes = [*app.router.routes, *(r for m in modules for r in m.router.routes)]
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes)
    app.add_middleware(RequestMetricsMiddleware, metrics=metrics)
    return app
