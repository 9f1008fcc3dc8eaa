"""Errors of the service layer, free of HTTP types; `honing.api.problems` maps them to statuses.

Exception hierarchy (besides the engine's `SpecError` for invalid input and `ConflictError`
for a second, different result, and the store's `StoreUnavailable`)::

    ServiceError
    ├── NotFound        no such calibration, run or route
    ├── Unauthorized    no credentials where they are needed
    └── Forbidden       credentials that do not match
"""

from __future__ import annotations

__all__ = ["Forbidden", "NotFound", "ServiceError", "Unauthorized"]


class ServiceError(Exception):
    """Base class of the service layer's own errors."""


class NotFound(ServiceError):
    """The calibration or run does not exist."""


class Unauthorized(ServiceError):
    """A bearer token is needed and none came."""


class Forbidden(ServiceError):
    """The bearer token does not match."""
