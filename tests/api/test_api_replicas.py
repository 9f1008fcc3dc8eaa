import threading
from collections.abc import Callable
from pathlib import Path

import httpx
from helpers_api import SPEC, simulate
from test_api_server import api_process


def test_two_replicas_on_one_redis_lose_and_double_nothing(
    redis_factory,  # type: ignore[no-untyped-def]
    unused_port: Callable[[], int],
    tmp_path: Path,
) -> None:
    redis_server = redis_factory(appendonly=True)
    ports = [unused_port(), unused_port()]
    bases = [f"http://127.0.0.1:{p}" for p in ports]
    # A large initial design keeps refits out of the way: this checks leases and results.
    spec = {**SPEC, "design": {"initial_runs": 300, "batch_size": 8}, "budget": {"max_runs": 300}}
    acked: dict[str, dict] = {}
    leased_by: dict[str, int] = {}
    doubled: list[str] = []
    lock = threading.Lock()

    def work(index: int) -> None:
        # Each worker leases from one replica and reports to the other, in turn.
        clients = [httpx.Client(base_url=b, timeout=20) for b in bases]
        try:
            for step in range(30):
                lease_from = clients[(index + step) % 2]
                report_to = clients[(index + step + 1) % 2]
                runs = lease_from.post(f"{url}/runs", json={"count": 2}, headers=headers)
                for run in runs.json()["runs"]:
                    with lock:
                        if run["run_id"] in leased_by:
                            doubled.append(run["run_id"])
                        leased_by[run["run_id"]] = index
                    outputs = simulate(run["parameters"])
                    answer = report_to.put(
                        f"{url}/runs/{run['run_id']}", json={"outputs": outputs}, headers=headers
                    )
                    if answer.status_code == 200:
                        with lock:
                            acked[run["run_id"]] = outputs
        finally:
            for c in clients:
                c.close()

    with (
        api_process(redis_server.url, ports[0], tmp_path / "a.log", refit_workers=0),
        api_process(redis_server.url, ports[1], tmp_path / "b.log", refit_workers=0),
    ):
        created = httpx.post(f"{bases[0]}/v1/calibrations", json=spec).json()
        headers = {"Authorization": f"Bearer {created['token']}"}
        url = f"/v1/calibrations/{created['id']}"
        workers = [threading.Thread(target=work, args=(i,)) for i in range(6)]
        for w in workers:
            w.start()
        for w in workers:
            w.join()
        views = [
            httpx.get(f"{b}{url}/runs", headers=headers, timeout=20).json()["runs"] for b in bases
        ]
        meta = httpx.get(f"{bases[1]}{url}", headers=headers, timeout=20).json()

    assert doubled == []
    # 6 workers ask for 360 points; the budget of 300 holds across both replicas.
    assert len(acked) == len(leased_by) == spec["budget"]["max_runs"]
    # Both replicas serve the same store: the same runs, each acknowledged result kept once.
    assert sorted(r["run_id"] for r in views[0]) == sorted(r["run_id"] for r in views[1])
    stored = {r["run_id"]: r for r in views[0]}
    assert len(stored) == len(views[0])
    for run_id, outputs in acked.items():
        assert stored[run_id]["state"] == "done"
        assert stored[run_id]["outputs"] == outputs
    assert meta["runs_completed"] == len(acked)
