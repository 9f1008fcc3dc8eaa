"""The storage contract every backend (Redis, SQLite) implements, and the records it returns.

A store keeps, per calibration: its metadata and counters, the engine state blob with a
version number (swapped only by compare-and-swap), the queue of points to hand out, and the
runs. Every method that changes runs is one atomic step that first expires overdue leases.
Points and results are JSON text the store never interprets.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import orjson

__all__ = [
    "CalibrationMeta",
    "LeaseResult",
    "NewCalibration",
    "RunRecord",
    "Store",
    "StoreUnavailable",
]


class StoreUnavailable(Exception):
    """The backing store cannot be reached or is too busy; the request may be retried."""


@dataclass(frozen=True)
class NewCalibration:
    """Everything written when a calibration is created."""

    id: str
    token_hash: str
    spec_json: str
    created_at: float
    state_blob: bytes
    round: int
    engine_status: str
    proposals: list[str]


@dataclass(frozen=True)
class CalibrationMeta:
    """A calibration's metadata and live counters, read in one step (without the spec)."""

    id: str
    token_hash: str
    created_at: float
    state_version: int
    round: int
    engine_status: str
    done: int
    failed: int
    leased: int
    queued: int
    failed_error: str | None
    refit_failures: int
    #: A refit job is queued or running (read in the same step as the rest).
    refit_pending: bool
    #: The run budget when it was raised after creation (`Store.set_budget`); None: the spec's.
    max_runs: int | None = None


@dataclass(frozen=True)
class RunRecord:
    """One run as stored. ``point`` and ``result`` are the parsed JSON the service wrote."""

    run_id: str
    seq: int
    state: str
    epoch: int
    worker: str | None
    leased_at: float | None
    lease_expires_at: float | None
    completed_at: float | None
    point: dict[str, Any]
    result: dict[str, Any] | None
    imported: bool

    @classmethod
    def from_fields(cls, fields: dict[str, str]) -> RunRecord:
        """Build a record from the flat string fields both backends keep."""

        def num(key: str) -> float | None:
            value = fields.get(key)
            return float(value) if value not in (None, "") else None

        result = fields.get("result")
        return cls(
            run_id=fields["run_id"],
            seq=int(fields["seq"]),
            state=fields["state"],
            epoch=int(fields["epoch"]),
            worker=fields.get("worker") or None,
            leased_at=num("leased_at"),
            lease_expires_at=num("lease_expires_at"),
            completed_at=num("completed_at"),
            point=orjson.loads(fields["point"]),
            result=orjson.loads(result) if result else None,
            imported=fields.get("imported") == "1",
        )


@dataclass(frozen=True)
class LeaseResult:
    """What one lease step did: the new runs, how many overdue leases it expired, and the
    calibration's metadata afterwards (None when there is no such calibration)."""

    runs: list[RunRecord]
    expired: int
    meta: CalibrationMeta | None


@dataclass(frozen=True)
class FinishResult:
    """What one report step did: how many overdue leases it expired first, and the
    calibration's metadata right after the write (None when nothing was written: the run
    changed since it was read, or it or its calibration is gone)."""

    meta: CalibrationMeta | None
    expired: int


@dataclass(frozen=True)
class ExtendResult:
    """What one lease extension did: how many overdue leases it expired first, the run's
    state afterwards (None when the run or its calibration does not exist) and, while it is
    leased, when its lease now ends."""

    state: str | None
    expired: int
    expires_at: float | None = None


class Store(Protocol):
    """Storage of calibrations, runs, engine states and refit jobs."""

    kind: str

    def ping(self) -> None:
        """Raise `StoreUnavailable` unless the store answers."""

    def close(self) -> None:
        """Release connections."""

    async def aclose(self) -> None:
        """Release the connections of the async methods (from the loop that used them)."""

    def startup_warnings(self) -> list[str]:
        """Configuration problems that put acknowledged data at risk."""

    # calibrations
    def create(self, calibration: NewCalibration) -> None:
        """Write a new calibration with its first state and proposals."""

    def get_meta(self, calibration_id: str) -> CalibrationMeta | None:
        """Metadata and counters, or None when the calibration does not exist."""

    async def get_meta_async(self, calibration_id: str) -> CalibrationMeta | None:
        """`get_meta` for the event loop (every request starts with it, for the token check)."""

    def get_spec(self, calibration_id: str) -> str | None:
        """The spec JSON (read apart from the metadata: it can be megabytes), or None."""

    def delete(self, calibration_id: str) -> bool:
        """Remove the calibration and everything under it; False when it did not exist."""

    def load_state(self, calibration_id: str) -> tuple[int, bytes] | None:
        """The state blob with its version, or None."""

    def swap_state(
        self,
        calibration_id: str,
        expected_version: int,
        blob: bytes,
        round_: int,
        engine_status: str,
        proposals: list[str],
    ) -> bool:
        """Replace state and proposal queue if the version is still ``expected_version``."""

    def set_budget(
        self,
        calibration_id: str,
        expected_version: int,
        max_runs: int,
        engine_status: str,
        blob: bytes | None,
    ) -> bool:
        """Set the run budget and the engine status, and the state blob unless None, if the
        version is still ``expected_version`` and no failure is recorded; the version moves on
        either way, so that a refit started under the old budget cannot write its state."""

    # runs
    async def lease_async(
        self,
        calibration_id: str,
        count: int,
        worker: str,
        now: float,
        lease_seconds: float,
        max_runs: int,
    ) -> LeaseResult:
        """Expire overdue leases, then hand out up to ``count`` points (re-queued first)
        while the calibration is open: engine status "collecting" and no failure recorded.
        ``max_runs`` is the spec's budget; a budget set since (`set_budget`) takes its place."""

    def expire(self, calibration_id: str, now: float) -> int:
        """Expire overdue leases; returns how many."""

    def extend_lease(
        self, calibration_id: str, run_id: str, now: float, expires_at: float, longest: float
    ) -> ExtendResult:
        """Expire overdue leases, then, if the run is still leased, move its lease's end to
        ``expires_at``, never earlier than it was and never later than ``longest`` seconds
        after the run was leased (the run's epoch stays: its result is expected as before)."""

    def get_run(self, calibration_id: str, run_id: str) -> RunRecord | None:
        """One run, or None."""

    async def finish_run_async(
        self,
        calibration_id: str,
        run_id: str,
        epoch: int,
        state: str,
        result_json: str,
        now: float,
    ) -> FinishResult:
        """Expire overdue leases, then record a result if the run's epoch is still ``epoch``.

        The result's metadata is the calibration's right after the write (so the caller can
        decide on a refit without another read); None means nothing was written: the run
        changed since it was read (expired or finished) or is gone, so read it again. Its
        count of expired leases holds either way.
        """

    def import_runs(
        self, calibration_id: str, items: list[tuple[str, str]], now: float
    ) -> list[str]:
        """Add finished runs ``(point_json, result_json)`` in one step; returns their ids."""

    def list_runs(self, calibration_id: str, state: str | None = None) -> list[RunRecord]:
        """Runs in creation order, optionally only those in one state."""

    def finished_runs(self, calibration_id: str) -> list[RunRecord]:
        """Done and failed runs in completion order."""

    # refit jobs
    def enqueue_refit(self, calibration_id: str, now: float) -> None:
        """Queue a refit job unless one is queued already."""

    def due_refits(self, now: float, limit: int) -> list[str]:
        """Calibration ids whose job is due by ``now``, oldest first."""

    def acquire_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        """Take the per-calibration refit lock for ``ttl`` seconds."""

    def renew_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        """Extend the lock if ``owner`` still holds it."""

    def release_refit_lock(self, calibration_id: str, owner: str) -> None:
        """Drop the lock if ``owner`` holds it."""

    def finish_refit(self, calibration_id: str) -> None:
        """Remove the job and reset the failure count after a refit."""

    def record_refit_failure(
        self, calibration_id: str, error: str, max_failures: int, retry_at: float
    ) -> bool:
        """Count a failed refit and retry it at ``retry_at``; after ``max_failures`` in a row,
        drop the job and mark the calibration failed with ``error`` (returns True)."""

    def refit_queue_depth(self) -> int:
        """Number of queued refit jobs."""
