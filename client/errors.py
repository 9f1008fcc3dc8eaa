"""Errors raised by the honing client.

Exception hierarchy::

    ClientError
    ├── SettingsError          no server URL or token where one is needed, or a bad input file
    ├── ConnectionFailed       the server could not be reached, even after retries
    └── ProblemError           the server answered with an RFC 9457 problem document
        ├── ValidationFailed   400 or 422: the request was refused; ``errors`` lists the fields
        ├── Unauthorized       401: no token, or the server wants one
        ├── Forbidden          403: the token does not belong to this calibration
        ├── NotFound           404: no such calibration or run
        ├── Conflict           409: a different result was already recorded for the run
        ├── RateLimited        429: too many requests, still refused after retries
        └── ServerError        5xx: the server failed, still failing after retries

`str()` of every error is one line fit for a terminal: the problem's ``title`` and
``detail`` (and, for validation errors, each offending field).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

import httpx

__all__ = [
    "ClientError",
    "Conflict",
    "ConnectionFailed",
    "Forbidden",
    "NotFound",
    "PayloadTooLarge",
    "ProblemError",
    "RateLimited",
    "ServerError",
    "SettingsError",
    "Unauthorized",
    "ValidationFailed",
    "problem_from_response",
]


class ClientError(Exception):
    """Base class of every error the client raises on purpose."""


class SettingsError(ClientError):
    """Missing or unusable client settings or input files."""


class ConnectionFailed(ClientError):
    """The server could not be reached (after the configured retries)."""


class ProblemError(ClientError):
    """An error answer from the server, read from its RFC 9457 problem document."""

    def __init__(
        self,
        status: int,
        title: str,
        detail: str = "",
        type_: str = "about:blank",
        errors: list[dict[str, Any]] | None = None,
        retry_after: float | None = None,
    ) -> None:
        self.status = status
        self.title = title
        self.detail = detail
        self.type = type_
        self.errors = errors or []
        self.retry_after = retry_after
        super().__init__(self._one_line())

    def _one_line(self) -> str:
        text = f"{self.title} ({self.status})"
        if self.detail and self.detail != self.title:
            text += f": {self.detail}"
        fields = []
        for error in self.errors:
            loc = error.get("loc") or []
            path = ".".join(str(p) for p in loc if p != "body")
            msg = str(error.get("msg", ""))
            fields.append(f"{path}: {msg}" if path else msg)
        if fields:
            text += " [" + "; ".join(fields) + "]"
        return " ".join(text.split())


class ValidationFailed(ProblemError):
    """400 or 422: the request body or query was refused."""


class Unauthorized(ProblemError):
    """401: the call needs a token."""


class Forbidden(ProblemError):
    """403: the token does not fit this calibration (or the admin key is wrong)."""


class NotFound(ProblemError):
    """404: unknown calibration or run."""


class Conflict(ProblemError):
    """409: a different result is already recorded for this run."""


class PayloadTooLarge(ProblemError):
    """413: the request body is larger than the server accepts."""


class RateLimited(ProblemError):
    """429: the server asks the client to slow down."""


class ServerError(ProblemError):
    """5xx: the server failed to answer."""


_BY_STATUS: Mapping[int, type[ProblemError]] = {
    400: ValidationFailed,
    401: Unauthorized,
    403: Forbidden,
    404: NotFound,
    409: Conflict,
    413: PayloadTooLarge,
    422: ValidationFailed,
    429: RateLimited,
}


def problem_from_response(
    response: httpx.Response, retry_after: float | None = None
) -> ProblemError:
    """Build the matching `ProblemError` from an error response.

    A body that is not a problem document (a proxy's HTML page, for instance) still gives
    one readable line: the reason phrase and the start of the body.
    """
    status = response.status_code
    cls = _BY_STATUS.get(status, ServerError if status >= 500 else ProblemError)
    try:
        body = response.json()
    except (json.JSONDecodeError, UnicodeDecodeError):
        body = None
    if isinstance(body, Mapping) and ("title" in body or "detail" in body):
        errors = body.get("errors")
        return cls(
            status,
            str(body.get("title") or response.reason_phrase or "Error"),
            _text(body.get("detail")),
            str(body.get("type") or "about:blank"),
            [e for e in errors if isinstance(e, dict)] if isinstance(errors, list) else None,
            retry_after,
        )
    snippet = " ".join(response.text.split())[:200]
    return cls(status, response.reason_phrase or "Error", snippet, retry_after=retry_after)


def _text(value: Any) -> str:
    if value is None:
        return ""
    return value if isinstance(value, str) else json.dumps(value)
