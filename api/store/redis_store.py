"""Redis backend of the `Store` contract: one Lua script per atomic step.

Scripts build per-run key names from the calibration's prefix (passed in ARGV). Every such key
carries the same ``{<id>}`` hash tag as the declared KEYS, so on Redis Cluster each script still
touches one slot only. Numbers that must stay exact (times) are formatted in Python and passed
as strings, since Lua would print them with 14 significant digits.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import redis
import redis.asyncio as aioredis
from anyio import to_thread
from redis.client import Pipeline
from redis.commands.core import Script

from honing.api.store.base import (
    CalibrationMeta,
    ExtendResult,
    FinishResult,
    LeaseResult,
    NewCalibration,
    RunRecord,
    StoreUnavailable,
)
from honing.api.store.keys import REFIT_DUE, CalibrationKeys

__all__ = ["RedisStore"]

log = logging.getLogger(__name__)

_CHUNK = 1000
#: Seconds a command may take, and a connection to open, before Redis counts as unavailable.
SOCKET_TIMEOUT = 5.0
CONNECT_TIMEOUT = 2.0
#: Connections of the async client (lease, report, auth reads): requests beyond them wait.
ASYNC_CONNECTIONS = 64

# Script flags (Redis 7+): a script that writes is refused as a whole, before it starts, while
# Redis is over maxmemory (so a full Redis answers 503, never half a step); one that only reads
# runs anyway.
_WRITES = "#!lua\n"
_READS = "#!lua flags=no-writes\n"

# Shared by every script that changes runs: expire overdue leases first.
# Each leased run whose expiry is <= now becomes "expired" (epoch + 1, so a writer holding the
# old epoch must re-read), its point goes to the back of the requeue list.
_EXPIRE_FN = """
local function expire_overdue(meta, leases, requeue, run_prefix, now)
  local due = redis.call('ZRANGEBYSCORE', leases, '-inf', now)
  local expired = 0
  for _, rid in ipairs(due) do
    local rk = run_prefix .. rid
    if redis.call('HGET', rk, 'state') == 'leased' then
      redis.call('HSET', rk, 'state', 'expired')
      redis.call('HINCRBY', rk, 'epoch', 1)
      redis.call('RPUSH', requeue, redis.call('HGET', rk, 'point'))
      redis.call('HINCRBY', meta, 'leased', -1)
      expired = expired + 1
    end
    redis.call('ZREM', leases, rid)
  end
  return expired
end
"""

# The metadata fields ARGV[first..], then the lengths of the proposal and requeue lists and
# whether the refit lock is held, as one flat array (missing fields are nil).
_SNAPSHOT_FN = """
local function meta_snapshot(meta, proposals, requeue, lock, argv, first)
  local out = redis.call('HMGET', meta, unpack(argv, first))
  table.insert(out, redis.call('LLEN', proposals))
  table.insert(out, redis.call('LLEN', requeue))
  table.insert(out, redis.call('EXISTS', lock))
  return out
end
"""

# KEYS: 1 meta, 2 proposals, 3 requeue, 4 refit lock;  ARGV: the metadata fields to return
# Reads metadata, queue lengths and the lock in one step. Returns {} when there is none.
_META = (
    _READS
    + _SNAPSHOT_FN
    + """
if redis.call('EXISTS', KEYS[1]) == 0 then return {} end
return meta_snapshot(KEYS[1], KEYS[2], KEYS[3], KEYS[4], ARGV, 1)
"""
)

# KEYS: 1 meta, 2 requeue, 3 leases
# ARGV: 1 run key prefix, 2 now
# Returns the number of leases expired, or -1 when the calibration does not exist.
_EXPIRE = (
    _WRITES
    + _EXPIRE_FN
    + """
if redis.call('EXISTS', KEYS[1]) == 0 then return -1 end
return expire_overdue(KEYS[1], KEYS[3], KEYS[2], ARGV[1], ARGV[2])
"""
)

# KEYS: 1 meta, 2 proposals, 3 requeue, 4 leases, 5 runs, 6 refit lock
# ARGV: 1 run key prefix, 2 now, 3 count, 4 worker, 5 lease expiry time, 6 max_runs,
#       7... the metadata fields to return
# Expires overdue leases, then, while the calibration is open (engine_status "collecting", no
# failed_error), hands out up to count points: re-queued ones first, then the current
# proposals, never more than max_runs - done - failed - leased (max_runs: the meta field when a
# budget was set after creation, else ARGV[6]). Each new run gets id
# "r<seq>", state "leased", epoch 1.
# Returns {expired, snapshot, rid_1, seq_1, point_1, rid_2, ...} (snapshot: the metadata
# afterwards, as _META returns it), or {-1} when the calibration is gone.
_LEASE = (
    _WRITES
    + _EXPIRE_FN
    + _SNAPSHOT_FN
    + """
local meta = KEYS[1]
if redis.call('EXISTS', meta) == 0 then return {-1} end
local expired = expire_overdue(meta, KEYS[4], KEYS[3], ARGV[1], ARGV[2])
local c = redis.call('HMGET', meta, 'done', 'failed', 'leased', 'engine_status', 'failed_error',
                     'max_runs')
local room = tonumber(c[6] or ARGV[6]) - tonumber(c[1]) - tonumber(c[2]) - tonumber(c[3])
if c[4] ~= 'collecting' or c[5] then room = 0 end
local n = math.min(tonumber(ARGV[3]), room)
local out = {expired, false}
for _ = 1, n do
  local point = redis.call('LPOP', KEYS[3])
  if not point then point = redis.call('LPOP', KEYS[2]) end
  if not point then break end
  local seq = redis.call('HINCRBY', meta, 'seq', 1)
  local rid = 'r' .. seq
  redis.call('HSET', ARGV[1] .. rid, 'run_id', rid, 'seq', seq, 'state', 'leased',
             'epoch', 1, 'worker', ARGV[4], 'leased_at', ARGV[2],
             'lease_expires_at', ARGV[5], 'point', point, 'imported', '0')
  redis.call('ZADD', KEYS[4], ARGV[5], rid)
  redis.call('RPUSH', KEYS[5], rid)
  redis.call('HINCRBY', meta, 'leased', 1)
  table.insert(out, rid)
  table.insert(out, seq)
  table.insert(out, point)
end
out[2] = meta_snapshot(meta, KEYS[2], KEYS[3], KEYS[6], ARGV, 7)
return out
"""
)

# KEYS: 1 meta, 2 requeue, 3 leases, 4 finished, 5 the run's hash, 6 proposals, 7 refit lock
# ARGV: 1 run key prefix, 2 now, 3 run id, 4 expected epoch, 5 new state ("done"/"failed"),
#       6 result JSON, 7 completion time, 8... the metadata fields to return
# Writes the result only if the run's epoch is still the one the caller read (fencing: a run
# that expired or finished meanwhile has a new epoch), and expires the other overdue leases.
# A lease that ran out but was not yet expired is finished like any other (no one else has
# its point); an expired run's re-queued point is withdrawn while no one has leased it again.
# Returns {1, expired, snapshot} written (snapshot: the metadata after the write, as _META
# returns it), {0, expired} not written (stale epoch or no such run), -1 no calibration.
_FINISH = (
    _WRITES
    + _EXPIRE_FN
    + _SNAPSHOT_FN
    + """
local meta = KEYS[1]
if redis.call('EXISTS', meta) == 0 then return -1 end
local rk = KEYS[5]
local state = redis.call('HGET', rk, 'state')
local current = state and redis.call('HGET', rk, 'epoch') == ARGV[4]
                and state ~= 'done' and state ~= 'failed'
if current and state == 'leased' then
  redis.call('ZREM', KEYS[3], ARGV[3])
  redis.call('HINCRBY', meta, 'leased', -1)
end
local expired = expire_overdue(meta, KEYS[3], KEYS[2], ARGV[1], ARGV[2])
if not current then return {0, expired} end
if state == 'expired' then
  redis.call('LREM', KEYS[2], 1, redis.call('HGET', rk, 'point'))
end
redis.call('HSET', rk, 'state', ARGV[5], 'result', ARGV[6], 'completed_at', ARGV[7])
redis.call('HINCRBY', rk, 'epoch', 1)
redis.call('HINCRBY', meta, ARGV[5], 1)
redis.call('RPUSH', KEYS[4], ARGV[3])
return {1, expired, meta_snapshot(meta, KEYS[6], KEYS[2], KEYS[7], ARGV, 8)}
"""
)

# KEYS: 1 meta, 2 requeue, 3 leases, 4 run
# ARGV: 1 run key prefix, 2 now, 3 run id, 4 wanted expiry time, 5 longest hold in seconds
# Expires overdue leases, then, if the run is still leased, moves its expiry (in its hash and
# in the leases set) to ARGV[4], capped at leased_at + ARGV[5] and never earlier than it was;
# its epoch stays. Returns {expired, state, expiry} (state nil when there is no such run,
# expiry only while leased, as stored), or -1 when the calibration does not exist.
_EXTEND_LEASE = (
    _WRITES
    + _EXPIRE_FN
    + """
local meta = KEYS[1]
if redis.call('EXISTS', meta) == 0 then return -1 end
local expired = expire_overdue(meta, KEYS[3], KEYS[2], ARGV[1], ARGV[2])
local rk = KEYS[4]
local state = redis.call('HGET', rk, 'state')
if state ~= 'leased' then return {expired, state} end
local current = redis.call('HGET', rk, 'lease_expires_at')
local cap = tonumber(redis.call('HGET', rk, 'leased_at')) + tonumber(ARGV[5])
local wanted = ARGV[4]
if tonumber(wanted) > cap then wanted = string.format('%.17g', cap) end
if tonumber(wanted) > tonumber(current) then
  redis.call('HSET', rk, 'lease_expires_at', wanted)
  redis.call('ZADD', KEYS[3], wanted, ARGV[3])
  current = wanted
end
return {expired, state, current}
"""
)

# KEYS: 1 meta, 2 runs, 3 finished
# ARGV: 1 run key prefix, 2 now, then point JSON and result JSON for each imported run
# Adds every run as "done" (imported = 1) in one step. Returns the new run ids, or {-1}.
_IMPORT = (
    _WRITES
    + """
local meta = KEYS[1]
if redis.call('EXISTS', meta) == 0 then return {-1} end
local out = {}
for i = 3, #ARGV, 2 do
  local seq = redis.call('HINCRBY', meta, 'seq', 1)
  local rid = 'r' .. seq
  redis.call('HSET', ARGV[1] .. rid, 'run_id', rid, 'seq', seq, 'state', 'done', 'epoch', 1,
             'worker', '', 'completed_at', ARGV[2], 'point', ARGV[i], 'result', ARGV[i + 1],
             'imported', '1')
  redis.call('RPUSH', KEYS[2], rid)
  redis.call('RPUSH', KEYS[3], rid)
  redis.call('HINCRBY', meta, 'done', 1)
  table.insert(out, rid)
end
return out
"""
)

# The start of a compare-and-swap on the state version (KEYS[1] the meta hash, ARGV[1] the
# version the caller read): -1 when the calibration is gone, 0 when the version moved on.
_VERSION_CHECK = """
local meta = KEYS[1]
if redis.call('EXISTS', meta) == 0 then return -1 end
if redis.call('HGET', meta, 'state_version') ~= ARGV[1] then return 0 end
"""

# KEYS: 1 meta, 2 state, 3 proposals
# ARGV: 1 expected state version, 2 state blob, 3 round, 4 engine status, then proposal JSONs
# Compare-and-swap: replaces the state and the proposal queue only when the stored version is
# still the one the refit started from, so a stale refit never overwrites a newer state.
# Returns 1 swapped, 0 version moved on, -1 no calibration.
_SWAP = (
    _WRITES
    + _VERSION_CHECK
    + """
redis.call('SET', KEYS[2], ARGV[2])
redis.call('DEL', KEYS[3])
for i = 5, #ARGV do redis.call('RPUSH', KEYS[3], ARGV[i]) end
redis.call('HINCRBY', meta, 'state_version', 1)
redis.call('HSET', meta, 'round', ARGV[3], 'engine_status', ARGV[4])
return 1
"""
)

# KEYS: 1 meta, 2 state
# ARGV: 1 expected state version, 2 max_runs, 3 engine status, 4 state blob ('' keeps it)
# Compare-and-swap like _SWAP: sets the budget and status (and the state) and moves the version
# on, so that a refit begun under the old budget fails its swap and runs again; refused once a
# failure is recorded. Returns 1 set, 0 version moved on or failed, -1 no calibration.
_BUDGET = (
    _WRITES
    + _VERSION_CHECK
    + """
if redis.call('HEXISTS', meta, 'failed_error') == 1 then return 0 end
if ARGV[4] ~= '' then redis.call('SET', KEYS[2], ARGV[4]) end
redis.call('HINCRBY', meta, 'state_version', 1)
redis.call('HSET', meta, 'max_runs', ARGV[2], 'engine_status', ARGV[3])
return 1
"""
)

# KEYS: every fixed key of the calibration (CalibrationKeys.fixed(), runs list at 6)
# ARGV: 1 run key prefix
# Deletes each run hash listed in the runs list, then the fixed keys. Returns 1 if it existed.
_DELETE = (
    _WRITES
    + """
local existed = redis.call('EXISTS', KEYS[1])
for _, rid in ipairs(redis.call('LRANGE', KEYS[6], 0, -1)) do
  redis.call('DEL', ARGV[1] .. rid)
end
for i = 1, #KEYS do redis.call('DEL', KEYS[i]) end
return existed
"""
)

# KEYS: 1 meta
# ARGV: 1 error text, 2 failures allowed
# Counts a failed refit; at the limit marks the calibration failed. Returns 1 failed now,
# 0 keep retrying, -1 no calibration (nothing is created).
_REFIT_FAILURE = (
    _WRITES
    + """
if redis.call('EXISTS', KEYS[1]) == 0 then return -1 end
local n = redis.call('HINCRBY', KEYS[1], 'refit_failures', 1)
if n >= tonumber(ARGV[2]) then
  redis.call('HSET', KEYS[1], 'failed_error', ARGV[1])
  return 1
end
return 0
"""
)

# KEYS: 1 meta
# Resets the refit failure count after a good refit, without re-creating a deleted calibration.
_REFIT_OK = (
    _WRITES
    + """
if redis.call('EXISTS', KEYS[1]) == 1 then redis.call('HSET', KEYS[1], 'refit_failures', 0) end
return 1
"""
)

# KEYS: 1 refit lock;  ARGV: 1 owner token, 2 ttl in ms
# Extends the lock only while the caller still owns it. Returns 1 renewed, 0 lost.
_RENEW = (
    _WRITES
    + """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  return redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
return 0
"""
)

# KEYS: 1 refit lock;  ARGV: 1 owner token
# Deletes the lock only if the caller owns it (an expired lock may belong to someone else).
_RELEASE = (
    _WRITES
    + """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('DEL', KEYS[1]) end
return 0
"""
)


# Metadata fields read on every request (the spec is read apart, and cached by the service).
_META_FIELDS = [
    "token_hash",
    "created_at",
    "state_version",
    "round",
    "engine_status",
    "done",
    "failed",
    "leased",
    "failed_error",
    "refit_failures",
    "max_runs",
]


def _meta_from(calibration_id: str, snapshot: list[Any], queued: bool) -> CalibrationMeta:
    """`CalibrationMeta` from a `_META` snapshot and whether a refit job is queued."""
    m = {f: _s(v) for f, v in zip(_META_FIELDS, snapshot, strict=False)}
    n_proposals, n_requeue, locked = (int(v) for v in snapshot[len(_META_FIELDS) :])
    return CalibrationMeta(
        id=calibration_id,
        token_hash=str(m["token_hash"]),
        created_at=float(str(m["created_at"])),
        state_version=int(str(m["state_version"])),
        round=int(str(m["round"])),
        engine_status=str(m["engine_status"]),
        done=int(str(m["done"])),
        failed=int(str(m["failed"])),
        leased=int(str(m["leased"])),
        queued=n_proposals + n_requeue,
        failed_error=m.get("failed_error"),
        refit_failures=int(str(m.get("refit_failures") or 0)),
        refit_pending=queued or bool(locked),
        max_runs=int(str(m["max_runs"])) if m.get("max_runs") else None,
    )


def _s(value: bytes | str | None) -> str | None:
    if value is None or isinstance(value, str):
        return value
    return value.decode()


def _time(value: float) -> str:
    return repr(float(value))


def _queue_script(
    pipe: Pipeline | aioredis.client.Pipeline,
    script: Script,
    keys: list[str],
    args: list[Any],
    queue_of: str | None,
    wait: bool,
) -> None:
    """Queue on ``pipe``: the script, the refit queue entry of ``queue_of``, then WAITAOF."""
    pipe.evalsha(script.sha, len(keys), *keys, *args)
    if queue_of is not None:
        pipe.zscore(REFIT_DUE, queue_of)
    if wait:
        pipe.execute_command("WAITAOF", 1, 0, 0)


def _script_answer(replies: list[Any], queue_of: str | None) -> tuple[Any, bool]:
    """The script's answer and whether a refit job is queued, from `_queue_script`'s replies."""
    return replies[0], queue_of is not None and replies[1] is not None


def _lease_result(
    calibration_id: str, out: list[Any], queued: bool, worker: str, now: float, expires: float
) -> LeaseResult:
    """`LeaseResult` from the lease script's answer (see `_LEASE`)."""
    if int(out[0]) < 0:
        return LeaseResult([], 0, None)
    runs = []
    for i in range(2, len(out), 3):
        fields = {
            "run_id": str(_s(out[i])),
            "seq": str(out[i + 1]),
            "state": "leased",
            "epoch": "1",
            "worker": worker,
            "leased_at": _time(now),
            "lease_expires_at": _time(expires),
            "point": str(_s(out[i + 2])),
        }
        runs.append(RunRecord.from_fields(fields))
    return LeaseResult(runs, int(out[0]), _meta_from(calibration_id, out[1], queued))


def _meta_call(calibration_id: str) -> tuple[list[str], list[Any]]:
    """KEYS and ARGV of `_META`."""
    k = CalibrationKeys(calibration_id)
    return [k.meta, k.proposals, k.requeue, k.refit_lock], list(_META_FIELDS)


def _lease_call(
    calibration_id: str, count: int, worker: str, now: float, lease_seconds: float, max_runs: int
) -> tuple[list[str], list[Any]]:
    """KEYS and ARGV of `_LEASE`."""
    k = CalibrationKeys(calibration_id)
    keys = [k.meta, k.proposals, k.requeue, k.leases, k.runs, k.refit_lock]
    args = [k.run_prefix, _time(now), count, worker, _time(now + lease_seconds), max_runs]
    return keys, [*args, *_META_FIELDS]


def _finish_call(
    calibration_id: str, run_id: str, epoch: int, state: str, result_json: str, now: float
) -> tuple[list[str], list[Any]]:
    """KEYS and ARGV of `_FINISH`."""
    k = CalibrationKeys(calibration_id)
    keys = [k.meta, k.requeue, k.leases, k.finished, k.run(run_id), k.proposals, k.refit_lock]
    args = [k.run_prefix, _time(now), run_id, str(epoch), state, result_json, _time(now)]
    return keys, [*args, *_META_FIELDS]


class RedisStore:
    """`Store` on a Redis server (or a cluster, thanks to per-calibration hash tags)."""

    kind = "redis"

    def __init__(self, url: str) -> None:
        self._url = url
        self._r = redis.Redis.from_url(
            url,
            socket_timeout=SOCKET_TIMEOUT,
            socket_connect_timeout=CONNECT_TIMEOUT,
            decode_responses=False,
        )
        self._meta = self._r.register_script(_META)
        self._expire = self._r.register_script(_EXPIRE)
        self._lease = self._r.register_script(_LEASE)
        self._finish = self._r.register_script(_FINISH)
        self._extend_lease = self._r.register_script(_EXTEND_LEASE)
        self._import = self._r.register_script(_IMPORT)
        self._budget = self._r.register_script(_BUDGET)
        self._swap = self._r.register_script(_SWAP)
        self._delete = self._r.register_script(_DELETE)
        self._refit_failure = self._r.register_script(_REFIT_FAILURE)
        self._refit_ok = self._r.register_script(_REFIT_OK)
        self._renew = self._r.register_script(_RENEW)
        self._release = self._r.register_script(_RELEASE)
        self._wait_aof: bool | None = None
        self._ar: aioredis.Redis | None = None
        self._ar_loop: asyncio.AbstractEventLoop | None = None

    @contextmanager
    def _guard(self) -> Iterator[None]:
        try:
            yield
        except (
            redis.ConnectionError,
            redis.TimeoutError,
            redis.BusyLoadingError,
            redis.ReadOnlyError,  # talking to a replica during a failover
            redis.OutOfMemoryError,  # maxmemory reached under noeviction: writes refused
        ) as exc:
            raise StoreUnavailable(f"redis unavailable: {exc}") from exc

    def _pipelined(
        self,
        script: Script,
        keys: list[str],
        args: list[Any],
        *,
        queue_of: str | None = None,
        durable: bool = False,
    ) -> tuple[Any, bool]:
        """Run ``script`` in one round trip; returns its answer and whether ``queue_of`` has a
        refit job queued (False without ``queue_of``).

        The script runs as a plain EVALSHA in a non-transactional pipeline (the queue is in
        another slot); a server that lost its scripts (a restart) gets it loaded once more.
        With ``durable`` on a server that has WAITAOF, the pipeline ends with it: on the same
        connection as the write, which is whose writes WAITAOF waits for.
        """
        wait = durable and self._waits_for_aof()

        def run() -> tuple[Any, bool]:
            pipe = self._r.pipeline(transaction=False)
            _queue_script(pipe, script, keys, args, queue_of, wait)
            return _script_answer(pipe.execute(), queue_of)

        try:
            return run()
        except redis.exceptions.NoScriptError:
            self._r.script_load(script.script)
            return run()

    async def _pipelined_async(
        self,
        script: Script,
        keys: list[str],
        args: list[Any],
        *,
        queue_of: str | None = None,
        durable: bool = False,
    ) -> tuple[Any, bool]:
        """`_pipelined` on the event loop, through the async client."""
        if durable and self._wait_aof is None:
            await to_thread.run_sync(self.startup_warnings)
        wait = durable and bool(self._wait_aof)
        client = self._async_client()

        async def run() -> tuple[Any, bool]:
            pipe = client.pipeline(transaction=False)
            _queue_script(pipe, script, keys, args, queue_of, wait)
            return _script_answer(await pipe.execute(), queue_of)

        try:
            return await run()
        except redis.exceptions.NoScriptError:
            await client.script_load(script.script)
            return await run()

    def _async_client(self) -> aioredis.Redis:
        """The async client of the running event loop (the server's; a new one for another
        loop, whose connections could not serve this one). Requests beyond its
        `ASYNC_CONNECTIONS` connections wait for one, up to the socket timeout."""
        loop = asyncio.get_running_loop()
        if self._ar is None or self._ar_loop is not loop:
            pool = aioredis.BlockingConnectionPool.from_url(
                self._url,
                max_connections=ASYNC_CONNECTIONS,
                timeout=SOCKET_TIMEOUT,
                socket_timeout=SOCKET_TIMEOUT,
                socket_connect_timeout=CONNECT_TIMEOUT,
            )
            self._ar, self._ar_loop = aioredis.Redis.from_pool(pool), loop
        return self._ar

    def ping(self) -> None:
        with self._guard():
            self._r.ping()

    def close(self) -> None:
        self._r.close()

    async def aclose(self) -> None:
        if self._ar is not None and self._ar_loop is asyncio.get_running_loop():
            await self._ar.aclose()
        self._ar = self._ar_loop = None

    def startup_warnings(self) -> list[str]:
        """Check AOF, fsync and eviction settings; also decide whether WAITAOF is usable."""
        warnings: list[str] = []
        with self._guard():
            try:
                config = {
                    _s(k): _s(v)
                    for k, v in self._r.config_get("appendonly").items()
                    | self._r.config_get("appendfsync").items()
                    | self._r.config_get("maxmemory-policy").items()
                }
            except redis.ResponseError:
                self._wait_aof = False
                return ["CONFIG GET is not allowed: cannot check that Redis keeps results on disk"]
            version = str(_s(self._r.info("server").get("redis_version", "0")))
        parts = tuple(int(p) for p in version.split(".")[:2] if p.isdigit())
        aof = config.get("appendonly") == "yes"
        self._wait_aof = aof and parts >= (7, 2)
        if not aof:
            warnings.append(
                "Redis appendonly is off: acknowledged results are lost if Redis restarts; "
                "set 'appendonly yes'"
            )
        elif not self._wait_aof and config.get("appendfsync") != "always":
            warnings.append(
                f"Redis {version} lacks WAITAOF and appendfsync is "
                f"{config.get('appendfsync')!r}: set 'appendfsync always' so a result is on "
                "disk before it is acknowledged"
            )
        if config.get("maxmemory-policy") != "noeviction":
            warnings.append(
                f"Redis maxmemory-policy is {config.get('maxmemory-policy')!r}: set "
                "'noeviction' so calibration data is never evicted"
            )
        return warnings

    def _waits_for_aof(self) -> bool:
        # With AOF on Redis >= 7.2, a write is acknowledged once WAITAOF says it is fsynced
        # (leases too: a lease lost in a crash would hand its run id out again).
        # (Older servers have no WAITAOF: there 'appendfsync always' fsyncs before replying.)
        if self._wait_aof is None:
            self.startup_warnings()
        return bool(self._wait_aof)

    # calibrations

    def create(self, calibration: NewCalibration) -> None:
        k = CalibrationKeys(calibration.id)
        with self._guard():
            # MULTI ... EXEC spelled out in a plain pipeline, so that WAITAOF can follow the
            # transaction on its connection (a transactional pipeline ends at EXEC).
            pipe = self._r.pipeline(transaction=False)
            pipe.execute_command("MULTI")
            pipe.hset(
                k.meta,
                mapping={
                    "token_hash": calibration.token_hash,
                    "spec": calibration.spec_json,
                    "created_at": _time(calibration.created_at),
                    "state_version": 1,
                    "round": calibration.round,
                    "engine_status": calibration.engine_status,
                    "seq": 0,
                    "done": 0,
                    "failed": 0,
                    "leased": 0,
                    "refit_failures": 0,
                },
            )
            pipe.set(k.state, calibration.state_blob)
            for i in range(0, len(calibration.proposals), _CHUNK):
                pipe.rpush(k.proposals, *calibration.proposals[i : i + _CHUNK])
            pipe.execute_command("EXEC")
            if self._waits_for_aof():
                pipe.execute_command("WAITAOF", 1, 0, 0)
            pipe.execute()

    def get_meta(self, calibration_id: str) -> CalibrationMeta | None:
        keys, args = _meta_call(calibration_id)
        with self._guard():
            snapshot, queued = self._pipelined(self._meta, keys, args, queue_of=calibration_id)
        return _meta_from(calibration_id, snapshot, queued) if snapshot else None

    async def get_meta_async(self, calibration_id: str) -> CalibrationMeta | None:
        keys, args = _meta_call(calibration_id)
        with self._guard():
            snapshot, queued = await self._pipelined_async(
                self._meta, keys, args, queue_of=calibration_id
            )
        return _meta_from(calibration_id, snapshot, queued) if snapshot else None

    def get_spec(self, calibration_id: str) -> str | None:
        with self._guard():
            return _s(self._r.hget(CalibrationKeys(calibration_id).meta, "spec"))

    def delete(self, calibration_id: str) -> bool:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            existed = self._delete(keys=k.fixed(), args=[k.run_prefix])
            self._r.zrem(REFIT_DUE, calibration_id)
        return bool(existed)

    def load_state(self, calibration_id: str) -> tuple[int, bytes] | None:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            pipe = self._r.pipeline(transaction=True)
            pipe.hget(k.meta, "state_version")
            pipe.get(k.state)
            version, blob = pipe.execute()
        if version is None or blob is None:
            return None
        return int(version), bytes(blob)

    def swap_state(
        self,
        calibration_id: str,
        expected_version: int,
        blob: bytes,
        round_: int,
        engine_status: str,
        proposals: list[str],
    ) -> bool:
        k = CalibrationKeys(calibration_id)
        keys = [k.meta, k.state, k.proposals]
        args = [str(expected_version), blob, str(round_), engine_status, *proposals]
        with self._guard():
            done, _ = self._pipelined(self._swap, keys, args, durable=True)
        return int(done) == 1

    def set_budget(
        self,
        calibration_id: str,
        expected_version: int,
        max_runs: int,
        engine_status: str,
        blob: bytes | None,
    ) -> bool:
        k = CalibrationKeys(calibration_id)
        args = [str(expected_version), str(max_runs), engine_status, blob or b""]
        with self._guard():
            done, _ = self._pipelined(self._budget, [k.meta, k.state], args, durable=True)
        return int(done) == 1

    # runs

    async def lease_async(
        self,
        calibration_id: str,
        count: int,
        worker: str,
        now: float,
        lease_seconds: float,
        max_runs: int,
    ) -> LeaseResult:
        keys, args = _lease_call(calibration_id, count, worker, now, lease_seconds, max_runs)
        with self._guard():
            out, queued = await self._pipelined_async(
                self._lease, keys, args, queue_of=calibration_id, durable=True
            )
        return _lease_result(calibration_id, out, queued, worker, now, now + lease_seconds)

    def expire(self, calibration_id: str, now: float) -> int:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            n = self._expire(keys=[k.meta, k.requeue, k.leases], args=[k.run_prefix, _time(now)])
        return max(int(n), 0)

    def extend_lease(
        self, calibration_id: str, run_id: str, now: float, expires_at: float, longest: float
    ) -> ExtendResult:
        k = CalibrationKeys(calibration_id)
        keys = [k.meta, k.requeue, k.leases, k.run(run_id)]
        args = [k.run_prefix, _time(now), run_id, _time(expires_at), _time(longest)]
        with self._guard():
            out, _ = self._pipelined(self._extend_lease, keys, args, durable=True)
        if isinstance(out, int):  # no such calibration
            return ExtendResult(None, 0)
        state = out[1] if len(out) > 1 else None
        expiry = float(out[2]) if len(out) > 2 else None  # float() reads the bytes too
        return ExtendResult(None if state is None else str(_s(state)), int(out[0]), expiry)

    def get_run(self, calibration_id: str, run_id: str) -> RunRecord | None:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            raw = self._r.hgetall(k.run(run_id))
        return self._record(raw)

    @staticmethod
    def _record(raw: dict[Any, Any]) -> RunRecord | None:
        if not raw:
            return None
        return RunRecord.from_fields({str(_s(a)): str(_s(b)) for a, b in raw.items()})

    async def finish_run_async(
        self,
        calibration_id: str,
        run_id: str,
        epoch: int,
        state: str,
        result_json: str,
        now: float,
    ) -> FinishResult:
        keys, args = _finish_call(calibration_id, run_id, epoch, state, result_json, now)
        with self._guard():
            out, queued = await self._pipelined_async(
                self._finish, keys, args, queue_of=calibration_id, durable=True
            )
        if isinstance(out, int):  # no such calibration
            return FinishResult(None, 0)
        meta = _meta_from(calibration_id, out[2], queued) if out[0] == 1 else None
        return FinishResult(meta, int(out[1]))

    def import_runs(
        self, calibration_id: str, items: list[tuple[str, str]], now: float
    ) -> list[str]:
        k = CalibrationKeys(calibration_id)
        flat = [part for item in items for part in item]
        keys = [k.meta, k.runs, k.finished]
        with self._guard():
            out, _ = self._pipelined(
                self._import, keys, [k.run_prefix, _time(now), *flat], durable=True
            )
        if out and out[0] == -1:
            return []
        return [str(_s(rid)) for rid in out]

    def list_runs(self, calibration_id: str, state: str | None = None) -> list[RunRecord]:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            ids = self._r.lrange(k.runs, 0, -1)
            records = self._fetch(k, ids)
        return [r for r in records if state is None or r.state == state]

    def finished_runs(self, calibration_id: str) -> list[RunRecord]:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            ids = self._r.lrange(k.finished, 0, -1)
            return self._fetch(k, ids)

    def _fetch(self, k: CalibrationKeys, ids: list[Any]) -> list[RunRecord]:
        records: list[RunRecord] = []
        for i in range(0, len(ids), _CHUNK):
            pipe = self._r.pipeline(transaction=False)
            for rid in ids[i : i + _CHUNK]:
                pipe.hgetall(k.run(str(_s(rid))))
            for raw in pipe.execute():
                record = self._record(raw)
                if record is not None:
                    records.append(record)
        return records

    # refit jobs

    def enqueue_refit(self, calibration_id: str, now: float) -> None:
        with self._guard():
            self._r.zadd(REFIT_DUE, {calibration_id: now}, nx=True)

    def due_refits(self, now: float, limit: int) -> list[str]:
        with self._guard():
            ids = self._r.zrangebyscore(REFIT_DUE, "-inf", now, start=0, num=limit)
        return [i.decode() if isinstance(i, bytes) else str(i) for i in ids]

    def acquire_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            return bool(self._r.set(k.refit_lock, owner, nx=True, px=int(ttl * 1000)))

    def renew_refit_lock(self, calibration_id: str, owner: str, ttl: float) -> bool:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            return int(self._renew(keys=[k.refit_lock], args=[owner, int(ttl * 1000)])) == 1

    def release_refit_lock(self, calibration_id: str, owner: str) -> None:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            self._release(keys=[k.refit_lock], args=[owner])

    def finish_refit(self, calibration_id: str) -> None:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            self._r.zrem(REFIT_DUE, calibration_id)
            self._refit_ok(keys=[k.meta])

    def record_refit_failure(
        self, calibration_id: str, error: str, max_failures: int, retry_at: float
    ) -> bool:
        k = CalibrationKeys(calibration_id)
        with self._guard():
            out = int(self._refit_failure(keys=[k.meta], args=[error, max_failures]))
            if out == 0:
                self._r.zadd(REFIT_DUE, {calibration_id: retry_at}, xx=True)
            else:
                self._r.zrem(REFIT_DUE, calibration_id)
        return out == 1

    def refit_queue_depth(self) -> int:
        with self._guard():
            return int(self._r.zcard(REFIT_DUE))
