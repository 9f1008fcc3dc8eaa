"""Calibrations: create, describe, delete."""

from __future__ import annotations

from fastapi import APIRouter, Response, status

from honing.api.deps import AdminAccess, AuthorizedCalibration, ServiceDep
from honing.api.models import BudgetRequest, CalibrationResponse, CreateResponse, SpecRequest
from honing.api.problems import problem_responses

router = APIRouter(prefix="/v1/calibrations", tags=["calibrations"])


@router.post(
    "",
    status_code=status.HTTP_201_CREATED,
    response_model=CreateResponse,
    dependencies=[AdminAccess],
    responses=problem_responses(401, 403, 413, 422, 503),
)
def create_calibration(body: SpecRequest, service: ServiceDep) -> CreateResponse:
    """Create a calibration from a spec; the answer carries its token (shown only once).

    A null optional section means its defaults, as the schema says.
    """
    spec = body.model_dump(exclude_unset=True, exclude_none=True)
    calibration_id, token, state = service.create(spec)
    return CreateResponse(id=calibration_id, token=token, status=state)


@router.get(
    "/{calibration_id}",
    response_model=CalibrationResponse,
    responses=problem_responses(401, 403, 404, 503),
)
def get_calibration(
    calibration_id: AuthorizedCalibration, service: ServiceDep
) -> CalibrationResponse:
    """Spec, status, counts and round."""
    return CalibrationResponse(**service.describe(calibration_id))


@router.patch(
    "/{calibration_id}",
    response_model=CalibrationResponse,
    responses=problem_responses(401, 403, 404, 409, 422, 503),
)
def raise_budget(
    body: BudgetRequest, calibration_id: AuthorizedCalibration, service: ServiceDep
) -> CalibrationResponse:
    """Raise the run budget; a calibration the old budget stopped collects again from where
    it stood (409 once converged or failed; 422 unless the budget grows)."""
    return CalibrationResponse(**service.raise_budget(calibration_id, body.budget.max_runs))


@router.delete(
    "/{calibration_id}",
    status_code=status.HTTP_204_NO_CONTENT,
    response_class=Response,
    responses=problem_responses(401, 403, 404, 503),
)
def delete_calibration(calibration_id: AuthorizedCalibration, service: ServiceDep) -> Response:
    """Delete the calibration and all its runs."""
    service.delete(calibration_id)
    return Response(status_code=status.HTTP_204_NO_CONTENT)
