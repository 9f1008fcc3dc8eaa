"""The service layer: every calibration operation, orchestrating the engine and the store.

Nothing here knows about HTTP. Request handlers call one method each; the refit worker uses
`run_table` and `proposal_points` to turn stored runs into engine input and engine output into
stored points. Engine states are cached per calibration by version, specs by id (both never
change under a given key).
"""

from __future__ import annotations

import base64
import dataclasses
import json
import re
import secrets
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, TypeVar

import numpy as np
import orjson
from anyio import to_thread

from honing.api.auth import check_token, hash_token, new_token
from honing.api.errors import Forbidden, NotFound, Unauthorized
from honing.api.metrics import Metrics
from honing.api.store import CalibrationMeta, NewCalibration, RunRecord, Store
from honing.engine.errors import ConflictError, SpecError
from honing.engine.rounds import (
    posterior_samples,
    prediction_error,
    raise_budget,
    refit_due,
    start,
    trust_index,
)
from honing.engine.spec import CalibrationSpec
from honing.engine.state import EngineState, RunTable, state_from_bytes, state_to_bytes

__all__ = [
    "CalibrationService",
    "LeaseOutcome",
    "proposal_points",
    "rfc3339",
    "run_table",
]

#: Seconds a client should wait before asking again for work that is not there yet.
RETRY_AFTER_SECONDS = 2
#: Engine statuses after which no more work is handed out.
FINAL_STATUSES = frozenset({"converged", "budget_exhausted", "failed"})
_CACHE_SIZE = 128
#: Runs leased by this instance, remembered so their report need not read them back first:
#: at most this many, and at most this many bytes of predictions (a run's prediction holds
#: every output value, and outputs may number 200,000).
_LEASED_CACHE_SIZE = 20_000
_LEASED_CACHE_BYTES = 64 * 2**20
#: Calibrations whose token hash is remembered (64 bytes each).
_TOKEN_CACHE_SIZE = 8192
# Ids become parts of store keys: anything else cannot name a calibration or run.
_CALIBRATION_ID = re.compile(r"[A-Za-z0-9_-]{1,64}")
_RUN_ID = re.compile(r"r[0-9]{1,15}")
#: Longest a run's lease can be extended to, in seconds after the run was leased: the longest
#: single lease a request may ask for (7 days).
LONGEST_HOLD = 604800.0
#: Why a run's lease can no longer be extended, by its state.
_LEASE_OVER = {
    "expired": "its lease ran out and its point was put back to be handed out again (its "
    "result is still kept)",
    "done": "its result is in",
    "failed": "its failure is in",
}
#: A report re-reads a run that changed under it (expired or finished meanwhile) this often.
_REPORT_ATTEMPTS = 5
#: Tries of the budget's compare-and-swap against refits that keep moving the state on.
_BUDGET_ATTEMPTS = 5
#: Output values above which a report's checks run in a worker thread, off the event loop.
LOOP_OUTPUT_VALUES = 2000

T = TypeVar("T")


def rfc3339(timestamp: float | None) -> str | None:
    """Unix seconds as an RFC 3339 UTC string with milliseconds."""
    if timestamp is None:
        return None
    text = datetime.fromtimestamp(timestamp, UTC).isoformat(timespec="milliseconds")
    return text.replace("+00:00", "Z")


def _prediction_bytes(record: RunRecord) -> int:
    """Characters of a run's encoded prediction, what dominates its size in memory."""
    prediction = record.point.get("prediction")
    return len(prediction) if isinstance(prediction, str) else 0


def _encode_prediction(row: np.ndarray) -> str:
    return base64.b64encode(np.ascontiguousarray(row, dtype="<f4").tobytes()).decode()


def _decode_prediction(text: str | None) -> np.ndarray | None:
    if not text:
        return None
    return np.frombuffer(base64.b64decode(text), dtype="<f4").astype(float)


def proposal_points(spec: CalibrationSpec, state: EngineState) -> list[str]:
    """The state's proposals as point JSON: parameters, whitened prediction (base64 float32)
    and the round that proposed them."""
    points = []
    for i, theta in enumerate(state.proposals):
        prediction = (
            _encode_prediction(state.predictions[i]) if i < len(state.predictions) else None
        )
        points.append(
            json.dumps(
                {
                    "parameters": spec.parameters_dict(theta),
                    "prediction": prediction,
                    "round": state.round,
                }
            )
        )
    return points


def _dumps(value: Any) -> str:
    """JSON text of a result (orjson: exact shortest float repr, several times faster than
    the standard library on hundreds of numbers)."""
    return orjson.dumps(value).decode()


def _flat_outputs(spec: CalibrationSpec, outputs: Mapping[str, list[float]]) -> np.ndarray:
    return np.concatenate([np.asarray(outputs[o.name], dtype=float) for o in spec.observations])


def run_table(spec: CalibrationSpec, records: Sequence[RunRecord]) -> RunTable:
    """Engine input from finished runs in completion order (failed rows are NaN)."""
    n = len(records)
    if n == 0:
        return RunTable.empty(spec.dim, spec.output_size)
    theta = np.array([[r.point["parameters"][name] for name in spec.names] for r in records])
    outputs = np.full((n, spec.output_size), np.nan)
    failed = np.zeros(n, dtype=bool)
    trust = np.ones(n)
    error = np.full(n, np.nan)
    for i, r in enumerate(records):
        result = r.result or {}
        if r.state == "failed" or result.get("outputs") is None:
            failed[i] = True
            continue
        outputs[i] = _flat_outputs(spec, result["outputs"])
        trust[i] = float(result.get("trust") or 1.0)
        error[i] = prediction_error(spec, _decode_prediction(r.point.get("prediction")), outputs[i])
    return RunTable(theta, outputs, failed, trust, error)


def budgeted(spec: CalibrationSpec, meta: CalibrationMeta) -> CalibrationSpec:
    """The spec with the run budget in force: the one set after creation, if any."""
    if meta.max_runs is None or meta.max_runs == spec.max_runs:
        return spec
    return dataclasses.replace(spec, max_runs=meta.max_runs)


def _due(spec: CalibrationSpec, state: EngineState, meta: CalibrationMeta) -> bool:
    """Whether the finished runs in ``meta`` call for a refit of ``state`` (never once the
    calibration has failed). ``meta`` must be fresh: read after the write that may complete
    a batch; its budget is the one in force."""
    done = meta.done + meta.failed
    return not meta.failed_error and refit_due(
        budgeted(spec, meta), state, done, meta.leased, meta.queued
    )


def _checked_outputs(
    spec: CalibrationSpec, outputs: Mapping[str, Any] | None
) -> tuple[np.ndarray | None, dict[str, list[float]] | None]:
    """A report's outputs validated and flattened, and split back per channel as stored
    (None for a failed run)."""
    if outputs is None:
        return None, None
    flat = spec.flatten_outputs(outputs)
    return flat, spec.split_outputs(flat)


def _result_json(
    spec: CalibrationSpec,
    record: RunRecord,
    flat: np.ndarray | None,
    normalised: dict[str, list[float]] | None,
    error: str | None,
) -> tuple[float | None, str]:
    """The trust of a result against the prediction made when its run was leased, and the
    result as stored."""
    trust = None
    if flat is not None:
        predicted = _decode_prediction(record.point.get("prediction"))
        trust = float(trust_index(spec, predicted, flat))
    return trust, _dumps({"outputs": normalised, "error": error, "trust": trust})


def _missing(calibration_id: str) -> NotFound:
    """The 404 for a calibration that does not exist (never created, deleted, or lost)."""
    return NotFound(f"calibration {calibration_id!r} does not exist")


def _settled(
    record: RunRecord,
    new_state: str,
    normalised: dict[str, list[float]] | None,
    error: str | None,
) -> ReportOutcome:
    """A report for a run that already has its result: the same result again is a no-op,
    a different one a conflict."""
    previous = record.result or {}
    same = record.state == new_state and (
        previous.get("outputs") == normalised
        if new_state == "done"
        else previous.get("error") == error
    )
    if not same:
        raise ConflictError(
            f"run {record.run_id!r} already has a different result ({record.state})"
        )
    return ReportOutcome(record.run_id, record.state, previous.get("trust"))


@dataclass(frozen=True)
class LeaseOutcome:
    """Leased runs as API dicts, the calibration status, and a retry hint when empty."""

    runs: list[dict[str, Any]]
    status: str
    retry_after: int | None


@dataclass(frozen=True)
class ReportOutcome:
    """The run's state and trust after a report."""

    run_id: str
    state: str
    trust: float | None


class CalibrationService:
    """Calibration operations on one store."""

    def __init__(
        self,
        store: Store,
        metrics: Metrics | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.store = store
        self.metrics = metrics
        self.clock = clock
        self._lock = threading.Lock()
        self._specs: OrderedDict[str, CalibrationSpec] = OrderedDict()
        self._states: OrderedDict[str, tuple[int, EngineState]] = OrderedDict()
        self._leased: OrderedDict[tuple[str, str], RunRecord] = OrderedDict()
        self._leased_bytes = 0
        self._token_hashes: OrderedDict[str, str] = OrderedDict()

    # caches

    def _cached_spec(self, calibration_id: str) -> CalibrationSpec | None:
        """The spec if it is cached (safe on the event loop: no I/O)."""
        with self._lock:
            spec = self._specs.get(calibration_id)
            if spec is not None:
                self._specs.move_to_end(calibration_id)
            return spec

    def spec(self, calibration_id: str) -> CalibrationSpec:
        """The parsed spec of a calibration (cached)."""
        spec = self._cached_spec(calibration_id)
        if spec is not None:
            return spec
        text = self.store.get_spec(calibration_id)
        if text is None:
            raise _missing(calibration_id)
        spec = CalibrationSpec.from_dict(json.loads(text), stored=True)
        with self._lock:
            self._specs[calibration_id] = spec
            while len(self._specs) > _CACHE_SIZE:
                self._specs.popitem(last=False)
        return spec

    async def _spec_async(self, calibration_id: str) -> CalibrationSpec:
        # From the cache on the event loop; a first read goes to a worker thread.
        spec = self._cached_spec(calibration_id)
        return spec if spec is not None else await to_thread.run_sync(self.spec, calibration_id)

    def _cached_state(self, meta: CalibrationMeta) -> EngineState | None:
        """The state of ``meta``'s version if it is cached (safe on the event loop)."""
        with self._lock:
            cached = self._states.get(meta.id)
            if cached is not None and cached[0] == meta.state_version:
                self._states.move_to_end(meta.id)
                return cached[1]
        return None

    def state(self, meta: CalibrationMeta) -> EngineState:
        """The calibration's current engine state (cached by version)."""
        cached = self._cached_state(meta)
        if cached is not None:
            return cached
        loaded = self.store.load_state(meta.id)
        if loaded is None:
            raise _missing(meta.id)
        version, blob = loaded
        state = state_from_bytes(blob)
        with self._lock:
            self._states[meta.id] = (version, state)
            while len(self._states) > _CACHE_SIZE:
                self._states.popitem(last=False)
        return state

    def _forget(self, calibration_id: str) -> None:
        with self._lock:
            self._specs.pop(calibration_id, None)
            self._states.pop(calibration_id, None)
            self._token_hashes.pop(calibration_id, None)

    def _remember_leased(self, calibration_id: str, records: Sequence[RunRecord]) -> None:
        with self._lock:
            for record in records:
                self._drop_leased((calibration_id, record.run_id))
                self._leased[(calibration_id, record.run_id)] = record
                self._leased_bytes += _prediction_bytes(record)
            while len(self._leased) > _LEASED_CACHE_SIZE or (
                self._leased and self._leased_bytes > _LEASED_CACHE_BYTES
            ):
                self._drop_leased(next(iter(self._leased)))

    def _leased_record(self, calibration_id: str, run_id: str) -> RunRecord | None:
        # A first guess only: the epoch fence of finish_run rejects it if the run has moved on.
        with self._lock:
            return self._drop_leased((calibration_id, run_id))

    def _drop_leased(self, key: tuple[str, str]) -> RunRecord | None:
        """Remove one remembered lease (the caller holds the lock); the record, if any."""
        record = self._leased.pop(key, None)
        if record is not None:
            self._leased_bytes -= _prediction_bytes(record)
        return record

    def _count(self, state: str, n: int = 1) -> None:
        if self.metrics is not None and n:
            self.metrics.runs.labels(state=state).inc(n)

    # access

    def meta(self, calibration_id: str) -> CalibrationMeta:
        """Metadata of an existing calibration; `NotFound` otherwise."""
        meta = None
        if _CALIBRATION_ID.fullmatch(calibration_id):
            meta = self.store.get_meta(calibration_id)
        if meta is None:
            raise _missing(calibration_id)
        return meta

    async def authorize(self, calibration_id: str, token: str | None) -> str:
        """The calibration id once the token checks out: 404 first for an unknown id (whatever
        the token), then the token against the calibration's hash.

        A calibration's token hash never changes and ids are never reused, so hashes are
        cached: most requests are let in without a store read. A calibration deleted through
        another replica passes here with the right token, and the operation itself then
        answers 404; with a wrong or missing one the store is read again, so that it answers
        404 too rather than 401 or 403.
        """
        if not _CALIBRATION_ID.fullmatch(calibration_id):
            raise _missing(calibration_id)
        with self._lock:
            expected = self._token_hashes.get(calibration_id)
        cached = expected is not None
        if expected is None:
            meta = await self.store.get_meta_async(calibration_id)
            if meta is None:
                raise _missing(calibration_id)
            expected = meta.token_hash
            with self._lock:
                self._token_hashes[calibration_id] = expected
                while len(self._token_hashes) > _TOKEN_CACHE_SIZE:
                    self._token_hashes.popitem(last=False)
        try:
            check_token(token, expected)
        except (Unauthorized, Forbidden):
            if cached and await self.store.get_meta_async(calibration_id) is None:
                self._forget(calibration_id)
                raise _missing(calibration_id) from None
            raise
        return calibration_id

    def status(self, meta: CalibrationMeta) -> str:
        """collecting, fitting, converged, budget_exhausted or failed."""
        if meta.failed_error:
            return "failed"
        if meta.engine_status != "collecting":
            return meta.engine_status
        if meta.refit_pending:
            return "fitting"
        return "collecting"

    # calibrations

    def create(self, data: Mapping[str, Any]) -> tuple[str, str, str]:
        """Validate a spec, open round 0 and store it; returns (id, token, status)."""
        spec = CalibrationSpec.from_dict(data)
        state = start(spec)
        calibration_id = secrets.token_hex(8)
        token = new_token()
        self.store.create(
            NewCalibration(
                id=calibration_id,
                token_hash=hash_token(token),
                spec_json=json.dumps(spec.to_dict(), allow_nan=False),
                created_at=self.clock(),
                state_blob=state_to_bytes(state),
                round=state.round,
                engine_status=state.status,
                proposals=proposal_points(spec, state),
            )
        )
        return calibration_id, token, state.status

    def current_meta(self, calibration_id: str) -> CalibrationMeta:
        """`meta` with overdue leases expired first, so that reads show them as expired (a
        lease or a report would expire them anyway, but either may be a long way off)."""
        meta = self.meta(calibration_id)
        if meta.leased:
            expired = self.store.expire(calibration_id, self.clock())
            if expired:
                self._count("expired", expired)
                meta = self.meta(calibration_id)
        return meta

    def describe(self, calibration_id: str) -> dict[str, Any]:
        """Spec (with the budget in force), status, counts and round of a calibration."""
        meta = self.current_meta(calibration_id)
        spec = budgeted(self.spec(calibration_id), meta)
        return {
            "id": meta.id,
            "name": spec.name,
            "status": self.status(meta),
            "round": meta.round,
            "runs_completed": meta.done,
            "runs_failed": meta.failed,
            "runs_leased": meta.leased,
            "runs_queued": meta.queued,
            "created_at": rfc3339(meta.created_at),
            "error": meta.failed_error,
            "spec": spec.to_dict(),
        }

    def raise_budget(self, calibration_id: str, max_runs: int) -> dict[str, Any]:
        """Allow up to ``max_runs`` runs in all; a calibration the old budget stopped collects
        again from where it stood (`honing.engine.rounds.raise_budget`). Returns `describe`.

        One compare-and-swap on the state version, refused by the store once the calibration
        has failed: a refit that began under the old budget fails its swap and runs again
        under the new one. The current budget again answers as a success and changes nothing.
        """
        for _ in range(_BUDGET_ATTEMPTS):
            meta = self.meta(calibration_id)
            state = self.state(meta)
            current = budgeted(self.spec(calibration_id), meta)
            if meta.failed_error and max_runs != current.max_runs:
                raise ConflictError("the calibration has failed; a larger budget cannot reopen it")
            spent = meta.done + meta.failed + meta.leased
            spec, reopened = raise_budget(current, state, max_runs, spent)
            blob = None if reopened is state else state_to_bytes(reopened)
            if spec is current or self.store.set_budget(
                calibration_id, meta.state_version, spec.max_runs, reopened.status, blob
            ):
                # Also after a repeat of a request whose answer was lost: the refit it may
                # have been unable to queue is queued now.
                self.schedule_refit(calibration_id)
                return self.describe(calibration_id)
        raise ConflictError("the calibration kept changing while its budget was raised; retry")

    def delete(self, calibration_id: str) -> None:
        """Remove a calibration and all its runs."""
        if not self.store.delete(calibration_id):
            raise _missing(calibration_id)
        self._forget(calibration_id)

    # runs

    async def lease(
        self, calibration_id: str, count: int, worker: str, lease_seconds: float
    ) -> LeaseOutcome:
        """Hand out up to ``count`` points; never blocks on a refit. One store step: it hands
        out nothing once the calibration is closed, and returns the metadata for the status."""
        spec = await self._spec_async(calibration_id)
        result = await self.store.lease_async(
            calibration_id, count, worker, self.clock(), lease_seconds, spec.max_runs
        )
        if result.meta is None:
            raise _missing(calibration_id)
        status = self.status(result.meta)
        self._count("expired", result.expired)
        self._count("leased", len(result.runs))
        self._remember_leased(calibration_id, result.runs)
        runs = [
            {
                "run_id": r.run_id,
                "parameters": r.point["parameters"],
                "lease_expires_at": rfc3339(r.lease_expires_at),
            }
            for r in result.runs
        ]
        retry = None if runs or status in FINAL_STATUSES else RETRY_AFTER_SECONDS
        return LeaseOutcome(runs, status, retry)

    def extend_lease(
        self, calibration_id: str, run_id: str, lease_seconds: float
    ) -> dict[str, Any]:
        """Keep a leased run for ``lease_seconds`` more from now, so that a run longer than
        its first lease is not handed out again: never earlier than the lease already ends,
        never later than `LONGEST_HOLD` after the run was leased (so a run that hangs cannot
        hold its point for good). 409 once the lease is over (the run expired and its point
        was re-queued, or its result is in; a late result is still kept)."""
        now = self.clock()
        result = None
        if _RUN_ID.fullmatch(run_id) is not None:  # ids become store keys: as `report` does
            result = self.store.extend_lease(
                calibration_id, run_id, now, now + lease_seconds, LONGEST_HOLD
            )
            self._count("expired", result.expired)
        if result is None or result.state is None:
            self.meta(calibration_id)  # 404 for the calibration first, if it is gone
            raise NotFound(f"run {run_id!r} does not exist in calibration {calibration_id!r}")
        if result.state != "leased":
            raise ConflictError(
                f"run {run_id!r} is {result.state}, no longer leased: "
                + _LEASE_OVER.get(result.state, "its lease cannot be extended")
            )
        return {
            "run_id": run_id,
            "state": "leased",
            "lease_expires_at": rfc3339(result.expires_at),
        }

    async def report(
        self,
        calibration_id: str,
        run_id: str,
        outputs: Mapping[str, Any] | None,
        error: str | None,
    ) -> ReportOutcome:
        """Record one result: validated, trust computed, fenced by the run's epoch.

        Runs on the event loop, the store step awaited. Checking the outputs and the trust
        index take about 0.06 ms for 300 values and 1.5 ms for 15,000: above
        `LOOP_OUTPUT_VALUES` they go to a worker thread, so one long result does not hold up
        every other request.
        """
        spec = await self._spec_async(calibration_id)
        flat, normalised = await self._compute(spec, _checked_outputs, spec, outputs)
        new_state = "failed" if flat is None else "done"
        known = _RUN_ID.fullmatch(run_id) is not None
        record = self._leased_record(calibration_id, run_id) if known else None
        for _ in range(_REPORT_ATTEMPTS):
            if record is None and known:
                record = await to_thread.run_sync(self.store.get_run, calibration_id, run_id)
            if record is None:
                if await self.store.get_meta_async(calibration_id) is None:
                    # Gone while the result was on its way (deleted, or the store lost it):
                    # say so, rather than that the run does not exist.
                    raise _missing(calibration_id)
                raise NotFound(f"run {run_id!r} does not exist in calibration {calibration_id!r}")
            if record.state in ("done", "failed"):
                outcome = _settled(record, new_state, normalised, error)
                # A repeat may follow an answer lost after the write, before the refit was
                # queued: check again, so the retry queues it.
                meta = await self.store.get_meta_async(calibration_id)
                if meta is not None:
                    await self._schedule_async(spec, meta)
                return outcome
            trust, result = await self._compute(
                spec, _result_json, spec, record, flat, normalised, error
            )
            finished = await self.store.finish_run_async(
                calibration_id, run_id, record.epoch, new_state, result, self.clock()
            )
            self._count("expired", finished.expired)
            if finished.meta is not None:
                self._count(new_state)
                await self._schedule_async(spec, finished.meta)
                return ReportOutcome(run_id, new_state, trust)
            record = None  # it changed under us: read it again
        raise ConflictError(f"run {run_id!r} kept changing while its result was written")

    @staticmethod
    async def _compute(spec: CalibrationSpec, fn: Callable[..., T], *args: Any) -> T:
        """``fn(*args)`` on the event loop for short outputs, in a worker thread for long."""
        if spec.output_size > LOOP_OUTPUT_VALUES:
            return await to_thread.run_sync(fn, *args)
        return fn(*args)

    def import_runs(self, calibration_id: str, runs: Sequence[Mapping[str, Any]]) -> int:
        """Add runs evaluated elsewhere, all or nothing, as done with trust 1."""
        spec = self.spec(calibration_id)
        errors: list[tuple[list[str | int], str]] = []
        items: list[tuple[str, str]] = []
        for i, run in enumerate(runs):
            try:
                theta = spec.theta_from_dict(run.get("parameters"), ("runs", i, "parameters"))
                flat = spec.flatten_outputs(run.get("outputs"))
            except SpecError as exc:
                for e in exc.errors:
                    loc = list(e["loc"])
                    if loc[:2] != ["runs", i]:
                        loc = ["runs", i, *loc]
                    errors.append((loc, str(e["msg"])))
                continue
            point = {"parameters": spec.parameters_dict(theta), "prediction": None, "round": -1}
            result = {"outputs": spec.split_outputs(flat), "error": None, "trust": 1.0}
            items.append((json.dumps(point), _dumps(result)))
        if errors:
            raise SpecError(errors)
        if not items:
            return 0
        ids = self.store.import_runs(calibration_id, items, self.clock())
        if not ids:
            raise _missing(calibration_id)
        self._count("imported", len(ids))
        self.schedule_refit(calibration_id)
        return len(ids)

    def schedule_refit(self, calibration_id: str) -> bool:
        """Queue a refit when the results since the last fit call for one."""
        meta = self.store.get_meta(calibration_id)
        return meta is not None and self._schedule(meta)

    def _schedule(self, meta: CalibrationMeta) -> bool:
        if not _due(self.spec(meta.id), self.state(meta), meta):
            return False
        self.store.enqueue_refit(meta.id, self.clock())
        return True

    async def _schedule_async(self, spec: CalibrationSpec, meta: CalibrationMeta) -> None:
        """`_schedule` from the event loop: the state from the cache (a worker thread reads
        it otherwise), and the queue write in a thread when a batch is complete."""
        state = self._cached_state(meta)
        if state is None:
            state = await to_thread.run_sync(self.state, meta)
        if _due(spec, state, meta):
            await to_thread.run_sync(self.store.enqueue_refit, meta.id, self.clock())

    def runs(self, calibration_id: str, state: str | None = None) -> list[dict[str, Any]]:
        """Every run (optionally in one state) as API dicts, in creation order."""
        self.current_meta(calibration_id)  # and 404 for a calibration deleted meanwhile
        return self._run_views(calibration_id, state)

    def _run_views(self, calibration_id: str, state: str | None = None) -> list[dict[str, Any]]:
        return [self.run_view(r) for r in self.store.list_runs(calibration_id, state)]

    @staticmethod
    def run_view(record: RunRecord) -> dict[str, Any]:
        """One run as the API shows it."""
        result = record.result or {}
        return {
            "run_id": record.run_id,
            "parameters": record.point["parameters"],
            "state": record.state,
            "outputs": result.get("outputs"),
            "error": result.get("error"),
            "trust": result.get("trust"),
            "worker": record.worker,
            "leased_at": rfc3339(record.leased_at),
            "lease_expires_at": rfc3339(record.lease_expires_at),
            "completed_at": rfc3339(record.completed_at),
            "imported": record.imported,
        }

    # posterior

    def posterior(self, calibration_id: str) -> dict[str, Any]:
        """The latest posterior summary with live status and counts."""
        meta = self.meta(calibration_id)
        state = self.state(meta)
        summary = dict(state.summary)
        # The engine's count is of the successful runs its latest fit used; the live counts
        # replace it, and it stays beside them as runs_fitted.
        summary["runs_fitted"] = summary.get("runs_completed", 0)
        summary["round"] = state.round
        summary["status"] = self.status(meta)
        summary["runs_completed"] = meta.done
        summary["runs_failed"] = meta.failed
        return summary

    def samples(self, calibration_id: str, count: int) -> tuple[list[str], np.ndarray]:
        """Up to ``count`` posterior draws with their column names."""
        meta = self.meta(calibration_id)
        names, draws = posterior_samples(self.spec(calibration_id), self.state(meta), count)
        return list(names), np.asarray(draws, dtype=float)

    def report_inputs(
        self, calibration_id: str
    ) -> tuple[CalibrationSpec, EngineState, list[dict[str, Any]]]:
        """What the HTML report needs: spec, state and runs."""
        meta = self.meta(calibration_id)
        spec = budgeted(self.spec(calibration_id), meta)
        return spec, self.state(meta), self._run_views(calibration_id)
