"""The background refit loop: queued jobs to new engine states, one calibration at a time.

One job, `Refitter.run_job`:

1. take the calibration's refit lock (with expiry; a thread renews it while fitting, so a
   worker that dies simply lets it lapse and another worker retries the job);
2. load the state (with its version) and every finished run in completion order;
3. call the engine's `refit` outside any lock of the store;
4. write the new state and proposals with a compare-and-swap on the version, so a stale
   refit never overwrites a newer state;
5. drop the job, then ask `refit_due` again with fresh counts: results that arrived while
   fitting queue the next job themselves.

A refit that raises is retried after `retry_delay`; after `max_failures` in a row the
calibration is marked failed with the error kept.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import threading
import time
from collections.abc import Callable

from honing.api.metrics import Metrics
from honing.api.service import CalibrationService, budgeted, proposal_points, run_table
from honing.api.store import Store, StoreUnavailable
from honing.engine.rounds import refit, refit_due
from honing.engine.state import state_to_bytes

__all__ = ["Refitter"]

log = logging.getLogger("honing.api.refitter")


#: While the store is unavailable: seconds between polls, and between log lines.
OUTAGE_POLL = 2.0
OUTAGE_LOG_EVERY = 60.0


class Refitter:
    """Runs queued refit jobs of one store."""

    def __init__(
        self,
        store: Store,
        metrics: Metrics | None = None,
        lock_ttl: float = 30.0,
        max_failures: int = 3,
        retry_delay: float = 5.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.store = store
        self.metrics = metrics
        self.lock_ttl = lock_ttl
        self.max_failures = max_failures
        self.retry_delay = retry_delay
        self.clock = clock
        self.service = CalibrationService(store, metrics, clock)
        self.owner = f"{socket.gethostname()}:{os.getpid()}:{secrets.token_hex(4)}"

    def _outcome(self, outcome: str) -> str:
        if self.metrics is not None:
            self.metrics.refits.labels(outcome=outcome).inc()
        return outcome

    def step(self, limit: int = 16) -> list[str]:
        """Run every job that is due now (up to ``limit``); returns each job's outcome."""
        return [self.run_job(cid) for cid in self.store.due_refits(self.clock(), limit)]

    def run_job(self, calibration_id: str) -> str:
        """One job: 'written', 'stale', 'skipped', 'locked', 'failed' or 'retry'."""
        if not self.store.acquire_refit_lock(calibration_id, self.owner, self.lock_ttl):
            return "locked"
        stop = threading.Event()
        renewer = threading.Thread(
            target=self._renew, args=(calibration_id, stop), name="honing-refit-lock", daemon=True
        )
        renewer.start()
        try:
            return self._fit(calibration_id)
        finally:
            stop.set()
            renewer.join()
            self.store.release_refit_lock(calibration_id, self.owner)

    def _renew(self, calibration_id: str, stop: threading.Event) -> None:
        while not stop.wait(self.lock_ttl / 3):
            try:
                if not self.store.renew_refit_lock(calibration_id, self.owner, self.lock_ttl):
                    log.warning("refit lock lost", extra={"calibration": calibration_id})
                    return
            except StoreUnavailable as exc:
                log.warning("cannot renew refit lock", extra={"error": str(exc)})

    def _fit(self, calibration_id: str) -> str:
        meta = self.store.get_meta(calibration_id)
        if meta is None or meta.failed_error:
            self.store.finish_refit(calibration_id)
            return self._outcome("skipped")
        try:
            spec = budgeted(self.service.spec(calibration_id), meta)
            state = self.service.state(meta)
            records = self.store.finished_runs(calibration_id)
            finished = meta.done + meta.failed
            if not refit_due(spec, state, finished, meta.leased, meta.queued):
                self.store.finish_refit(calibration_id)
                return self._outcome("skipped")
            started = time.perf_counter()
            new = refit(spec, state, run_table(spec, records))
            elapsed = time.perf_counter() - started
            blob = state_to_bytes(new)
            points = proposal_points(spec, new)
        except StoreUnavailable:
            raise
        except Exception as exc:
            error = f"refit failed: {type(exc).__name__}: {exc}"
            log.exception("refit failed", extra={"calibration": calibration_id})
            failed = self.store.record_refit_failure(
                calibration_id, error, self.max_failures, self.clock() + self.retry_delay
            )
            return self._outcome("failed" if failed else "retry")
        if self.metrics is not None:
            self.metrics.refit_seconds.observe(elapsed)
        swapped = self.store.swap_state(
            calibration_id, meta.state_version, blob, new.round, new.status, points
        )
        self.store.finish_refit(calibration_id)
        self.service.schedule_refit(calibration_id)
        log.info(
            "refit",
            extra={
                "calibration": calibration_id,
                "round": new.round,
                "runs": len(records),
                "seconds": round(elapsed, 3),
                "swapped": swapped,
            },
        )
        return self._outcome("written" if swapped else "stale")

    def run_forever(self, stop: threading.Event, poll: float = 0.5) -> None:
        """Poll for due jobs until ``stop`` is set; store outages and errors are logged.

        An outage is logged when it begins, every `OUTAGE_LOG_EVERY` seconds while it lasts
        and when it ends, and polled at most every `OUTAGE_POLL` seconds: a store down at
        start-up used to log a line twice a second for as long as it stayed down.
        """
        down_since: float | None = None
        logged = 0.0
        while not stop.is_set():
            try:
                outcomes = self.step()
            except StoreUnavailable as exc:
                now = time.monotonic()
                if down_since is None:
                    down_since = logged = now
                    log.warning("store unavailable", extra={"error": str(exc)})
                elif now - logged >= OUTAGE_LOG_EVERY:
                    logged = now
                    log.warning(
                        "store still unavailable",
                        extra={"error": str(exc), "seconds": round(now - down_since)},
                    )
                stop.wait(max(poll, OUTAGE_POLL))
                continue
            except Exception:  # a long-lived worker logs a bug and keeps serving other jobs
                log.exception("refit loop error")
                outcomes = []
            if down_since is not None:
                log.info(
                    "store available again",
                    extra={"seconds": round(time.monotonic() - down_since)},
                )
                down_since = None
            if not outcomes or all(o == "locked" for o in outcomes):
                stop.wait(poll)
