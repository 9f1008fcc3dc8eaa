"""Throughput of the service: leases and reports per second on each store, in-process and over
HTTP through the embedded server. Run by hand; speed is measured here, never asserted in tests.

    python tests/benchmarks/bench_service.py [--results 2000] [--threads 16] [--redis-url URL]

Without --redis-url a private redis-server is started on a free port (when installed).
"""

from __future__ import annotations

import argparse
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

import httpx

from honing.api.server import start_background_server
from honing.api.service import CalibrationService
from honing.api.store import open_store

SPEC = {
    "name": "bench",
    "parameters": [
        {"name": "a", "prior": {"kind": "uniform", "low": 0.0, "high": 1.0}},
        {"name": "b", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}},
    ],
    "observations": [{"name": "y", "values": [0.0] * 20, "sd": 0.1}],
}


def outputs(parameters: dict[str, float]) -> dict[str, list[float]]:
    return {"y": [parameters["a"] * i + parameters["b"] for i in range(20)]}


def spec_for(results: int) -> dict:
    return {**SPEC, "design": {"initial_runs": results, "batch_size": 4},
            "budget": {"max_runs": results}}  # fmt: skip


def run_threads(threads: int, work: Callable[[], None]) -> float:
    """Run ``work`` in each thread; wall seconds until all finish."""
    pool = [threading.Thread(target=work) for _ in range(threads)]
    started = time.perf_counter()
    for t in pool:
        t.start()
    for t in pool:
        t.join()
    return time.perf_counter() - started


def bench_service(store_url: str, results: int, threads: int) -> float:
    store = open_store(store_url)
    service = CalibrationService(store)
    calibration_id, _, _ = service.create(spec_for(results))

    def work() -> None:
        while True:
            meta = service.meta(calibration_id)
            runs = service.lease(meta, 4, "bench", 3600.0).runs
            if not runs:
                return
            for run in runs:
                service.report(meta, run["run_id"], outputs(run["parameters"]), None)

    elapsed = run_threads(threads, work)
    assert service.meta(calibration_id).done == results
    store.close()
    return results / elapsed


def bench_http(store_url: str, results: int, threads: int) -> float:
    base, stop = start_background_server(store_url)
    try:
        created = httpx.post(f"{base}/v1/calibrations", json=spec_for(results)).json()
        headers = {"Authorization": f"Bearer {created['token']}"}
        url = f"{base}/v1/calibrations/{created['id']}"

        def work() -> None:
            with httpx.Client(headers=headers, timeout=60) as http:
                while True:
                    runs = http.post(f"{url}/runs", json={"count": 4}).json()["runs"]
                    if not runs:
                        return
                    for run in runs:
                        body = {"outputs": outputs(run["parameters"])}
                        http.put(f"{url}/runs/{run['run_id']}", json=body).raise_for_status()

        elapsed = run_threads(threads, work)
        assert httpx.get(url, headers=headers).json()["runs_completed"] == results
        return results / elapsed
    finally:
        stop()


def private_redis(folder: Path) -> tuple[str, subprocess.Popen[bytes]] | None:
    binary = shutil.which("redis-server") or "/usr/bin/redis-server"
    if not Path(binary).exists():
        return None
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    proc = subprocess.Popen(
        [binary, "--port", str(port), "--bind", "127.0.0.1", "--dir", str(folder),
         "--save", "", "--appendonly", "yes", "--appendfsync", "always"],
        stdout=subprocess.DEVNULL,
    )  # fmt: skip
    for _ in range(200):
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.1).close()
            return f"redis://127.0.0.1:{port}/0", proc
        except OSError:
            time.sleep(0.05)
    proc.terminate()
    return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--results", type=int, default=2000)
    parser.add_argument("--threads", type=int, default=16)
    parser.add_argument("--redis-url")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        stores = {"sqlite": f"sqlite:///{folder / 'bench.db'}"}
        started = None
        if args.redis_url:
            stores["redis"] = args.redis_url
        else:
            started = private_redis(folder)
            if started:
                stores["redis (AOF, fsync always)"] = started[0]
        try:
            print(f"{'store':<28} {'in-process /s':>14} {'HTTP /s':>10}")
            for name, url in stores.items():
                local = bench_service(url, args.results, args.threads)
                remote = bench_http(url, args.results, args.threads)
                print(f"{name:<28} {local:>14.0f} {remote:>10.0f}")
        finally:
            if started:
                started[1].terminate()
                started[1].wait()


if __name__ == "__main__":
    main()
