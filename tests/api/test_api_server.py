import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
from anyio.from_thread import start_blocking_portal
from helpers_api import SPEC, simulate

from honing.api import server

#: Bounded waits (not assertions on speed): how long a started server may take to answer.
START_WAIT = 60.0


@contextmanager
def api_process(
    store_url: str, port: int, log: Path, refit_workers: int = 1, env: dict | None = None
) -> Iterator[subprocess.Popen[bytes]]:
    """`run_server` in its own process group (uvicorn plus refit worker processes)."""
    code = (
        "from honing.api.server import run_server; "
        f"run_server('127.0.0.1', {port}, {store_url!r}, refit_workers={refit_workers})"
    )
    with open(log, "ab") as out:
        proc = subprocess.Popen(
            [sys.executable, "-c", code],
            stdout=out,
            stderr=out,
            env={**os.environ, **(env or {})},
            start_new_session=True,
        )
    try:
        deadline = time.monotonic() + START_WAIT
        while True:
            try:
                if httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"server did not start:\n{log.read_text()[-3000:]}")
            time.sleep(0.1)
        yield proc
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()


def kill_group(proc: subprocess.Popen[bytes]) -> None:
    """SIGKILL the server and its refit workers (its own process group)."""
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()


@pytest.fixture
def server_url(store_url: str, unused_port: Callable[[], int], tmp_path: Path) -> Iterator[str]:
    port = unused_port()
    env = {"HONING_MAX_BODY_BYTES": "4096"}
    with api_process(store_url, port, tmp_path / "server.log", env=env):
        yield f"http://127.0.0.1:{port}"


def test_real_server_loop_refit_worker_and_body_limit(server_url: str) -> None:
    with httpx.Client(base_url=server_url, timeout=30) as http:
        created = http.post("/v1/calibrations", json=SPEC).json()
        headers = {"Authorization": f"Bearer {created['token']}"}
        url = f"/v1/calibrations/{created['id']}"
        runs = http.post(f"{url}/runs", json={"count": 8}, headers=headers).json()["runs"]
        for run in runs:
            body = {"outputs": simulate(run["parameters"])}
            assert http.put(f"{url}/runs/{run['run_id']}", json=body, headers=headers).is_success
        # The refit worker process picks the job up; wait (bounded) for round 1.
        deadline = time.monotonic() + START_WAIT
        while http.get(f"{url}/posterior", headers=headers).json()["round"] < 1:
            assert time.monotonic() < deadline, "no refit happened"
            time.sleep(0.2)
        info = http.get(url, headers=headers).json()
        assert info["round"] == 1 and info["status"] in ("collecting", "fitting", "converged")
        assert http.get("/metrics").text.count("honing_http_requests_total{") >= 4

        # The server was started with HONING_MAX_BODY_BYTES=4096.
        json_headers = {**headers, "Content-Type": "application/json"}
        body = b'{"count": 1' + b" " * (4096 - 12) + b"}"
        assert len(body) == 4096
        assert http.post(f"{url}/runs", content=body, headers=json_headers).status_code == 200
        over = body[:-1] + b" }"
        response = http.post(f"{url}/runs", content=over, headers=json_headers)
        assert response.status_code == 413
        assert response.headers["content-type"] == "application/problem+json"

        def chunks(data: bytes) -> Iterator[bytes]:
            for i in range(0, len(data), 512):
                yield data[i : i + 512]

        # An iterator body goes out chunked, without Content-Length.
        response = http.post(f"{url}/runs", content=chunks(over), headers=json_headers)
        assert response.status_code == 413 and response.json()["status"] == 413
        assert http.post(f"{url}/runs", content=chunks(body), headers=json_headers).is_success


def _report_until_stopped(
    base: str, url: str, headers: dict, acked: dict, lock: threading.Lock, stop: threading.Event
) -> None:
    with httpx.Client(base_url=base, timeout=10) as http:
        while not stop.is_set():
            try:
                runs = http.post(f"{url}/runs", json={"count": 2}, headers=headers).json()["runs"]
                for run in runs:
                    outputs = simulate(run["parameters"])
                    response = http.put(
                        f"{url}/runs/{run['run_id']}", json={"outputs": outputs}, headers=headers
                    )
                    if response.status_code == 200:
                        with lock:
                            acked[run["run_id"]] = outputs
            except (httpx.TransportError, ValueError, KeyError):
                return


@pytest.mark.parametrize("backend", ["sqlite", "redis"])
def test_kill_9_loses_no_acknowledged_result(
    backend: str,
    sqlite_url: str,
    redis_factory,  # type: ignore[no-untyped-def]
    unused_port: Callable[[], int],
    tmp_path: Path,
) -> None:
    redis_server = redis_factory(appendonly=True) if backend == "redis" else None
    store_url = redis_server.url if redis_server else sqlite_url
    port = unused_port()
    base = f"http://127.0.0.1:{port}"
    spec = {**SPEC, "design": {"initial_runs": 400, "batch_size": 4}, "budget": {"max_runs": 400}}
    acked: dict[str, dict] = {}
    lock = threading.Lock()
    stop = threading.Event()
    with api_process(store_url, port, tmp_path / "server.log", refit_workers=0) as proc:
        created = httpx.post(f"{base}/v1/calibrations", json=spec).json()
        headers = {"Authorization": f"Bearer {created['token']}"}
        url = f"/v1/calibrations/{created['id']}"
        workers = [
            threading.Thread(
                target=_report_until_stopped, args=(base, url, headers, acked, lock, stop)
            )
            for _ in range(6)
        ]
        for w in workers:
            w.start()
        while len(acked) < 60 and any(w.is_alive() for w in workers):
            time.sleep(0.02)
        kill_group(proc)
        if redis_server is not None:
            # Redis dies too: appendfsync always must have put every acknowledged write on disk.
            redis_server.stop(kill=True)
            redis_server.start()
        stop.set()
        for w in workers:
            w.join()
    assert len(acked) >= 60
    with api_process(store_url, port, tmp_path / "server.log", refit_workers=0):
        runs = httpx.get(f"{base}{url}/runs", headers=headers).json()["runs"]
    stored = {r["run_id"]: r for r in runs}
    for run_id, outputs in acked.items():
        assert stored[run_id]["state"] == "done", run_id
        assert stored[run_id]["outputs"] == outputs


# A refit worker whose engine call hangs after saying so, to be killed mid-fit.
_HANGING_REFITTER = """
import sys, threading, time
from pathlib import Path
import honing.api.refitter as refitter
from honing.api.store import open_store

def hang(*args, **kwargs):
    Path(sys.argv[2]).write_text("fitting")
    time.sleep(600)

refitter.refit = hang
refitter.Refitter(open_store(sys.argv[1]), lock_ttl=1.0).run_forever(threading.Event())
"""


def test_a_refit_worker_killed_mid_fit_is_retried(store_url: str, tmp_path: Path) -> None:
    from honing.api.refitter import Refitter
    from honing.api.service import CalibrationService
    from honing.api.store import open_store

    store = open_store(store_url)
    service = CalibrationService(store)
    calibration_id, _, _ = service.create(SPEC)
    with start_blocking_portal() as portal:
        leased = portal.call(
            service.lease, calibration_id, SPEC["design"]["initial_runs"], "w", 3600.0
        )
        for run in leased.runs:
            portal.call(
                service.report, calibration_id, run["run_id"], simulate(run["parameters"]), None
            )
        portal.call(store.aclose)
    assert store.refit_queue_depth() == 1
    marker = tmp_path / "fitting"
    proc = subprocess.Popen(
        [sys.executable, "-c", _HANGING_REFITTER, store_url, str(marker)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.monotonic() + START_WAIT
        while not marker.exists():
            assert proc.poll() is None and time.monotonic() < deadline, "worker never fitted"
            time.sleep(0.05)
    finally:
        proc.kill()
        proc.wait()
    refitter = Refitter(store)
    # The dead worker's lock lapses after its ttl; until then the job is "locked".
    outcomes: list[str] = []
    deadline = time.monotonic() + START_WAIT
    while "written" not in outcomes:
        assert time.monotonic() < deadline, outcomes
        outcomes = refitter.step()
        time.sleep(0.05)
    assert service.state(service.meta(calibration_id)).round == 1
    assert store.refit_queue_depth() == 0
    store.close()


def test_refit_workers_exit_when_the_server_is_killed_outright(
    sqlite_url: str, unused_port: Callable[[], int], tmp_path: Path
) -> None:
    port = unused_port()
    with api_process(sqlite_url, port, tmp_path / "server.log", refit_workers=1) as proc:
        children = _children(proc.pid)
        assert children, "run_server started no refit worker"
        # SIGKILL to the server alone (not its group): nothing of it can clean up.
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        # Bounded wait: the worker polls its parent every PARENT_POLL_SECONDS (1 s).
        deadline = time.monotonic() + 20
        while any(_alive(pid) for pid in children) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not any(_alive(pid) for pid in children)


def _children(pid: int) -> list[int]:
    """Pids whose parent is `pid`, read from /proc (Linux)."""
    out = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid:
                out.append(int(entry.name))
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


_THREADS = """
import json
import honing.api.server as server
from threadpoolctl import threadpool_info
server.one_blas_thread_unless_set()
print(json.dumps(sorted({pool["num_threads"] for pool in threadpool_info()})))
"""


def test_a_refit_process_limits_every_blas_pool_to_one_thread() -> None:
    # Every BLAS and OpenMP pool the numerics loaded (numpy's and scipy's own OpenBLAS
    # builds, OpenMP), as threadpoolctl reports them, in a fresh interpreter.
    env = {k: v for k, v in os.environ.items() if k not in server.THREAD_VARIABLES}
    out = subprocess.run(
        [sys.executable, "-c", _THREADS],
        env=env,
        capture_output=True,
        text=True,
        check=True,
        timeout=120,
    )
    assert json.loads(out.stdout) == [1]


def test_an_operator_thread_setting_is_left_alone(monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[int] = []
    monkeypatch.setattr(server, "threadpool_limits", calls.append)
    for name in server.THREAD_VARIABLES:
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "2")
    server.one_blas_thread_unless_set()
    assert calls == []
    monkeypatch.delenv("OPENBLAS_NUM_THREADS")
    server.one_blas_thread_unless_set()
    assert calls == [1]
