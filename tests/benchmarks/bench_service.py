"""Latency and throughput of the service against a bare FastAPI + Redis baseline, a soak at a
steady worker load, and Redis memory per stored run. A script, run by hand; speed is measured
here, never asserted in tests.

    python tests/benchmarks/bench_service.py [--levels 1,8,64] [--round-trips 1000]
        [--round-trips-one 300] [--repeats 3] [--soak-seconds 300] [--skip-soak]
        [--skip-sqlite]

A quick look: ``--round-trips 200 --round-trips-one 60 --repeats 1 --soak-seconds 30``.

Everything runs on loopback in private processes: a redis-server on a free port (no RDB, AOF
with fsync always, in a temporary folder), ``honing serve`` on that Redis and on a SQLite file,
and `baseline_app.py` (the same atomic lease and report, one Lua script each, and nothing
else) under uvicorn with the same options. One round trip is a lease of one point (POST
.../runs, count 1) and the report of its 600-value result (PUT .../runs/{id}). Each level
runs on a fresh calibration whose initial design (10,000 points, the largest allowed) is far
larger than the round trips it serves, so no refit runs while latency is measured; the table
shows each calibration's round afterwards to confirm it stayed at 0. The three servers run
side by side and take turns level by level, so a busy machine slows them alike; the load
generator shares the machine's CPUs with them, as the numbers should be read.

The soak spreads its workers over as many such calibrations as keep it clear of a refit too
(it measures the request path under a steady load, not refits). Memory per stored run is the
change of Redis INFO used_memory over 1,000 finished runs, stored by import and by round trips.

Targets (printed beside the figures, never asserted): honing on Redis at least 0.7 of the
baseline's results per second at every level; median round trip at 1 client under 8 ms; in
the soak, 500 workers reporting every 10 s, p99 under 500 ms and no errors.
"""

from __future__ import annotations

import argparse
import asyncio
import collections
import math
import os
import platform
import random
import shlex
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import numpy as np
import redis

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import baseline_app  # noqa: E402  (beside this script, not an installed module)

#: Values in the single observation, and so in every reported result.
OUTPUT_SIZE = 600
#: The largest initial design the spec accepts: the first refit waits for this many results.
INITIAL_RUNS = 10_000
BATCH_SIZE = 1_000
MAX_RUNS = 100_000
#: Unmeasured round trips per client before each level starts (connections, caches).
WARMUP_TRIPS = 3
#: Wall-clock bound of one level, of a server start and of one request.
LEVEL_TIMEOUT = 600.0
START_TIMEOUT = 60.0
REQUEST_TIMEOUT = 30.0
#: Runs stored for the memory figure, and runs per import request (under the body limit).
MEMORY_RUNS = 1_000
IMPORT_CHUNK = 100

TARGET_RATIO = 0.7
TARGET_P50_MS = 8.0
TARGET_SOAK_P99_MS = 500.0


def spec(name: str) -> dict:
    """Two parameters, one observation of 600 values, a design too large to refit during a
    benchmark, and a budget that never runs out."""
    rng = np.random.default_rng(1)
    return {
        "name": name,
        "parameters": [
            {"name": "a", "prior": {"kind": "uniform", "low": 0.0, "high": 1.0}},
            {"name": "b", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}},
        ],
        "observations": [{"name": "y", "values": rng.normal(size=OUTPUT_SIZE).tolist(), "sd": 0.1}],
        "design": {"initial_runs": INITIAL_RUNS, "batch_size": BATCH_SIZE},
        "budget": {"max_runs": MAX_RUNS},
        "seed": 3,
    }


def result_body(seed: int = 2) -> bytes:
    """One report body: 600 doubles at full precision, encoded once and sent as bytes so the
    load generator spends no time encoding."""
    values = np.random.default_rng(seed).normal(size=OUTPUT_SIZE).tolist()
    return httpx.Request("PUT", "http://x", json={"outputs": {"y": values}}).content


def percentile_ms(seconds: list[float], q: float) -> float:
    return float(np.percentile(seconds, q)) * 1000.0 if seconds else math.nan


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


# processes


@contextmanager
def process(cmd: list[str], log: Path, health: str | None = None) -> Iterator[None]:
    """Run ``cmd`` in its own session until the block ends; wait for ``health`` to answer."""
    with log.open("wb") as out:
        proc = subprocess.Popen(
            cmd,
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            start_new_session=True,
        )
    try:
        if health is not None:
            wait_healthy(proc, health, log)
        yield
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, 9)  # its own session: the refit workers it spawned
            proc.wait(timeout=10)


def wait_healthy(proc: subprocess.Popen[bytes], url: str, log: Path) -> None:
    deadline = time.monotonic() + START_TIMEOUT
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            break
        try:
            if httpx.get(url, timeout=1.0).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    tail = log.read_text(errors="replace")[-2000:]
    raise RuntimeError(f"{url} did not answer within {START_TIMEOUT:.0f} s:\n{tail}")


@contextmanager
def private_redis(folder: Path) -> Iterator[str]:
    binary = shutil.which("redis-server")
    if binary is None:
        raise SystemExit("redis-server is not installed (apt-get install redis-server)")
    port = free_port()
    cmd = [
        binary,
        "--port",
        str(port),
        "--bind",
        "127.0.0.1",
        "--dir",
        str(folder),
        "--save",
        "",
        "--appendonly",
        "yes",
        "--appendfsync",
        "always",
    ]
    with process(cmd, folder / "redis.log"):
        url = f"redis://127.0.0.1:{port}/0"
        client = redis.Redis.from_url(url)
        for _ in range(200):
            try:
                client.ping()
                break
            except redis.ConnectionError:
                time.sleep(0.05)
        client.close()
        yield url


@contextmanager
def honing_server(store_url: str, folder: Path, tag: str) -> Iterator[str]:
    port = free_port()
    honing = Path(sys.executable).with_name("honing")
    prog = [str(honing)] if honing.exists() else [sys.executable, "-m", "honing.client.cli"]
    cmd = [*prog, "serve", "--host", "127.0.0.1", "--port", str(port), "--store", store_url]
    base = f"http://127.0.0.1:{port}"
    with process(cmd, folder / f"honing-{tag}.log", f"{base}/healthz"):
        yield base


@contextmanager
def baseline_server(redis_url: str, folder: Path) -> Iterator[str]:
    port = free_port()
    cmd = [sys.executable, str(HERE / "baseline_app.py"), "--port", str(port), "--redis", redis_url]
    base = f"http://127.0.0.1:{port}"
    with process(cmd, folder / "baseline.log", f"{base}/healthz"):
        yield base


def settle(timeout: float = 60.0) -> None:
    """Wait until the machine is nearly idle: the refit processes of ``honing serve`` are
    still importing the numerics for seconds after /healthz first answers."""

    def idle() -> tuple[int, int]:
        fields = [int(x) for x in Path("/proc/stat").read_text().split()[1:9]]
        return fields[3] + fields[4], sum(fields)

    if not Path("/proc/stat").exists():
        time.sleep(10.0)
        return
    deadline, quiet = time.monotonic() + timeout, 0
    while time.monotonic() < deadline and quiet < 3:
        idle0, total0 = idle()
        time.sleep(0.5)
        idle1, total1 = idle()
        quiet = quiet + 1 if (idle1 - idle0) >= 0.9 * max(total1 - total0, 1) else 0


# targets


@dataclass
class Target:
    """Where a load generator sends its round trips: a calibration's runs URL and token."""

    runs_url: str
    headers: dict[str, str]
    base: str
    calibration_id: str | None = None

    def round(self) -> str:
        if self.calibration_id is None:
            return "-"
        info = httpx.get(
            f"{self.base}/v1/calibrations/{self.calibration_id}", headers=self.headers
        ).json()
        return f"{info['round']} ({info['status']})"


def honing_target(base: str, name: str) -> Target:
    answer = httpx.post(f"{base}/v1/calibrations", json=spec(name), timeout=120)
    answer.raise_for_status()
    created = answer.json()
    return Target(
        f"{base}/v1/calibrations/{created['id']}/runs",
        {"Authorization": f"Bearer {created['token']}"},
        base,
        created["id"],
    )


def baseline_target(base: str, redis_url: str, points: int) -> Target:
    rng = random.Random(4)
    baseline_app.seed(redis_url, [{"a": rng.random(), "b": rng.gauss(0, 1)} for _ in range(points)])
    return Target(f"{base}/v1/calibrations/baseline/runs", {}, base)


# closed-loop load: n clients, each one round trip after another


@dataclass
class LevelResult:
    clients: int
    trips: int
    seconds: float
    latencies: list[float] = field(default_factory=list)
    errors: int = 0
    round: str = "-"

    @property
    def per_second(self) -> float:
        return len(self.latencies) / self.seconds if self.seconds > 0 else math.nan


def round_trip(http: httpx.Client, target: Target, body: bytes) -> bool:
    leased = http.post(target.runs_url, json={"count": 1, "worker": "bench"})
    if leased.status_code != 200 or not leased.json()["runs"]:
        return False
    run_id = leased.json()["runs"][0]["run_id"]
    reported = http.put(
        f"{target.runs_url}/{run_id}", content=body, headers={"content-type": "application/json"}
    )
    return reported.status_code == 200


def run_level(target: Target, clients: int, trips: int, body: bytes) -> LevelResult:
    """``trips`` round trips shared by ``clients`` threads, each with its own httpx.Client."""
    result = LevelResult(clients, trips, 0.0)
    shares = [trips // clients + (i < trips % clients) for i in range(clients)]
    start = threading.Barrier(clients + 1, timeout=LEVEL_TIMEOUT)
    lock = threading.Lock()
    deadline = time.monotonic() + LEVEL_TIMEOUT

    def client(share: int) -> None:
        latencies: list[float] = []
        errors = 0
        with httpx.Client(headers=target.headers, timeout=REQUEST_TIMEOUT) as http:
            for _ in range(WARMUP_TRIPS):
                try:
                    round_trip(http, target, body)
                except httpx.HTTPError:
                    pass
            start.wait()
            for _ in range(share):
                if time.monotonic() > deadline:
                    errors += 1
                    continue
                began = time.perf_counter()
                try:
                    ok = round_trip(http, target, body)
                except httpx.HTTPError:
                    ok = False
                if ok:
                    latencies.append(time.perf_counter() - began)
                else:
                    errors += 1
        with lock:
            result.latencies.extend(latencies)
            result.errors += errors

    threads = [threading.Thread(target=client, args=(s,), daemon=True) for s in shares]
    for t in threads:
        t.start()
    start.wait()
    began = time.perf_counter()
    for t in threads:
        t.join(timeout=max(deadline - time.monotonic(), 0.0) + REQUEST_TIMEOUT)
    result.seconds = time.perf_counter() - began
    result.round = target.round()
    return result


# soak: open-loop load, each worker one round trip every interval at its own phase


@dataclass
class SoakResult:
    workers: int
    interval: float
    seconds: float
    trips: list[float] = field(default_factory=list)
    requests: list[float] = field(default_factory=list)
    errors: int = 0
    reasons: collections.Counter[str] = field(default_factory=collections.Counter)
    late_starts: list[float] = field(default_factory=list)
    rounds: list[str] = field(default_factory=list)


async def soak(
    targets: list[Target], workers: int, interval: float, seconds: float, body: bytes
) -> SoakResult:
    out = SoakResult(workers, interval, seconds)
    rng = random.Random(5)
    limits = httpx.Limits(max_connections=workers, max_keepalive_connections=workers)
    async with httpx.AsyncClient(timeout=REQUEST_TIMEOUT, limits=limits) as http:
        loop = asyncio.get_running_loop()
        t0 = loop.time() + 1.0

        async def worker(i: int, phase: float) -> None:
            target = targets[i % len(targets)]
            for k in range(int(seconds / interval) + 1):
                due = t0 + phase + k * interval
                if due >= t0 + seconds:
                    return
                await asyncio.sleep(max(due - loop.time(), 0.0))
                out.late_starts.append(loop.time() - due)
                began = loop.time()
                try:
                    leased = await http.post(
                        target.runs_url,
                        json={"count": 1, "worker": f"w{i}"},
                        headers=target.headers,
                    )
                    mid = loop.time()
                    runs = leased.json()["runs"] if leased.status_code == 200 else []
                    if not runs:
                        out.errors += 1
                        out.reasons[f"lease {leased.status_code}: {leased.text[:200]}"] += 1
                        continue
                    reported = await http.put(
                        f"{target.runs_url}/{runs[0]['run_id']}",
                        content=body,
                        headers={**target.headers, "content-type": "application/json"},
                    )
                    end = loop.time()
                    if reported.status_code != 200:
                        out.errors += 1
                        out.reasons[f"report {reported.status_code}: {reported.text[:200]}"] += 1
                        continue
                except httpx.HTTPError as exc:
                    out.errors += 1
                    out.reasons[f"{type(exc).__name__}: {exc}"] += 1
                    continue
                out.requests += [mid - began, end - mid]
                out.trips.append(end - began)

        tasks = [worker(i, rng.uniform(0.0, interval)) for i in range(workers)]
        await asyncio.wait_for(asyncio.gather(*tasks), timeout=seconds + 2 * REQUEST_TIMEOUT + 30)
    out.rounds = [t.round() for t in targets]
    return out


# memory


def used_memory(redis_url: str) -> int:
    with redis.Redis.from_url(redis_url) as r:
        return int(r.info("memory")["used_memory"])


def memory_by_import(base: str, redis_url: str) -> int:
    target = honing_target(base, "bench-memory-import")
    rng = np.random.default_rng(6)
    values = np.random.default_rng(2).normal(size=OUTPUT_SIZE).tolist()
    before = used_memory(redis_url)
    with httpx.Client(headers=target.headers, timeout=120) as http:
        for _ in range(MEMORY_RUNS // IMPORT_CHUNK):
            runs = [
                {
                    "parameters": {"a": float(rng.uniform()), "b": float(rng.normal())},
                    "outputs": {"y": values},
                }
                for _ in range(IMPORT_CHUNK)
            ]
            http.post(f"{target.runs_url}/import", json={"runs": runs}).raise_for_status()
    return used_memory(redis_url) - before


def memory_by_round_trips(target: Target, redis_url: str, body: bytes) -> tuple[int, int]:
    before = used_memory(redis_url)
    level = run_level(target, 8, MEMORY_RUNS - 8 * WARMUP_TRIPS, body)
    return used_memory(redis_url) - before, len(level.latencies) + 8 * WARMUP_TRIPS


# report


def per_second(runs: list[LevelResult]) -> float:
    """Median results per second over the repeats of one level."""
    return float(np.median([r.per_second for r in runs]))


def level_rows(name: str, levels: dict[int, list[LevelResult]]) -> list[str]:
    rows = []
    for clients, runs in levels.items():
        latencies = [x for r in runs for x in r.latencies]
        rows.append(
            f"| {name} | {clients} | {len(latencies)} | {sum(r.errors for r in runs)} | "
            f"{percentile_ms(latencies, 50):.2f} | {percentile_ms(latencies, 99):.2f} | "
            f"{per_second(runs):.0f} | {', '.join(sorted({r.round for r in runs}))} |"
        )
    return rows


def verdict(ok: bool) -> str:
    return "met" if ok else "missed"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--levels", default="1,8,64", help="concurrent clients, comma separated")
    parser.add_argument(
        "--round-trips", type=int, default=1000, help="measured round trips per level above 1"
    )
    parser.add_argument(
        "--round-trips-one", type=int, default=300, help="measured round trips at 1 client"
    )
    parser.add_argument("--soak-seconds", type=float, default=300.0)
    parser.add_argument("--soak-workers", type=int, default=500)
    parser.add_argument("--soak-interval", type=float, default=10.0, help="seconds per worker")
    parser.add_argument("--skip-soak", action="store_true")
    parser.add_argument("--skip-sqlite", action="store_true")
    parser.add_argument(
        "--repeats", type=int, default=3, help="runs of each level (median results/s)"
    )
    args = parser.parse_args()
    levels = [int(x) for x in args.levels.split(",") if x.strip()]
    command = shlex.join([Path(sys.executable).name, *sys.argv])
    body = result_body()
    wall = time.perf_counter()

    def trips(clients: int) -> int:
        return args.round_trips_one if clients == 1 else args.round_trips

    names = ["honing, redis", "baseline, redis"] + ([] if args.skip_sqlite else ["honing, sqlite"])
    results: dict[str, dict[int, list[LevelResult]]] = {n: {c: [] for c in levels} for n in names}
    memory: list[tuple[str, str, int, int]] = []
    soaked: SoakResult | None = None
    with tempfile.TemporaryDirectory(prefix="honing-bench-") as tmp, ExitStack() as stack:
        folder = Path(tmp)
        redis_url = stack.enter_context(private_redis(folder))
        with redis.Redis.from_url(redis_url) as r:
            redis_version = r.info("server")["redis_version"]
        bases = {
            "honing, redis": stack.enter_context(honing_server(redis_url, folder, "redis")),
            "baseline, redis": stack.enter_context(baseline_server(redis_url, folder)),
        }
        if not args.skip_sqlite:
            sqlite_url = f"sqlite:///{folder / 'bench.db'}"
            bases["honing, sqlite"] = stack.enter_context(
                honing_server(sqlite_url, folder, "sqlite")
            )

        def target(name: str, clients: int) -> Target:
            if name.startswith("baseline"):
                points = trips(clients) + clients * WARMUP_TRIPS
                return baseline_target(bases[name], redis_url, points)
            return honing_target(bases[name], f"bench-{clients}")

        settle()
        # Servers take turns level by level, so drift of the machine hits all of them alike.
        for clients in levels:
            for repeat in range(args.repeats):
                for name in names:
                    level = run_level(target(name, clients), clients, trips(clients), body)
                    results[name][clients].append(level)
                    print(
                        f"{name}, {clients} clients, run {repeat + 1}: "
                        f"{level.per_second:.0f} results/s",
                        file=sys.stderr,
                    )
        honing_base = bases["honing, redis"]
        memory.append(
            ("honing, redis", "import", memory_by_import(honing_base, redis_url), MEMORY_RUNS)
        )
        for name in ("honing, redis", "baseline, redis"):
            delta, n = memory_by_round_trips(
                honing_target(honing_base, "bench-memory")
                if name.startswith("honing")
                else baseline_target(bases[name], redis_url, MEMORY_RUNS),
                redis_url,
                body,
            )
            memory.append((name, "lease + report", delta, n))
        if not args.skip_soak:
            per = INITIAL_RUNS + BATCH_SIZE
            expected = args.soak_workers * (args.soak_seconds / args.soak_interval + 1)
            targets = [
                honing_target(honing_base, f"bench-soak-{i}")
                for i in range(max(1, math.ceil(1.2 * expected / per)))
            ]
            print(
                f"soak: {args.soak_seconds:.0f} s on {len(targets)} calibration(s)",
                file=sys.stderr,
            )
            soaked = asyncio.run(
                soak(targets, args.soak_workers, args.soak_interval, args.soak_seconds, body)
            )
    wall = time.perf_counter() - wall

    print(f"\n`{command}`\n")
    print(
        f"{platform.platform()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
        f"redis-server {redis_version} (AOF, appendfsync always); wall time {wall:.0f} s\n"
    )
    print(
        f"Round trips (lease 1 point + report {OUTPUT_SIZE} values), closed loop on loopback; "
        f"results/s is the median of {args.repeats} run(s) per level, p50 and p99 pool them:\n"
    )
    print(
        "| server, store | clients | round trips | errors | p50 ms | p99 ms | results/s "
        "| round after |"
    )
    print("| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- |")
    for name, rows in results.items():
        for line in level_rows(name, rows):
            print(line)

    honing, base_rows = results["honing, redis"], results["baseline, redis"]
    sqlite = results.get("honing, sqlite")
    print("\nhoning / baseline, results per second:\n")
    print("| clients | honing redis / baseline | honing sqlite / baseline |")
    print("| ---: | ---: | ---: |")
    ratios = []
    for n in levels:
        ratio = per_second(honing[n]) / per_second(base_rows[n])
        ratios.append((n, ratio))
        side = f"{per_second(sqlite[n]) / per_second(base_rows[n]):.2f}" if sqlite else "-"
        print(f"| {n} | {ratio:.2f} | {side} |")

    print(f"\nRedis memory per stored run ({OUTPUT_SIZE} values, result body {len(body)} bytes):\n")
    print("| server | stored by | runs | used_memory delta | bytes per run |")
    print("| --- | --- | ---: | ---: | ---: |")
    for name, how, delta, n in memory:
        print(f"| {name} | {how} | {n} | {delta} | {delta / n:.0f} |")

    if soaked is not None:
        late = percentile_ms(soaked.late_starts, 99)
        offered = soaked.workers / soaked.interval
        print(
            f"\nSoak on honing + redis: {soaked.workers} workers, one round trip each every "
            f"{soaked.interval:g} s ({offered:.0f} results/s offered), {soaked.seconds:.0f} s, "
            f"{len(soaked.trips)} round trips, calibrations' rounds after: "
            f"{', '.join(soaked.rounds)}; p99 start lag of the load generator {late:.1f} ms\n"
        )
        print("| measure | p50 ms | p99 ms | max ms | errors | results/s |")
        print("| --- | ---: | ---: | ---: | ---: | ---: |")
        print(
            f"| round trip | {percentile_ms(soaked.trips, 50):.2f} | "
            f"{percentile_ms(soaked.trips, 99):.2f} | {percentile_ms(soaked.trips, 100):.2f} | "
            f"{soaked.errors} | {len(soaked.trips) / soaked.seconds:.1f} |"
        )
        print(
            f"| one request | {percentile_ms(soaked.requests, 50):.2f} | "
            f"{percentile_ms(soaked.requests, 99):.2f} | "
            f"{percentile_ms(soaked.requests, 100):.2f} | | |"
        )

    print("\nTargets (honing on redis):\n")
    print("| target | measured | |")
    print("| --- | ---: | --- |")
    for n, ratio in ratios:
        print(
            f"| results/s at {n} clients >= {TARGET_RATIO} x baseline | {ratio:.2f} x | "
            f"{verdict(ratio >= TARGET_RATIO)} |"
        )
    if 1 in levels:
        p50 = percentile_ms([x for r in honing[1] for x in r.latencies], 50)
        print(
            f"| p50 at 1 client < {TARGET_P50_MS:g} ms | {p50:.2f} ms | "
            f"{verdict(p50 < TARGET_P50_MS)} |"
        )
    if soaked is not None:
        p99 = percentile_ms(soaked.trips, 99)
        print(
            f"| soak p99 round trip < {TARGET_SOAK_P99_MS:g} ms | {p99:.2f} ms | "
            f"{verdict(p99 < TARGET_SOAK_P99_MS)} |"
        )
        print(f"| soak errors = 0 | {soaked.errors} | {verdict(soaked.errors == 0)} |")
        for reason, count in soaked.reasons.most_common():
            print(f"\nsoak error x {count}: {reason}")


if __name__ == "__main__":
    main()
