import random
import threading
import time
from collections import Counter

from anyio.from_thread import BlockingPortal
from helpers_api import SPEC, simulate

from honing.api.service import CalibrationService
from honing.api.store import Store

THREADS = 48
RESULTS = 2000


def _spec() -> dict:
    # One big initial design, so all 2,000 points come from round 0 and no refit is needed.
    return {
        **SPEC,
        "design": {"initial_runs": RESULTS, "batch_size": 4},
        "budget": {"max_runs": RESULTS},
    }


def test_48_threads_lease_and_report_2000_results(store: Store, portal: BlockingPortal) -> None:
    service = CalibrationService(store)
    calibration_id, _, _ = service.create(_spec())
    handed: list[tuple[str, tuple[float, ...]]] = []
    acknowledged: list[str] = []
    errors: list[BaseException] = []
    lock = threading.Lock()
    start = threading.Barrier(THREADS)

    def work(seed: int) -> None:
        rng = random.Random(seed)
        try:
            start.wait()
            while True:
                outcome = portal.call(
                    service.lease, calibration_id, rng.randint(1, 6), f"w{seed}", 3600.0
                )
                if not outcome.runs:
                    return
                with lock:
                    handed.extend(
                        (r["run_id"], tuple(r["parameters"].values())) for r in outcome.runs
                    )
                for run in outcome.runs:
                    done = portal.call(
                        service.report,
                        calibration_id,
                        run["run_id"],
                        simulate(run["parameters"]),
                        None,
                    )
                    assert done.state == "done"
                    with lock:
                        acknowledged.append(run["run_id"])
        except BaseException as exc:  # reported below: a thread's failure must fail the test
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(THREADS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors[:3]
    run_ids = Counter(run_id for run_id, _ in handed)
    points = Counter(point for _, point in handed)
    assert len(handed) == RESULTS
    assert max(run_ids.values()) == 1, "a run id was handed out twice"
    assert max(points.values()) == 1, "a point was handed out twice while leased"
    assert len(acknowledged) == RESULTS
    meta = service.meta(calibration_id)
    assert (meta.done, meta.failed, meta.leased) == (RESULTS, 0, 0)
    stored = {r.run_id: r for r in store.list_runs(calibration_id)}
    assert set(stored) == set(acknowledged)
    assert all(r.state == "done" and r.result is not None for r in stored.values())
    finished = [r.run_id for r in store.finished_runs(calibration_id)]
    assert sorted(finished) == sorted(acknowledged)
    # Every stored output is the one its worker sent.
    sample = random.Random(0).sample(sorted(stored), 50)
    for run_id in sample:
        record = stored[run_id]
        assert record.result["outputs"] == simulate(record.point["parameters"])  # type: ignore[index]


def test_concurrent_reports_of_one_run_agree(store: Store, portal: BlockingPortal) -> None:
    service = CalibrationService(store)
    calibration_id, _, _ = service.create(SPEC)
    (run,) = portal.call(service.lease, calibration_id, 1, "w", 3600.0).runs
    outputs = simulate(run["parameters"])
    different = {k: [v + 1.0 for v in vs] for k, vs in outputs.items()}
    outcomes: list[str] = []
    lock = threading.Lock()

    def send(i: int) -> None:
        try:
            portal.call(
                service.report, calibration_id, run["run_id"], outputs if i % 2 else different, None
            )
            result = "same" if i % 2 else "different"
        except Exception as exc:
            result = type(exc).__name__
        with lock:
            outcomes.append(result)

    threads = [threading.Thread(target=send, args=(i,)) for i in range(16)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    # Exactly one version of the result won; every sender of the other got a conflict.
    counts = Counter(outcomes)
    assert counts["ConflictError"] == 8 and counts["same"] + counts["different"] == 8, counts
    assert service.meta(calibration_id).done == 1


def test_expiring_leases_under_load_never_overlap(store: Store, portal: BlockingPortal) -> None:
    target = 400
    service = CalibrationService(store)
    design = {"initial_runs": target, "batch_size": 4}
    calibration_id, _, _ = service.create({**SPEC, "design": design, "budget": {"max_runs": 10**4}})
    errors: list[BaseException] = []
    # Bounded run: the loop stops by itself; the assertions below do not depend on speed.
    deadline = time.monotonic() + 120

    def work(seed: int) -> None:
        rng = random.Random(seed)
        try:
            while time.monotonic() < deadline:
                meta = service.meta(calibration_id)
                if meta.queued == 0 and meta.leased == 0:
                    return  # every point handed out, and no lease outstanding
                runs = portal.call(
                    service.lease, calibration_id, rng.randint(1, 3), f"w{seed}", 0.5
                ).runs
                if not runs:
                    time.sleep(0.02)
                for run in runs:
                    if rng.random() < 0.15:
                        continue  # this worker "dies" with the lease: it must expire
                    portal.call(
                        service.report,
                        calibration_id,
                        run["run_id"],
                        simulate(run["parameters"]),
                        None,
                    )
        except BaseException as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(THREADS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors[:3]
    runs = store.list_runs(calibration_id)
    by_point: dict[tuple, list] = {}
    for r in runs:
        by_point.setdefault(tuple(r.point["parameters"].values()), []).append(r)
    done_points = {p for p, rs in by_point.items() if any(r.state == "done" for r in rs)}
    # Round 0 proposes the initial design and one batch of spares: each got a result.
    assert len(by_point) == target + 4 and done_points == set(by_point)
    assert any(len(rs) > 1 for rs in by_point.values()), "some leases expired and came back"
    for point_runs in by_point.values():
        # seq is given inside the atomic lease step, so it is the order the leases happened in.
        point_runs.sort(key=lambda r: r.seq)
        for earlier in point_runs[:-1]:
            # A point goes out again only after its earlier lease expired: epoch 2 when it is
            # still "expired", epoch 3 when a late result came afterwards.
            expired = (earlier.state, earlier.epoch) in {("expired", 2), ("done", 3)}
            assert expired, earlier
    meta = service.meta(calibration_id)
    assert meta.done == sum(r.state == "done" for r in runs)
