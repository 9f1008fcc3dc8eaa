"""Liveness and Prometheus metrics."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response
from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

from honing.api.deps import StoreDep
from honing.api.models import HealthResponse
from honing.api.problems import problem_responses

router = APIRouter(tags=["health"])


@router.get("/healthz", response_model=HealthResponse, responses=problem_responses(503))
def healthz(store: StoreDep) -> HealthResponse:
    """Ok when the store answers; 503 problem otherwise."""
    store.ping()
    return HealthResponse(status="ok", store=store.kind)


@router.get(
    "/metrics",
    response_class=Response,
    responses={200: {"content": {CONTENT_TYPE_LATEST: {"schema": {"type": "string"}}}}},
)
def metrics(request: Request) -> Response:
    """Prometheus text format."""
    return Response(
        generate_latest(request.app.state.metrics.registry), media_type=CONTENT_TYPE_LATEST
    )
