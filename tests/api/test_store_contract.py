import json
import os
import sqlite3
import subprocess
import threading
import time
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

import pytest
from anyio.from_thread import BlockingPortal

from honing.api.store import (
    ExtendResult,
    FinishResult,
    LeaseResult,
    NewCalibration,
    Store,
    StoreUnavailable,
    open_store,
    sqlite_store,
)
from honing.api.store.redis_store import _queue_script


def point(i: int) -> str:
    return json.dumps({"parameters": {"a": float(i)}, "prediction": None, "round": 0})


def make(store: Store, cid: str = "c1", proposals: int = 5) -> None:
    store.create(
        NewCalibration(
            id=cid,
            token_hash="h",
            spec_json='{"name": "s"}',
            created_at=1000.0,
            state_blob=b"\x00state\xff",
            round=0,
            engine_status="collecting",
            proposals=[point(i) for i in range(proposals)],
        )
    )


@dataclass
class Steps:
    """The store's event-loop steps called from test code, as the server's loop would."""

    store: Store
    portal: BlockingPortal

    def lease(self, *args: Any) -> LeaseResult:
        return self.portal.call(self.store.lease_async, *args)

    def finish(self, *args: Any) -> FinishResult:
        return self.portal.call(self.store.finish_run_async, *args)


@pytest.fixture
def steps(store: Store, portal: BlockingPortal) -> Steps:
    return Steps(store, portal)


def done(value: float) -> str:
    return json.dumps({"outputs": {"y": [value]}, "error": None, "trust": 1.0})


def test_create_and_read_back(store: Store) -> None:
    make(store)
    meta = store.get_meta("c1")
    assert meta is not None
    assert (meta.done, meta.failed, meta.leased, meta.queued) == (0, 0, 0, 5)
    assert meta.state_version == 1 and meta.engine_status == "collecting"
    assert store.load_state("c1") == (1, b"\x00state\xff")
    assert store.get_spec("c1") == '{"name": "s"}'
    assert store.get_meta("nope") is None and store.get_spec("nope") is None
    assert store.load_state("nope") is None


def test_async_metadata_read_agrees_with_the_sync_one(store: Store, steps: Steps) -> None:
    make(store)
    steps.lease("c1", 2, "w", 10.0, 60.0, 100)
    store.enqueue_refit("c1", 1.0)
    meta = steps.portal.call(store.get_meta_async, "c1")
    assert meta == store.get_meta("c1") and steps.portal.call(store.get_meta_async, "x") is None


def test_lease_hands_out_in_order_with_fresh_ids(store: Store, steps: Steps) -> None:
    make(store)
    first = steps.lease("c1", 2, "w", 10.0, 60.0, 100).runs
    second = steps.lease("c1", 10, "w", 10.0, 60.0, 100).runs
    values = [r.point["parameters"]["a"] for r in first + second]
    assert values == [0.0, 1.0, 2.0, 3.0, 4.0]
    assert len({r.run_id for r in first + second}) == 5
    assert first[0].state == "leased" and first[0].lease_expires_at == 70.0
    assert store.get_meta("c1").leased == 5  # type: ignore[union-attr]
    assert steps.lease("c1", 3, "w", 10.0, 60.0, 100).runs == []


def test_lease_respects_the_budget(store: Store, steps: Steps) -> None:
    make(store, proposals=10)
    runs = steps.lease("c1", 3, "w", 0.0, 60.0, 4).runs
    assert steps.finish("c1", runs[0].run_id, runs[0].epoch, "done", done(1.0), 1.0).meta
    # done 1 + leased 2 leaves room for one more under max_runs 4.
    assert len(steps.lease("c1", 5, "w", 1.0, 60.0, 4).runs) == 1
    assert steps.lease("c1", 5, "w", 1.0, 60.0, 4).runs == []


def test_finish_run_is_fenced_by_epoch(store: Store, steps: Steps) -> None:
    make(store)
    (run,) = steps.lease("c1", 1, "w", 0.0, 60.0, 100).runs
    assert not steps.finish("c1", run.run_id, run.epoch + 1, "done", done(1.0), 1.0).meta
    assert steps.finish("c1", run.run_id, run.epoch, "done", done(1.0), 1.0).meta
    # Finished: the old epoch no longer matches, so a second write is refused.
    assert not steps.finish("c1", run.run_id, run.epoch, "done", done(2.0), 1.0).meta
    stored = store.get_run("c1", run.run_id)
    assert stored is not None and stored.state == "done"
    assert stored.result == {"outputs": {"y": [1.0]}, "error": None, "trust": 1.0}
    meta = store.get_meta("c1")
    assert meta is not None and (meta.done, meta.leased) == (1, 0)


def test_finish_run_returns_the_metadata_after_the_write(store: Store, steps: Steps) -> None:
    make(store)
    _, second = steps.lease("c1", 2, "w", 0.0, 60.0, 100).runs
    store.enqueue_refit("c1", 0.5)
    after = steps.finish("c1", second.run_id, second.epoch, "failed", done(1.0), 1.0).meta
    assert after is not None
    assert (after.done, after.failed, after.leased, after.queued) == (0, 1, 1, 3)
    assert after.refit_pending and after.state_version == 1
    assert after == store.get_meta("c1")
    assert not steps.finish("c1", "r999", 1, "done", done(1.0), 1.0).meta


def test_expired_lease_is_requeued_first_and_late_result_kept(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    (old,) = steps.lease("c1", 1, "w", 0.0, 10.0, 100).runs
    lease = steps.lease("c1", 1, "w", 10.0, 10.0, 100)
    assert lease.expired == 1
    (again,) = lease.runs
    assert again.run_id != old.run_id
    assert again.point == old.point
    expired = store.get_run("c1", old.run_id)
    assert expired is not None and expired.state == "expired" and expired.epoch == old.epoch + 1
    assert not steps.finish("c1", old.run_id, old.epoch, "done", done(1.0), 11.0).meta
    assert steps.finish("c1", old.run_id, expired.epoch, "done", done(1.0), 11.0).meta
    assert steps.finish("c1", again.run_id, again.epoch, "failed", done(1.0), 12.0).meta
    meta = store.get_meta("c1")
    assert meta is not None and (meta.done, meta.failed, meta.leased) == (1, 1, 0)
    assert [r.run_id for r in store.finished_runs("c1")] == [old.run_id, again.run_id]
    assert [r.state for r in store.list_runs("c1")] == ["done", "failed"]
    assert [r.run_id for r in store.list_runs("c1", "failed")] == [again.run_id]


def test_expire_runs_lazily_on_report(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    a, b = steps.lease("c1", 2, "w", 0.0, 10.0, 100).runs
    # The report step expires the other overdue lease and says so, for the service's run
    # counter; the run it reports is written, as its lease ran out unseen: no one else has
    # its point, which is not handed out again.
    written = steps.finish("c1", a.run_id, a.epoch, "done", done(1.0), 20.0)
    assert written.meta is not None and written.expired == 1
    assert [store.get_run("c1", r.run_id).state for r in (a, b)] == ["done", "expired"]  # type: ignore[union-attr]
    assert (written.meta.done, written.meta.queued, written.meta.leased) == (1, 2, 0)
    assert store.expire("c1", 30.0) == 0
    points = [r.point for r in steps.lease("c1", 5, "w", 30.0, 10.0, 100).runs]
    assert points == [b.point, json.loads(point(2))]


def test_a_late_result_withdraws_its_requeued_point(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    (old,) = steps.lease("c1", 1, "w", 0.0, 10.0, 100).runs
    assert store.expire("c1", 20.0) == 1
    expired = store.get_run("c1", old.run_id)
    assert expired is not None and expired.state == "expired"
    # Its point waits in the re-queue; the result, arriving before anyone leased it again,
    # makes that copy unnecessary, so each point is run once and the budget holds.
    written = steps.finish("c1", old.run_id, expired.epoch, "done", done(1.0), 21.0)
    assert written.meta is not None
    assert (written.meta.done, written.meta.queued, written.meta.leased) == (1, 2, 0)
    points = [r.point for r in steps.lease("c1", 5, "w", 22.0, 10.0, 100).runs]
    assert points == [json.loads(point(1)), json.loads(point(2))]


def test_import_adds_done_runs_in_one_step(store: Store) -> None:
    make(store)
    ids = store.import_runs("c1", [(point(7), done(1.0)), (point(8), done(2.0))], 5.0)
    assert len(ids) == 2
    runs = store.list_runs("c1")
    assert [r.state for r in runs] == ["done", "done"] and all(r.imported for r in runs)
    assert store.get_meta("c1").done == 2  # type: ignore[union-attr]
    assert [r.run_id for r in store.finished_runs("c1")] == ids
    assert store.import_runs("missing", [(point(1), done(1.0))], 5.0) == []


def test_swap_state_is_compare_and_swap(store: Store, steps: Steps) -> None:
    make(store)
    steps.lease("c1", 1, "w", 0.0, 60.0, 100)
    assert store.swap_state("c1", 1, b"new", 1, "collecting", [point(50), point(51)])
    assert not store.swap_state("c1", 1, b"stale", 1, "collecting", [point(60)])
    assert store.load_state("c1") == (2, b"new")
    meta = store.get_meta("c1")
    assert meta is not None and (meta.round, meta.queued, meta.state_version) == (1, 2, 2)
    runs = steps.lease("c1", 5, "w", 1.0, 60.0, 100).runs
    assert [r.point["parameters"]["a"] for r in runs] == [50.0, 51.0]
    assert not store.swap_state("missing", 1, b"x", 1, "collecting", [])


def test_set_budget_is_compare_and_swap_and_leases_follow_it(store: Store, steps: Steps) -> None:
    make(store, proposals=10)
    meta = store.get_meta("c1")
    assert meta is not None and meta.max_runs is None  # the spec's budget holds
    assert len(steps.lease("c1", 10, "w", 0.0, 60.0, 2).runs) == 2
    # The status and the budget change, the state only when one is given, and the version
    # moves on either way.
    assert store.set_budget("c1", 1, 5, "collecting", None)
    assert store.load_state("c1") == (2, b"\x00state\xff")
    assert not store.set_budget("c1", 1, 9, "collecting", b"stale")
    assert not store.swap_state("c1", 1, b"stale", 1, "budget_exhausted", [])
    meta = store.get_meta("c1")
    assert meta is not None and (meta.max_runs, meta.state_version) == (5, 2)
    # The stored budget wins over the one the caller passes.
    assert len(steps.lease("c1", 10, "w", 1.0, 60.0, 2).runs) == 3
    assert store.set_budget("c1", 2, 6, "budget_exhausted", b"closed")
    assert store.load_state("c1") == (3, b"closed")
    assert steps.lease("c1", 10, "w", 2.0, 60.0, 100).runs == []  # closed
    assert not store.set_budget("missing", 1, 5, "collecting", None)


def test_an_sqlite_file_from_before_budgets_gains_the_column(tmp_path: Any) -> None:
    path = tmp_path / "old.db"
    old_schema = sqlite_store._SCHEMA.replace(",\n    max_runs INTEGER\n", "\n")
    assert "max_runs" not in old_schema
    with sqlite3.connect(path) as db:
        db.executescript(old_schema)
    store = open_store(f"sqlite:///{path}")
    try:
        make(store)
        meta = store.get_meta("c1")
        assert meta is not None and meta.max_runs is None
        assert store.set_budget("c1", 1, 7, "collecting", None)
        meta = store.get_meta("c1")
        assert meta is not None and meta.max_runs == 7
    finally:
        store.close()
    open_store(f"sqlite:///{path}").close()  # a second open finds the column there


def test_a_written_report_counts_the_leases_it_expired(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    (short,) = steps.lease("c1", 1, "w", 0.0, 10.0, 100).runs
    (long,) = steps.lease("c1", 1, "w", 0.0, 60.0, 100).runs
    written = steps.finish("c1", long.run_id, long.epoch, "done", done(1.0), 20.0)
    assert written.expired == 1 and written.meta is not None
    assert (written.meta.done, written.meta.leased, written.meta.queued) == (1, 0, 2)
    # A second report finds nothing more to expire.
    (again,) = steps.lease("c1", 1, "w", 20.0, 60.0, 100).runs
    assert again.point == short.point
    assert steps.finish("c1", again.run_id, again.epoch, "done", done(1.0), 21.0).expired == 0


def test_extend_lease_moves_the_expiry_and_keeps_the_epoch(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    (run,) = steps.lease("c1", 1, "w", 0.0, 10.0, 100).runs
    extended = store.extend_lease("c1", run.run_id, 5.0, 25.0, 1000.0)
    assert extended == ExtendResult("leased", 0, 25.0)
    stored = store.get_run("c1", run.run_id)
    assert stored is not None and stored.lease_expires_at == 25.0 and stored.epoch == run.epoch
    # Past the first expiry, before the new one: still leased, nothing re-queued.
    lease = steps.lease("c1", 1, "w", 20.0, 10.0, 100)
    assert lease.expired == 0 and lease.runs[0].point != run.point
    assert steps.finish("c1", run.run_id, run.epoch, "done", done(1.0), 24.0).meta is not None


def test_extend_lease_never_shortens_and_stops_at_the_longest_hold(
    store: Store, steps: Steps
) -> None:
    make(store, proposals=3)
    (run,) = steps.lease("c1", 1, "w", 100.25, 50.0, 100).runs  # ends at 150.25
    assert store.extend_lease("c1", run.run_id, 110.0, 120.0, 1000.0).expires_at == 150.25
    # Capped at leased_at + longest, and what is stored is what the answer says.
    capped = store.extend_lease("c1", run.run_id, 120.0, 5000.0, 1000.0)
    assert capped == ExtendResult("leased", 0, 1100.25)
    stored = store.get_run("c1", run.run_id)
    assert stored is not None and stored.lease_expires_at == 1100.25
    assert store.extend_lease("c1", run.run_id, 130.0, 9000.0, 1000.0).expires_at == 1100.25
    # The leases set follows the hash: the run expires at the cap, not before.
    assert steps.lease("c1", 1, "w", 1100.0, 50.0, 100).expired == 0
    assert steps.lease("c1", 1, "w", 1100.5, 50.0, 100).expired == 1


def test_extend_lease_refuses_what_is_no_longer_leased(store: Store, steps: Steps) -> None:
    make(store, proposals=3)
    short, kept = steps.lease("c1", 2, "w", 0.0, 10.0, 100).runs
    assert store.extend_lease("c1", kept.run_id, 5.0, 60.0, 1000.0).state == "leased"
    # The extension step expires the overdue lease first, then finds it no longer leased.
    late = store.extend_lease("c1", short.run_id, 11.0, 70.0, 1000.0)
    assert late == ExtendResult("expired", 1, None)
    stored = store.get_run("c1", short.run_id)
    assert stored is not None and stored.lease_expires_at == 10.0
    steps.finish("c1", kept.run_id, kept.epoch, "done", done(1.0), 12.0)
    assert store.extend_lease("c1", kept.run_id, 13.0, 80.0, 1000.0) == ExtendResult("done", 0)
    assert store.extend_lease("c1", "r999", 13.0, 80.0, 1000.0) == ExtendResult(None, 0)
    assert store.extend_lease("nope", "r1", 13.0, 80.0, 1000.0) == ExtendResult(None, 0)
    meta = store.get_meta("c1")
    assert meta is not None and (meta.done, meta.leased, meta.queued) == (1, 0, 2)


def test_delete_removes_everything(store: Store, steps: Steps) -> None:
    make(store)
    make(store, "c2")
    run = steps.lease("c1", 1, "w", 0.0, 60.0, 100).runs[0]
    steps.finish("c1", run.run_id, run.epoch, "done", done(1.0), 1.0)
    store.enqueue_refit("c1", 1.0)
    assert store.delete("c1")
    assert not store.delete("c1")
    assert store.get_meta("c1") is None and store.list_runs("c1") == []
    assert store.due_refits(10.0, 10) == []
    assert store.get_meta("c2") is not None


def test_refit_queue_and_lock(store: Store) -> None:
    make(store)
    make(store, "c2")
    store.enqueue_refit("c2", 5.0)
    store.enqueue_refit("c1", 6.0)
    store.enqueue_refit("c2", 7.0)
    assert store.due_refits(10.0, 10) == ["c2", "c1"]
    assert store.due_refits(5.5, 10) == ["c2"]
    assert store.refit_queue_depth() == 2

    def pending(cid: str) -> bool:
        meta = store.get_meta(cid)
        assert meta is not None
        return meta.refit_pending

    assert pending("c1")
    assert store.acquire_refit_lock("c1", "me", 30.0)
    assert not store.acquire_refit_lock("c1", "other", 30.0)
    assert store.renew_refit_lock("c1", "me", 30.0)
    assert not store.renew_refit_lock("c1", "other", 30.0)
    store.release_refit_lock("c1", "other")
    assert not store.acquire_refit_lock("c1", "other", 30.0)
    store.release_refit_lock("c1", "me")
    assert store.acquire_refit_lock("c1", "other", 30.0)
    store.finish_refit("c2")
    assert store.due_refits(10.0, 10) == ["c1"]
    assert not pending("c2")
    store.finish_refit("c1")
    assert pending("c1"), "a running refit (the lock held) is pending too"
    store.release_refit_lock("c1", "other")
    assert not pending("c1")


def test_refit_lock_expires(store: Store) -> None:
    make(store)
    assert store.acquire_refit_lock("c1", "dead", 0.05)
    import time

    time.sleep(0.2)
    assert store.acquire_refit_lock("c1", "alive", 30.0)
    assert not store.renew_refit_lock("c1", "dead", 30.0)


def test_refit_failures_retry_then_fail(store: Store) -> None:
    make(store)
    store.enqueue_refit("c1", 1.0)
    assert not store.record_refit_failure("c1", "boom", 2, 50.0)
    assert store.due_refits(10.0, 10) == []
    assert store.due_refits(50.0, 10) == ["c1"]
    assert store.record_refit_failure("c1", "boom", 2, 60.0)
    meta = store.get_meta("c1")
    assert meta is not None and meta.failed_error == "boom"
    assert store.due_refits(100.0, 10) == []
    assert not store.record_refit_failure("missing", "boom", 2, 1.0)
    assert store.get_meta("missing") is None


@pytest.mark.parametrize("count", [0, 1])
def test_lease_unknown_calibration_is_empty(store: Store, steps: Steps, count: int) -> None:
    result = steps.lease("missing", count, "w", 0.0, 60.0, 100)
    assert result.runs == [] and result.meta is None
    assert store.get_meta("missing") is None


def test_lease_returns_the_metadata_and_stops_once_closed(store: Store, steps: Steps) -> None:
    make(store)
    result = steps.lease("c1", 2, "w", 0.0, 60.0, 100)
    assert result.meta == store.get_meta("c1")
    assert result.meta is not None and (result.meta.leased, result.meta.queued) == (2, 3)
    # Converged (a state swap with a final engine status): nothing more is handed out.
    assert store.swap_state("c1", 1, b"s2", 1, "converged", [point(9)])
    closed = steps.lease("c1", 5, "w", 1.0, 60.0, 100)
    assert closed.runs == [] and closed.meta is not None
    assert closed.meta.engine_status == "converged" and closed.meta.queued == 1
    # Failed (refits kept failing): likewise.
    make(store, "c2")
    assert store.record_refit_failure("c2", "boom", 1, 5.0)
    assert steps.lease("c2", 5, "w", 1.0, 60.0, 100).runs == []


@pytest.mark.parametrize(("queue_of", "wait"), [("c1", True), ("c1", False), (None, True)])
def test_waitaof_travels_in_the_write_pipeline(queue_of: str | None, wait: bool) -> None:
    # WAITAOF blocks until the writes of the connection that sends it are fsynced (Redis
    # command reference, WAITAOF): sent on another pooled connection it would wait for
    # nothing. The Redis here (7.0) has no WAITAOF, so the order is checked on a recorder.
    sent: list[str] = []

    class Recorder:
        def evalsha(self, sha: str, *args: object) -> None:
            sent.append(f"EVALSHA {sha}")

        def zscore(self, key: str, member: str) -> None:
            sent.append(f"ZSCORE {member}")

        def execute_command(self, *args: object) -> None:
            sent.append(" ".join(map(str, args)))

    script = SimpleNamespace(sha="abc")
    _queue_script(Recorder(), script, ["k"], ["a"], queue_of, wait)  # type: ignore[arg-type]
    queue = [f"ZSCORE {queue_of}"] if queue_of else []
    assert sent == ["EVALSHA abc", *queue] + (["WAITAOF 1 0 0"] if wait else [])


def test_queued_sqlite_writers_give_up_within_one_busy_timeout(
    sqlite_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Another connection holds the write lock: every writer of the store must answer
    # "unavailable" after about one busy timeout, not one timeout per writer queued ahead.
    monkeypatch.setattr(sqlite_store, "BUSY_TIMEOUT_MS", 400)
    store = open_store(sqlite_url)
    make(store)
    blocker = sqlite3.connect(store.path, isolation_level=None)  # type: ignore[attr-defined]
    blocker.execute("BEGIN IMMEDIATE")
    waited: list[float] = []

    def write() -> None:
        began = time.monotonic()
        with pytest.raises(StoreUnavailable):
            store.expire("c1", 0.0)
        waited.append(time.monotonic() - began)

    threads = [threading.Thread(target=write) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    blocker.execute("ROLLBACK")
    blocker.close()
    store.close()
    # Queued one after another, the last would wait six timeouts (2.4 s); one timeout plus
    # thread scheduling on a loaded machine stays far below 1.2 s.
    assert len(waited) == 6 and max(waited) < 1.2, waited


def test_a_full_sqlite_file_is_unavailable_and_nothing_is_written(sqlite_url: str) -> None:
    # SQLite's max_page_count caps the file as a full disk would: writes that need a new page
    # fail with SQLITE_FULL ("database or disk is full", sqlite.org/pragma.html). The store
    # must answer unavailable (503), keep the rolled-back state, and write once there is room.
    store = open_store(sqlite_url)
    make(store)
    db = store._conn()  # type: ignore[attr-defined]
    pages = db.execute("PRAGMA page_count").fetchone()[0]
    db.execute(f"PRAGMA max_page_count = {pages}")
    big = [(point(i), json.dumps({"outputs": {"y": [0.0] * 5000}})) for i in range(20)]
    with pytest.raises(StoreUnavailable, match="database or disk is full"):
        store.import_runs("c1", big, 5.0)
    meta = store.get_meta("c1")
    assert meta is not None and meta.done == 0 and store.list_runs("c1") == []
    db.execute(f"PRAGMA max_page_count = {2**30}")
    assert len(store.import_runs("c1", big, 6.0)) == 20
    store.close()


def test_an_sqlite_file_that_cannot_be_written_fails_at_open(tmp_path: Any) -> None:
    # A file this process cannot write: immutable for root (chattr +i; root ignores modes),
    # mode 0444 for anyone else. SQLite then opens it read-only and BEGIN IMMEDIATE still
    # succeeds; before, the store opened, the server answered healthy, and every write was a
    # 500 ("attempt to write a readonly database").
    path = tmp_path / "locked.db"
    url = f"sqlite:///{path}"
    open_store(url).close()
    root = os.geteuid() == 0
    if root:
        subprocess.run(["chattr", "+i", str(path)], check=True)
    else:
        path.chmod(0o444)
    try:
        with pytest.raises(StoreUnavailable, match="readonly database"):
            open_store(url)
    finally:
        if root:
            subprocess.run(["chattr", "-i", str(path)], check=True)
