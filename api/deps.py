"""Dependencies of the routes, as `Annotated` aliases."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from honing.api.auth import ADMIN_KEY_NEEDED, check_token
from honing.api.service import CalibrationService
from honing.api.store import Store

__all__ = ["AdminAccess", "AuthorizedCalibration", "ServiceDep", "StoreDep"]

_bearer = HTTPBearer(
    auto_error=False,
    description="the calibration token (or, to create one, the admin key when configured)",
)
Credentials = Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)]


# Dependencies without I/O are async so FastAPI runs them on the event loop, not in a thread.
async def _store(request: Request) -> Store:
    return request.app.state.store


async def _service(request: Request) -> CalibrationService:
    return request.app.state.service


StoreDep = Annotated[Store, Depends(_store)]
ServiceDep = Annotated[CalibrationService, Depends(_service)]


async def _authorized(calibration_id: str, service: ServiceDep, credentials: Credentials) -> str:
    """The calibration id of the path, once its token checks out (404 first if unknown)."""
    token = credentials.credentials if credentials else None
    return await service.authorize(calibration_id, token)


async def _admin(request: Request, credentials: Credentials) -> None:
    """Require the admin key when the server has one."""
    expected = request.app.state.admin_key_hash
    if expected is not None:
        check_token(credentials.credentials if credentials else None, expected, ADMIN_KEY_NEEDED)


AuthorizedCalibration = Annotated[str, Depends(_authorized)]
AdminAccess = Depends(_admin)
