"""The bare baseline of `bench_service.py`: lease and report on Redis with nothing else.

The same atomic work as honing's lease and report, one Lua script per call, and none of the
rest (no auth, no lease expiry, no fencing epochs, no trust, no refit scheduling, no metrics):
FastAPI with the same strict, finite number validation of the body, redis.asyncio, and uvicorn
with the same options as ``honing serve``. Points are seeded by the benchmark with `seed`.

    python tests/benchmarks/baseline_app.py --port 8760 --redis redis://127.0.0.1:6379/0
"""

from __future__ import annotations

import argparse
import json
import time
from typing import Annotated

import redis.asyncio as aioredis
import uvicorn
from fastapi import FastAPI, HTTPException
from pydantic import BaseModel, Field

PREFIX = "baseline:"
POINTS = PREFIX + "points"  # list of point JSON waiting to be handed out
LEASES = PREFIX + "leases"  # sorted set: run id scored by lease expiry
SEQ = PREFIX + "seq"  # counter of run ids
RUN = PREFIX + "run:"  # hash per run: state, worker, point, lease_expires_at, result

# KEYS: 1 points, 2 seq, 3 leases;  ARGV: 1 run key prefix, 2 worker, 3 lease expiry
# Pops one point and writes its lease hash. Returns {run id, point} or {} when none is left.
LEASE = """
local point = redis.call('LPOP', KEYS[1])
if not point then return {} end
local rid = 'r' .. redis.call('INCR', KEYS[2])
redis.call('HSET', ARGV[1] .. rid, 'state', 'leased', 'worker', ARGV[2], 'point', point,
           'lease_expires_at', ARGV[3])
redis.call('ZADD', KEYS[3], ARGV[3], rid)
return {rid, point}
"""

# KEYS: 1 the run's hash, 2 leases;  ARGV: 1 run id, 2 result JSON
# Stores the result only while the run is leased. Returns 1 stored, 0 not leased, -1 no run.
REPORT = """
local state = redis.call('HGET', KEYS[1], 'state')
if not state then return -1 end
if state ~= 'leased' then return 0 end
redis.call('HSET', KEYS[1], 'state', 'done', 'result', ARGV[2])
redis.call('ZREM', KEYS[2], ARGV[1])
return 1
"""

Number = Annotated[float, Field(strict=True, allow_inf_nan=False)]


class LeaseBody(BaseModel):
    count: int = Field(default=1, ge=1, le=1)
    worker: str = ""
    lease_seconds: float = Field(default=3600.0, ge=1, le=604800)


class ReportBody(BaseModel):
    outputs: dict[str, list[Number]]


def create_app(redis_url: str) -> FastAPI:
    """The baseline app on the Redis at ``redis_url`` (connections open on first use)."""
    r = aioredis.Redis.from_url(redis_url)
    lease_script = r.register_script(LEASE)
    report_script = r.register_script(REPORT)
    app = FastAPI()

    @app.get("/healthz")
    async def healthz() -> dict[str, str]:
        await r.ping()
        return {"status": "ok", "store": "redis"}

    @app.post("/v1/calibrations/{calibration_id}/runs")
    async def lease(calibration_id: str, body: LeaseBody) -> dict:
        expires = time.time() + body.lease_seconds
        out = await lease_script(keys=[POINTS, SEQ, LEASES], args=[RUN, body.worker, expires])
        if not out:
            return {"runs": [], "status": "collecting"}
        run_id, point = out[0].decode(), json.loads(out[1])
        return {"runs": [{"run_id": run_id, "parameters": point}], "status": "collecting"}

    @app.put("/v1/calibrations/{calibration_id}/runs/{run_id}")
    async def report(calibration_id: str, run_id: str, body: ReportBody) -> dict:
        result = json.dumps({"outputs": body.outputs})
        stored = await report_script(keys=[RUN + run_id, LEASES], args=[run_id, result])
        if stored == -1:
            raise HTTPException(404, f"run {run_id!r} does not exist")
        if stored == 0:
            raise HTTPException(409, f"run {run_id!r} is not leased")
        return {"run_id": run_id, "state": "done", "trust": None}

    return app


def seed(redis_url: str, points: list[dict[str, float]]) -> None:
    """Queue points for the baseline to hand out (synchronously, from the benchmark)."""
    import redis

    with redis.Redis.from_url(redis_url) as r:
        for i in range(0, len(points), 1000):
            r.rpush(POINTS, *[json.dumps(p) for p in points[i : i + 1000]])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--redis", required=True, metavar="URL")
    args = parser.parse_args()
    app = create_app(args.redis)
    uvicorn.run(app, host=args.host, port=args.port, log_config=None, access_log=False)


if __name__ == "__main__":
    main()
