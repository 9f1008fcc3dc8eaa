"""Runs: lease points, extend leases, report results, import archives, list."""

from __future__ import annotations

import csv
import io
from typing import Annotated, Literal

from anyio import to_thread
from fastapi import APIRouter, Query, Request, Response

from honing.api.body import json_body, json_response, parse_body
from honing.api.deps import AuthorizedCalibration, ServiceDep
from honing.api.models import (
    ImportRequest,
    ImportResponse,
    LeaseExtended,
    LeaseExtension,
    LeaseRequest,
    LeaseResponse,
    ReportRequest,
    ReportResponse,
    RunsResponse,
)
from honing.api.problems import problem_responses

router = APIRouter(prefix="/v1/calibrations/{calibration_id}/runs", tags=["runs"])

_CSV = {"text/csv": {"schema": {"type": "string"}}}


# Bodies are read after the calibration and token are checked (`parse_body`, not a body
# parameter, which FastAPI would validate first): an unknown calibration is 404 and a missing
# token 401 whatever the body holds.


@router.post(
    "",
    response_model=LeaseResponse,
    responses=problem_responses(401, 403, 404, 413, 422, 503),
    openapi_extra=json_body(LeaseRequest),
)
async def lease_runs(
    calibration_id: AuthorizedCalibration, service: ServiceDep, request: Request
) -> Response:
    """Lease up to ``count`` points; an empty list comes with Retry-After while work remains."""
    body = await parse_body(request, LeaseRequest)
    seconds = _lease_seconds(body.lease_seconds, request)
    outcome = await service.lease(calibration_id, body.count, body.worker, seconds)
    answer = LeaseResponse(runs=outcome.runs, status=outcome.status)
    retry = None if outcome.retry_after is None else {"Retry-After": str(outcome.retry_after)}
    return json_response(answer, retry)


@router.put(
    "/{run_id}",
    response_model=ReportResponse,
    responses=problem_responses(401, 403, 404, 409, 413, 422, 503),
    openapi_extra=json_body(ReportRequest),
)
async def report_run(
    run_id: str, request: Request, calibration_id: AuthorizedCalibration, service: ServiceDep
) -> Response:
    """Report one run's outputs or its failure; the same result again is a no-op."""
    body = await parse_body(request, ReportRequest)
    outcome = await service.report(calibration_id, run_id, body.outputs, body.error)
    answer = ReportResponse(run_id=outcome.run_id, state=outcome.state, trust=outcome.trust)
    return json_response(answer)


@router.put(
    "/{run_id}/lease",
    response_model=LeaseExtended,
    responses=problem_responses(401, 403, 404, 409, 413, 422, 503),
    openapi_extra=json_body(LeaseExtension),
)
async def extend_lease(
    run_id: str, calibration_id: AuthorizedCalibration, service: ServiceDep, request: Request
) -> Response:
    """Keep a leased run for ``lease_seconds`` more from now (a run longer than its lease);
    409 once its lease is over."""
    body = await parse_body(request, LeaseExtension)
    seconds = _lease_seconds(body.lease_seconds, request)
    answer = await to_thread.run_sync(service.extend_lease, calibration_id, run_id, seconds)
    return json_response(LeaseExtended(**answer))


def _lease_seconds(asked: float | None, request: Request) -> float:
    """The lease length a request asked for, or the server's (``HONING_LEASE_SECONDS``)."""
    return asked or request.app.state.settings.lease_seconds


@router.post(
    "/import",
    response_model=ImportResponse,
    responses=problem_responses(401, 403, 404, 413, 422, 503),
)
def import_runs(
    body: ImportRequest, calibration_id: AuthorizedCalibration, service: ServiceDep
) -> ImportResponse:
    """Add runs evaluated elsewhere as finished design points, all or nothing."""
    runs = [run.model_dump() for run in body.runs]
    return ImportResponse(imported=service.import_runs(calibration_id, runs))


@router.get(
    "",
    response_model=RunsResponse,
    responses={200: {"content": _CSV}, **problem_responses(401, 403, 404, 422, 503)},
)
def list_runs(
    calibration_id: AuthorizedCalibration,
    service: ServiceDep,
    state: Annotated[Literal["leased", "done", "failed", "expired"] | None, Query()] = None,
    format: Annotated[Literal["json", "csv"], Query()] = "json",
) -> RunsResponse | Response:
    """Every run with parameters, outputs, state and trust; ``?format=csv`` for CSV."""
    runs = service.runs(calibration_id, state)
    if format == "json":
        return RunsResponse(runs=runs)
    spec = service.spec(calibration_id)
    outputs = [f"{o.name}[{i}]" for o in spec.observations for i in range(o.size)]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    fixed = ["run_id", "state", "worker", "leased_at", "completed_at", "trust", "error"]
    writer.writerow([*fixed, *spec.names, *outputs])
    for run in runs:
        values = [run[k] for k in fixed]
        flat: list[object] = [""] * len(outputs)
        if run["outputs"] is not None:
            flat = [v for o in spec.observations for v in run["outputs"][o.name]]
        writer.writerow(
            ["" if v is None else v for v in values]
            + [repr(run["parameters"][n]) for n in spec.names]
            + [repr(v) if isinstance(v, float) else v for v in flat]
        )
    return Response(buffer.getvalue(), media_type="text/csv")
