import random
import threading
from collections import Counter

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


def test_48_threads_lease_and_report_2000_results(store: Store) -> None:
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
                meta = service.meta(calibration_id)
                outcome = service.lease(meta, rng.randint(1, 6), f"w{seed}", 3600.0)
                if not outcome.runs:
                    return
                with lock:
                    handed.extend(
                        (r["run_id"], tuple(r["parameters"].values())) for r in outcome.runs
                    )
                for run in outcome.runs:
                    done = service.report(meta, run["run_id"], simulate(run["parameters"]), None)
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


def test_concurrent_reports_of_one_run_agree(store: Store) -> None:
    service = CalibrationService(store)
    calibration_id, _, _ = service.create(SPEC)
    meta = service.meta(calibration_id)
    (run,) = service.lease(meta, 1, "w", 3600.0).runs
    outputs = simulate(run["parameters"])
    different = {k: [v + 1.0 for v in vs] for k, vs in outputs.items()}
    outcomes: list[str] = []
    lock = threading.Lock()

    def send(i: int) -> None:
        try:
            service.report(meta, run["run_id"], outputs if i % 2 else different, None)
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
