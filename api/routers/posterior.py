"""The posterior: summary, draws, and the HTML report."""

from __future__ import annotations

import csv
import io
from typing import Annotated, Literal

from fastapi import APIRouter, Query, Response
from fastapi.responses import HTMLResponse

from honing.api.deps import AuthorizedCalibration, ServiceDep
from honing.api.models import PosteriorResponse, SamplesResponse
from honing.api.problems import problem_responses

router = APIRouter(prefix="/v1/calibrations/{calibration_id}", tags=["posterior"])

#: Most draws one request may ask for.
MAX_SAMPLES = 100_000


@router.get(
    "/posterior",
    response_model=PosteriorResponse,
    responses=problem_responses(401, 403, 404, 503),
)
def get_posterior(calibration_id: AuthorizedCalibration, service: ServiceDep) -> PosteriorResponse:
    """Latest posterior summary and diagnostics (the prior's at round 0)."""
    return PosteriorResponse(**service.posterior(calibration_id))


@router.get(
    "/posterior/samples",
    response_model=SamplesResponse,
    responses={
        200: {"content": {"text/csv": {"schema": {"type": "string"}}}},
        **problem_responses(401, 403, 404, 422, 503),
    },
)
def get_samples(
    calibration_id: AuthorizedCalibration,
    service: ServiceDep,
    count: Annotated[int, Query(ge=1, le=MAX_SAMPLES)] = 1000,
    format: Annotated[Literal["json", "csv"], Query()] = "json",
) -> SamplesResponse | Response:
    """Up to ``count`` posterior draws, one column per name; ``?format=csv`` for CSV."""
    names, draws = service.samples(calibration_id, count)
    if format == "json":
        return SamplesResponse(names=names, samples=draws.tolist())
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(names)
    writer.writerows([repr(float(v)) for v in row] for row in draws)
    return Response(buffer.getvalue(), media_type="text/csv")


@router.get(
    "/report",
    response_class=HTMLResponse,
    responses=problem_responses(401, 403, 404, 503),
)
def get_report(calibration_id: AuthorizedCalibration, service: ServiceDep) -> HTMLResponse:
    """A self-contained HTML page with the posterior's plots."""
    from honing.api.report import render_report  # imported here: it pulls in plotting

    spec, state, runs = service.report_inputs(calibration_id)
    return HTMLResponse(render_report(spec, state, runs))
