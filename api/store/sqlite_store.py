"""SQLite backend of the `Store` contract, for one machine (the embedded default).

WAL journal with ``synchronous=FULL`` so an acknowledged result survives a power cut; every
write is one ``BEGIN IMMEDIATE`` transaction (the write lock is taken up front, so two writers
never both read and then collide); a busy timeout lets concurrent writers queue. Each thread
has its own connection.
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from anyio import to_thread

from honing.api.store.base import (
    CalibrationMeta,
    ExtendResult,
    FinishResult,
    LeaseResult,
    NewCalibration,
    RunRecord,
    StoreUnavailable,
)

__all__ = ["SqliteStore"]

BUSY_TIMEOUT_MS = 30_000

_SCHEMA = """
CREATE TABLE IF NOT EXISTS calibrations (
    id TEXT PRIMARY KEY,
    token_hash TEXT NOT NULL,
    spec TEXT NOT NULL,
    created_at REAL NOT NULL,
    state BLOB NOT NULL,
    state_version INTEGER NOT NULL,
    round INTEGER NOT NULL,
    engine_status TEXT NOT NULL,
    seq INTEGER NOT NULL DEFAULT 0,
    done INTEGER NOT NULL DEFAULT 0,
    failed INTEGER NOT NULL DEFAULT 0,
    leased INTEGER NOT NULL DEFAULT 0,
    failed_error TEXT,
    refit_failures INTEGER NOT NULL DEFAULT 0,
    max_runs INTEGER
);
-- Points to hand out; queue 0 = re-queued points of expired runs (first), 1 = proposals.
CREATE TABLE IF NOT EXISTS queue (
    pos INTEGER PRIMARY KEY AUTOINCREMENT,
    calibration_id TEXT NOT NULL,
    kind INTEGER NOT NULL,
    point TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS queue_by_calibration ON queue (calibration_id, kind, pos);
CREATE TABLE IF NOT EXISTS runs (
    calibration_id TEXT NOT NULL,
    run_id TEXT NOT NULL,
    seq INTEGER NOT NULL,
    state TEXT NOT NULL,
    epoch INTEGER NOT NULL,
    worker TEXT,
    leased_at REAL,
    lease_expires_at REAL,
    completed_at REAL,
    finish_order INTEGER,
    point TEXT NOT NULL,
    result TEXT,
    imported INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (calibration_id, run_id)
);
CREATE INDEX IF NOT EXISTS runs_by_seq ON runs (calibration_id, seq);
CREATE INDEX IF NOT EXISTS runs_leased ON runs (calibration_id, state, lease_expires_at);
CREATE INDEX IF NOT EXISTS runs_finished ON runs (calibration_id, finish_order);
CREATE TABLE IF NOT EXISTS refit_jobs (
    calibration_id TEXT PRIMARY KEY,
    due_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS refit_locks (
    calibration_id TEXT PRIMARY KEY,
    owner TEXT NOT NULL,
    expires_at REAL NOT NULL
);
"""

_RUN_COLUMNS = (
    "run_id, seq, state, epoch, worker, leased_at, lease_expires_at, completed_at, point, "
    "result, imported"
)


def path_from_url(url: str) -> Path:
    """``sqlite:///relative.db`` or ``sqlite:////abs/path.db`` to a file path."""
    if not url.startswith("sqlite:///"):
        raise ValueError(f"not a sqlite URL: {url!r} (expected sqlite:///file.db)")
    return Path(url[len("sqlite:///") :])


def _exists(db: sqlite3.Connection, calibration_id: str) -> bool:
    """Whether the calibration exists (inside the caller's transaction)."""
    row = db.execute("SELECT 1 FROM calibrations WHERE id = ?", (calibration_id,)).fetchone()
    return row is not None


def _record(row: sqlite3.Row) -> RunRecord:
    fields = {k: "" if row[k] is None else str(row[k]) for k in row.keys()}
    fields["imported"] = "1" if row["imported"] else "0"
    return RunRecord.from_fields(fields)


#: Primary SQLite result codes that say the file cannot be written now (a full disk, a
#: read-only file, an I/O error, a lock held too long): the store is unavailable (503), not
#: broken (500).
_UNAVAILABLE_CODES = frozenset(
    {
        sqlite3.SQLITE_FULL,
        sqlite3.SQLITE_READONLY,
        sqlite3.SQLITE_IOERR,
        sqlite3.SQLITE_BUSY,
        sqlite3.SQLITE_LOCKED,
        sqlite3.SQLITE_CANTOPEN,
    }
)


#: Of those, the codes of a lock another connection holds.
_BUSY_CODES = frozenset({sqlite3.SQLITE_BUSY, sqlite3.SQLITE_LOCKED})


def _primary_code(exc: sqlite3.OperationalError) -> int:
    """An error's primary SQLite result code (extended codes keep it in their low byte)."""
    return int(getattr(exc, "sqlite_errorcode", 0)) & 0xFF


def _unavailable(exc: sqlite3.OperationalError) -> bool:
    """Whether an error says the file cannot be written now."""
    return _primary_code(exc) in _UNAVAILABLE_CODES


def _rollback(db: sqlite3.Connection) -> None:
    """Roll back what is still open: after a failed COMMIT (a full disk, say) SQLite has
    already rolled back, and a second ROLLBACK would raise over the error that matters."""
    if db.in_transaction:
        db.execute("ROLLBACK")


class SqliteStore:
    """`Store` on one SQLite file."""

    kind = "sqlite"

    def __init__(self, url: str) -> None:
        self.path = path_from_url(url)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._local = threading.local()
        self._all: list[sqlite3.Connection] = []
        self._lock = threading.Lock()
        # Reentrant, so that a nested write fails as SQLite refuses a nested BEGIN, rather
        # than deadlocking.
        self._writer = threading.RLock()
        self._conn().executescript(_SCHEMA)
        self._add_missing_columns()
        self._check_writable()

    def _add_missing_columns(self) -> None:
        """Columns added since a file was created: a budget raised after creation."""
        with self._write() as db:
            columns = {row[1] for row in db.execute("PRAGMA table_info(calibrations)")}
            if "max_runs" not in columns:
                db.execute("ALTER TABLE calibrations ADD COLUMN max_runs INTEGER")

    def _check_writable(self) -> None:
        """One real write at start-up: a file this process cannot write (read-only, on a full
        disk) is then one clear error, not a server that answers healthy and fails every
        write."""
        with self._write() as db:
            (version,) = db.execute("PRAGMA user_version").fetchone()
            db.execute(f"PRAGMA user_version = {int(version)}")

    def _conn(self) -> sqlite3.Connection:
        conn = getattr(self._local, "conn", None)
        if conn is None:
            conn = sqlite3.connect(
                self.path,
                timeout=BUSY_TIMEOUT_MS / 1000,
                isolation_level=None,
                check_same_thread=False,
            )
            conn.row_factory = sqlite3.Row
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            conn.execute("PRAGMA journal_mode = WAL")
            conn.execute("PRAGMA synchronous = FULL")
            self._local.conn = conn
            with self._lock:
                self._all.append(conn)
        return conn

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        # The writers of this store queue on a lock rather than on SQLite's busy handler,
        # which polls with sleeps of up to 100 ms: under many concurrent requests those
        # sleeps, not the commits, would set the pace. Other connections (refit workers,
        # another store on the file) still meet the busy timeout. One deadline covers both
        # waits, so a writer gives up (503) after the busy timeout whatever queues ahead.
        deadline = time.monotonic() + BUSY_TIMEOUT_MS / 1000
        if not self._writer.acquire(timeout=BUSY_TIMEOUT_MS / 1000):
            raise StoreUnavailable("sqlite busy: earlier writes did not finish in time")
        db = self._conn()
        try:
            remaining_ms = max(int((deadline - time.monotonic()) * 1000), 1)
            db.execute(f"PRAGMA busy_timeout = {remaining_ms}")
            try:
                db.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as exc:
                busy = _primary_code(exc) in _BUSY_CODES
                raise StoreUnavailable(
                    f"sqlite {'busy' if busy else 'cannot write'}: {exc}"
                ) from exc
            try:
                yield db
            except sqlite3.OperationalError as exc:
                _rollback(db)
                if _unavailable(exc):
                    raise StoreUnavailable(f"sqlite write failed: {exc}") from exc
                raise
            except BaseException:
                _rollback(db)
                raise
            try:
                db.execute("COMMIT")
            except sqlite3.OperationalError as exc:
                _rollback(db)
                raise StoreUnavailable(f"sqlite commit failed: {exc}") from exc
        finally:
            db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            self._writer.release()

    @contextmanager
    def _read(self) -> Iterator[sqlite3.Connection]:
        # One deferred transaction so multi-statement reads see one snapshot.
        db = self._conn()
        db.execute("BEGIN")
        try:
            yield db
        finally:
            db.execute("COMMIT")

    def ping(self) -> None:
        try:
            self._conn().execute("SELECT 1").fetchone()
        except sqlite3.Error as exc:
            raise StoreUnavailable(f"sqlite unavailable: {exc}") from exc

    def close(self) -> None:
        with self._lock:
            for conn in self._all:
                conn.close()
            self._all.clear()
        self._local = threading.local()

    async def aclose(self) -> None:
        return None  # the async reads use the worker threads' own connections

    def startup_warnings(self) -> list[str]:
        return []

    # calibrations

    def create(self, calibration: NewCalibration) -> None:
        c = calibration
        with self._write() as db:
            db.execute(
                "INSERT INTO calibrations (id, token_hash, spec, created_at, state, "
                "state_version, round, engine_status) VALUES (?, ?, ?, ?, ?, 1, ?, ?)",
                (
                    c.id,
                    c.token_hash,
                    c.spec_json,
                    c.created_at,
                    c.state_blob,
                    c.round,
                    c.engine_status,
                ),
            )
            db.executemany(
                "INSERT INTO queue (calibration_id, kind, point) VALUES (?, 1, ?)",
                [(c.id, p) for p in c.proposals],
            )

    def get_meta(self, calibration_id: str) -> CalibrationMeta | None:
        with self._read() as db:
            return self._meta(db, calibration_id)

    async def get_meta_async(self, calibration_id: str) -> CalibrationMeta | None:
        # SQLite has no async driver: the read runs in a worker thread.
        return await to_thread.run_sync(self.get_meta, calibration_id)

    @staticmethod
    def _meta(db: sqlite3.Connection, calibration_id: str) -> CalibrationMeta | None:
        # Inside the caller's transaction, so the counters, queue and refit job agree.
        row = db.execute(
            "SELECT id, token_hash, created_at, state_version, round, engine_status, "
            "done, failed, leased, failed_error, refit_failures, max_runs FROM calibrations "
            "WHERE id = ?",
            (calibration_id,),
        ).fetchone()
        if row is None:
            return None
        (queued,) = db.execute(
            "SELECT COUNT(*) FROM queue WHERE calibration_id = ?", (calibration_id,)
        ).fetchone()
        pending = db.execute(
            "SELECT EXISTS (SELECT 1 FROM refit_jobs WHERE calibration_id = ?) "
            "OR EXISTS (SELECT 1 FROM refit_locks WHERE calibration_id = ? AND expires_at > ?)",
            (calibration_id, calibration_id, _now()),
        ).fetchone()[0]
        return CalibrationMeta(
            id=row["id"],
            token_hash=row["token_hash"],
            created_at=row["created_at"],
            state_version=row["state_version"],
            round=row["round"],
            engine_status=row["engine_status"],
            done=row["done"],
            failed=row["failed"],
            leased=row["leased"],
            queued=int(queued),
            failed_error=row["failed_error"],
            refit_failures=row["refit_failures"],
            refit_pending=bool(pending),
            max_runs=row["max_runs"],
        )

    def get_spec(self, calibration_id: str) -> str | None:
        with self._read() as db:
            row = db.execute(
                "SELECT spec FROM calibrations WHERE id = ?", (calibration_id,)
            ).fetchone()
        return None if row is None else str(row[0])

    def delete(self, calibration_id: str) -> bool:
        with self._write() as db:
            cur = db.execute("DELETE FROM calibrations WHERE id = ?", (calibration_id,))
            for table in ("queue", "runs", "refit_jobs", "refit_locks"):
                db.execute(f"DELETE FROM {table} WHERE calibration_id = ?", (calibration_id,))
        return cur.rowcount > 0

    def load_state(self, calibration_id: str) -> tuple[int, bytes] | None:
        with self._read() as db:
            row = db.execute(
                "SELECT state_version, state FROM calibrations WHERE id = ?", (calibration_id,)
            ).fetchone()
        return None if row is None else (int(row[0]), bytes(row[1]))

    def set_budget(
        self,
        calibration_id: str,
        expected_version: int,
        max_runs: int,
        engine_status: str,
        blob: bytes | None,
    ) -> bool:
        with self._write() as db:
            cur = db.execute(
                "UPDATE calibrations SET max_runs = ?, engine_status = ?, "
                "state = COALESCE(?, state), state_version = state_version + 1 "
                "WHERE id = ? AND state_version = ? AND failed_error IS NULL",
                (max_runs, engine_status, blob, calibration_id, expected_version),
            )
            return cur.rowcount == 1

    def swap_state(
        self,
        calibration_id: str,
        expected_version: int,
        blob: bytes,
        round_: int,
        engine_status: str,
        proposals: list[str],
    ) -> bool:
        with self._write() as db:
            cur = db.execute(
                "UPDATE calibrations SET state = ?, state_version = state_version + 1, "
                "round = ?, engine_status = ? WHERE id = ? AND state_version = ?",
                (blob, round_, engine_status, calibration_id, expected_version),
            )
            if cur.rowcount == 0:
                return False
            db.execute("DELETE FROM queue WHERE calibration_id = ? AND kind = 1", (calibration_id,))
            db.executemany(
                "INSERT INTO queue (calibration_id, kind, point) VALUES (?, 1, ?)",
                [(calibration_id, p) for p in proposals],
            )
        return True

    # runs

    @staticmethod
    def _expire_overdue(
        db: sqlite3.Connection, calibration_id: str, now: float, keep: str | None = None
    ) -> int:
        # Inside the caller's write transaction: leased runs past expiry, but `keep`, become
        # "expired" (epoch + 1) and their points go to the back of the requeue part of the
        # queue.
        rows = db.execute(
            "SELECT run_id, point FROM runs WHERE calibration_id = ? AND state = 'leased' "
            "AND lease_expires_at <= ? AND run_id IS NOT ? ORDER BY lease_expires_at, seq",
            (calibration_id, now, keep),
        ).fetchall()
        for run_id, point in rows:
            db.execute(
                "UPDATE runs SET state = 'expired', epoch = epoch + 1 "
                "WHERE calibration_id = ? AND run_id = ?",
                (calibration_id, run_id),
            )
            db.execute(
                "INSERT INTO queue (calibration_id, kind, point) VALUES (?, 0, ?)",
                (calibration_id, point),
            )
        if rows:
            db.execute(
                "UPDATE calibrations SET leased = leased - ? WHERE id = ?",
                (len(rows), calibration_id),
            )
        return len(rows)

    def _lease(
        self,
        calibration_id: str,
        count: int,
        worker: str,
        now: float,
        lease_seconds: float,
        max_runs: int,
    ) -> LeaseResult:
        """`Store.lease_async` in the calling thread: one write transaction."""
        expires = now + lease_seconds
        with self._write() as db:
            row = db.execute(
                "SELECT seq, done, failed, engine_status, failed_error, max_runs "
                "FROM calibrations WHERE id = ?",
                (calibration_id,),
            ).fetchone()
            if row is None:
                return LeaseResult([], 0, None)
            expired = self._expire_overdue(db, calibration_id, now)
            seq, done, failed, engine_status, failed_error, raised = row
            max_runs = raised if raised is not None else max_runs
            (leased,) = db.execute(
                "SELECT leased FROM calibrations WHERE id = ?", (calibration_id,)
            ).fetchone()
            room = max(0, min(count, max_runs - done - failed - leased))
            if engine_status != "collecting" or failed_error:
                room = 0
            points = db.execute(
                "SELECT pos, point FROM queue WHERE calibration_id = ? ORDER BY kind, pos LIMIT ?",
                (calibration_id, room),
            ).fetchall()
            runs = []
            for pos, point in points:
                seq += 1
                run_id = f"r{seq}"
                db.execute("DELETE FROM queue WHERE pos = ?", (pos,))
                db.execute(
                    "INSERT INTO runs (calibration_id, run_id, seq, state, epoch, worker, "
                    "leased_at, lease_expires_at, point) VALUES (?, ?, ?, 'leased', 1, ?, ?, ?, ?)",
                    (calibration_id, run_id, seq, worker, now, expires, point),
                )
                runs.append(
                    RunRecord(
                        run_id,
                        seq,
                        "leased",
                        1,
                        worker,
                        now,
                        expires,
                        None,
                        json.loads(point),
                        None,
                        False,
                    )
                )
            db.execute(
                "UPDATE calibrations SET seq = ?, leased = leased + ? WHERE id = ?",
                (seq, len(runs), calibration_id),
            )
            return LeaseResult(runs, expired, self._meta(db, calibration_id))

    async def lease_async(
        self,
        calibration_id: str,
        count: int,
        worker: str,
        now: float,
        lease_seconds: float,
        max_runs: int,
    ) -> LeaseResult:
        return await to_thread.run_sync(
            self._lease, calibration_id, count, worker, now, lease_seconds, max_runs
        )

    def expire(self, calibration_id: str, now: float) -> int:
        with self._write() as db:
            return self._expire_overdue(db, calibration_id, now)

    def extend_lease(
        self, calibration_id: str, run_id: str, now: float, expires_at: float, longest: float
    ) -> ExtendResult:
        with self._write() as db:
            if not _exists(db, calibration_id):
                return ExtendResult(None, 0)
            expired = self._expire_overdue(db, calibration_id, now)
            db.execute(
                "UPDATE runs SET lease_expires_at = "
                "MAX(lease_expires_at, MIN(?, leased_at + ?)) "
                "WHERE calibration_id = ? AND run_id = ? AND state = 'leased'",
                (expires_at, longest, calibration_id, run_id),
            )
            row = db.execute(
                "SELECT state, lease_expires_at FROM runs WHERE calibration_id = ? AND run_id = ?",
                (calibration_id, run_id),
            ).fetchone()
        if row is None:
            return ExtendResult(None, expired)
        leased = row[0] == "leased"
        return ExtendResult(str(row[0]), expired, float(row[1]) if leased else None)

    def get_run(self, calibration_id: str, run_id: str) -> RunRecord | None:
        with self._read() as db:
            row = db.execute(
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE calibration_id = ? AND run_id = ?",
                (calibration_id, run_id),
            ).fetchone()
        return None if row is None else _record(row)

    def _finish_run(
        self,
        calibration_id: str,
        run_id: str,
        epoch: int,
        state: str,
        result_json: str,
        now: float,
    ) -> FinishResult:
        """`Store.finish_run_async` in the calling thread: one write transaction."""
        with self._write() as db:
            if not _exists(db, calibration_id):
                return FinishResult(None, 0)
            row = db.execute(
                "SELECT state, epoch, point FROM runs WHERE calibration_id = ? AND run_id = ?",
                (calibration_id, run_id),
            ).fetchone()
            current = row is not None and row[1] == epoch and row[0] not in ("done", "failed")
            # A result for a lease that ran out but was not yet expired is written, and its
            # point stays put: no one else has it.
            expired = self._expire_overdue(db, calibration_id, now, run_id if current else None)
            if not current:
                return FinishResult(None, expired)
            if row[0] == "expired":
                # Its point was re-queued; while no one has leased it again, withdraw it.
                db.execute(
                    "DELETE FROM queue WHERE pos = (SELECT pos FROM queue WHERE "
                    "calibration_id = ? AND kind = 0 AND point = ? ORDER BY pos LIMIT 1)",
                    (calibration_id, row[2]),
                )
            (order,) = db.execute(
                "SELECT COALESCE(MAX(finish_order), 0) + 1 FROM runs WHERE calibration_id = ?",
                (calibration_id,),
            ).fetchone()
            db.execute(
                "UPDATE runs SET state = ?, result = ?, completed_at = ?, epoch = epoch + 1, "
                "finish_order = ? WHERE calibration_id = ? AND run_id = ?",
                (state, result_json, now, order, calibration_id, run_id),
            )
            column = "done" if state == "done" else "failed"
            was_leased = 1 if row[0] == "leased" else 0
            db.execute(
                f"UPDATE calibrations SET {column} = {column} + 1, leased = leased - ? "
                "WHERE id = ?",
                (was_leased, calibration_id),
            )
            return FinishResult(self._meta(db, calibration_id), expired)

    async def finish_run_async(
        self,
        calibration_id: str,
        run_id: str,
        epoch: int,
        state: str,
        result_json: str,
        now: float,
    ) -> FinishResult:
        return await to_thread.run_sync(
            self._finish_run, calibration_id, run_id, epoch, state, result_json, now
        )

    def import_runs(
        self, calibration_id: str, items: list[tuple[str, str]], now: float
    ) -> list[str]:
        with self._write() as db:
            row = db.execute(
                "SELECT seq FROM calibrations WHERE id = ?", (calibration_id,)
            ).fetchone()
            if row is None:
                return []
            seq = int(row[0])
            (order,) = db.execute(
                "SELECT COALESCE(MAX(finish_order), 0) FROM runs WHERE calibration_id = ?",
                (calibration_id,),
            ).fetchone()
            ids = []
            for point, result in items:
                seq += 1
                order += 1
                ids.append(f"r{seq}")
                db.execute(
                    "INSERT INTO runs (calibration_id, run_id, seq, state, epoch, worker, "
                    "completed_at, finish_order, point, result, imported) "
                    "VALUES (?, ?, ?, 'done', 1, NULL, ?, ?, ?, ?, 1)",
                    (calibration_id, f"r{seq}", seq, now, order, point, result),
                )
            db.execute(
                "UPDATE calibrations SET seq = ?, done = done + ? WHERE id = ?",
                (seq, len(ids), calibration_id),
            )
        return ids

    def list_runs(self, calibration_id: str, state: str | None = None) -> list[RunRecord]:
        query = f"SELECT {_RUN_COLUMNS} FROM runs WHERE calibration_id = ?"
        args: list[Any] = [calibration_id]
        if state is not None:
            query += " AND state = ?"
            args.append(state)
        with self._read() as db:
            rows = db.execute(query + " ORDER BY seq", args).fetchall()
        return [_record(r) for r in rows]

    def finished_runs(self, calibration_id: str) -> list[RunRecord]:
        with self._read() as db:
            rows = db.execute(
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE calibration_id = ? "
                "AND finish_order IS NOT NULL ORDER BY finish_order",
                (calibration_id,),
            ).fetchall()
        return [_record(r) for r in rows]

    # refit jobs

    def enqueue_refit(self, calibration_id: str, now: float) -> None:
        with self._write() as db:
            db.execute(
                "INSERT OR IGNORE INTO refit_jobs (calibration_id, due_at) "
                "SELECT id, ? FROM calibrations WHERE id = ?",
                (now, calibration_id),
            )

    def due_refits(self, now: float, limit: int) -> list[str]:
        with self._read() as db:
            rows = db.execute(
                "SELECT calibration_id FROM refit_jobs WHERE due_at <= ? ORDER BY due_at LIMIT ?",
                (now, limit),
            ).fetchall()
        return [r[0] for r in rows]

    def acquire_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        now = _now()
        with self._write() as db:
            db.execute(
                "DELETE FROM refit_locks WHERE calibration_id = ? AND expires_at <= ?",
                (calibration_id, now),
            )
            cur = db.execute(
                "INSERT OR IGNORE INTO refit_locks (calibration_id, owner, expires_at) "
                "VALUES (?, ?, ?)",
                (calibration_id, owner, now + ttl),
            )
        return cur.rowcount == 1

    def renew_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        now = _now()
        with self._write() as db:
            cur = db.execute(
                "UPDATE refit_locks SET expires_at = ? WHERE calibration_id = ? AND owner = ? "
                "AND expires_at > ?",
                (now + ttl, calibration_id, owner, now),
            )
        return cur.rowcount == 1

    def release_refit_lock(self, calibration_id: str, owner: str) -> None:
        with self._write() as db:
            db.execute(
                "DELETE FROM refit_locks WHERE calibration_id = ? AND owner = ?",
                (calibration_id, owner),
            )

    def finish_refit(self, calibration_id: str) -> None:
        with self._write() as db:
            db.execute("DELETE FROM refit_jobs WHERE calibration_id = ?", (calibration_id,))
            db.execute("UPDATE calibrations SET refit_failures = 0 WHERE id = ?", (calibration_id,))

    def record_refit_failure(
        self, calibration_id: str, error: str, max_failures: int, retry_at: float
    ) -> bool:
        with self._write() as db:
            row = db.execute(
                "UPDATE calibrations SET refit_failures = refit_failures + 1 WHERE id = ? "
                "RETURNING refit_failures",
                (calibration_id,),
            ).fetchone()
            if row is None:
                db.execute("DELETE FROM refit_jobs WHERE calibration_id = ?", (calibration_id,))
                return False
            if row[0] >= max_failures:
                db.execute(
                    "UPDATE calibrations SET failed_error = ? WHERE id = ?",
                    (error, calibration_id),
                )
                db.execute("DELETE FROM refit_jobs WHERE calibration_id = ?", (calibration_id,))
                return True
            db.execute(
                "UPDATE refit_jobs SET due_at = ? WHERE calibration_id = ?",
                (retry_at, calibration_id),
            )
        return False

    def refit_queue_depth(self) -> int:
        with self._read() as db:
            (n,) = db.execute("SELECT COUNT(*) FROM refit_jobs").fetchone()
        return int(n)


def _now() -> float:
    return time.time()
