"""One set of exception handlers turning every error into an RFC 9457 problem document.

Domain errors map to statuses here and nowhere else: `SpecError` and request validation 422,
`NotFound` 404, `Unauthorized` 401, `Forbidden` 403, `ConflictError` 409, `StoreUnavailable`
503 with Retry-After; routing errors (404, 405) and the body limit (413) keep their status,
and a body the JSON parser gave up on (FastAPI's 400) is 422 like any unreadable body.
Anything unexpected is a 500 problem without internals in the body.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Mapping, Sequence
from http import HTTPStatus
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import Match

from honing.api.errors import Forbidden, NotFound, Unauthorized
from honing.api.models import Problem
from honing.api.store import StoreUnavailable
from honing.engine.errors import ConflictError, SpecError, StateError

__all__ = ["PROBLEM_MEDIA_TYPE", "install_problem_handlers", "problem_bytes", "problem_responses"]

log = logging.getLogger("honing.api")

PROBLEM_MEDIA_TYPE = "application/problem+json"
#: Seconds a client should wait after a 503 before trying again.
STORE_RETRY_AFTER = 2

_SLUGS = {
    400: "bad-request",
    401: "unauthorized",
    403: "forbidden",
    404: "not-found",
    405: "method-not-allowed",
    409: "conflict",
    413: "body-too-large",
    415: "unsupported-media-type",
    422: "validation",
    500: "internal",
    503: "store-unavailable",
}


def _document(
    status: int, detail: str, errors: Sequence[Mapping[str, Any]] | None = None
) -> dict[str, Any]:
    doc: dict[str, Any] = {
        "type": f"urn:honing:problem:{_SLUGS.get(status, 'http-' + str(status))}",
        "title": HTTPStatus(status).phrase,
        "status": status,
        "detail": detail,
    }
    if errors is not None:
        doc["errors"] = [{"loc": list(e["loc"]), "msg": str(e["msg"])} for e in errors]
    return doc


def problem_bytes(
    status: int, detail: str, errors: Sequence[Mapping[str, Any]] | None = None
) -> bytes:
    """A problem document encoded for sending outside a FastAPI handler."""
    return json.dumps(_document(status, detail, errors)).encode()


def problem(
    status: int,
    detail: str,
    errors: Sequence[Mapping[str, Any]] | None = None,
    headers: Mapping[str, str] | None = None,
) -> JSONResponse:
    """A problem response."""
    return JSONResponse(
        _document(status, detail, errors),
        status_code=status,
        media_type=PROBLEM_MEDIA_TYPE,
        headers=dict(headers or {}),
    )


def problem_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries for the problem statuses a route can answer."""
    schema = {"$ref": "#/components/schemas/Problem"}
    return {
        status: {
            "model": Problem,
            "description": HTTPStatus(status).phrase,
            "content": {PROBLEM_MEDIA_TYPE: {"schema": schema}},
        }
        for status in statuses
    }


async def _http_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    detail = exc.detail if isinstance(exc.detail, str) else HTTPStatus(exc.status_code).phrase
    if exc.status_code == 400:
        # FastAPI's own 400 for a body its JSON parser gave up on for a reason other than
        # syntax (nesting too deep): unreadable, like any malformed body, so 422 (API.md).
        return problem(
            422, "the request body is not valid JSON", [{"loc": ["body"], "msg": detail}]
        )
    if exc.status_code == 404 and detail == "Not Found":
        detail = f"no route matches {request.url.path}"
    elif exc.status_code == 405:
        detail = f"{request.method} is not allowed on {request.url.path}"
        return problem(405, detail, headers={"Allow": ", ".join(_allowed_methods(request))})
    return problem(exc.status_code, detail, headers=exc.headers)


def _allowed_methods(request: Request) -> list[str]:
    """Every method some route serves at the request's path (RFC 9110, 15.5.6): the router's
    own 405 names only the first matching route's, and one path has a route per method.

    The routes are the app's `state.routes` (see `honing.api.app.create_app`): included
    routers are not flattened into ``app.routes`` in every FastAPI release.
    """
    methods: set[str] = set()
    for route in request.app.state.routes:
        match, _ = route.matches(request.scope)
        if match != Match.NONE:
            methods |= getattr(route, "methods", None) or set()
    return sorted(methods)


async def _validation_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    errors = [{"loc": list(e.get("loc", ())), "msg": str(e.get("msg", ""))} for e in exc.errors()]
    return problem(422, "the request is not valid", errors)


async def _spec_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, SpecError)
    errors = [{"loc": ["body", *e["loc"]], "msg": e["msg"]} for e in exc.errors]
    return problem(422, "the request body is not valid", errors)


async def _not_found(request: Request, exc: Exception) -> JSONResponse:
    return problem(404, str(exc))


async def _unauthorized(request: Request, exc: Exception) -> JSONResponse:
    return problem(401, str(exc), headers={"WWW-Authenticate": "Bearer"})


async def _forbidden(request: Request, exc: Exception) -> JSONResponse:
    return problem(403, str(exc))


async def _conflict(request: Request, exc: Exception) -> JSONResponse:
    return problem(409, str(exc))


async def _unavailable(request: Request, exc: Exception) -> JSONResponse:
    log.warning("store unavailable", extra={"path": request.url.path, "error": str(exc)})
    return problem(
        503,
        "the store is unavailable; retry shortly",
        headers={"Retry-After": str(STORE_RETRY_AFTER)},
    )


async def _internal(request: Request, exc: Exception) -> JSONResponse:
    log.error("unhandled error", exc_info=exc, extra={"path": request.url.path})
    return problem(500, "internal error; the server log has the details")


def install_problem_handlers(app: FastAPI) -> None:
    """Register every handler on the app."""
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(SpecError, _spec_error)
    app.add_exception_handler(NotFound, _not_found)
    app.add_exception_handler(Unauthorized, _unauthorized)
    app.add_exception_handler(Forbidden, _forbidden)
    app.add_exception_handler(ConflictError, _conflict)
    app.add_exception_handler(StoreUnavailable, _unavailable)
    app.add_exception_handler(StateError, _internal)
    app.add_exception_handler(Exception, _internal)
