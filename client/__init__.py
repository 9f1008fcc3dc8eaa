"""Thin HTTP client and command line of honing.

`Client` speaks the HTTP API; `Worker` runs a simulator command for leased points; the
errors are drawn in `honing.client.errors`. Only httpx and the standard library are needed.
"""

from honing.client._client import DEFAULT_URL, FINISHED, Client, Lease, RetryPolicy
from honing.client.errors import (
    ClientError,
    Conflict,
    ConnectionFailed,
    Forbidden,
    NotFound,
    PayloadTooLarge,
    ProblemError,
    RateLimited,
    ServerError,
    SettingsError,
    Unauthorized,
    ValidationFailed,
)
from honing.client.worker import Progress, RunResult, Worker, WorkerOptions

__all__ = [
    "DEFAULT_URL",
    "FINISHED",
    "Client",
    "ClientError",
    "Conflict",
    "ConnectionFailed",
    "Forbidden",
    "Lease",
    "NotFound",
    "PayloadTooLarge",
    "ProblemError",
    "Progress",
    "RateLimited",
    "RetryPolicy",
    "RunResult",
    "ServerError",
    "SettingsError",
    "Unauthorized",
    "ValidationFailed",
    "Worker",
    "WorkerOptions",
]
