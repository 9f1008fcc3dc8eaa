"""Every Redis key name of honing in one place.

All keys of one calibration share the hash tag ``{<id>}`` so that, on Redis Cluster, they live in
one slot and each Lua script touching them runs on one node. Only the refit queue is global.

Per calibration (``P = honing:{<id>}:``):

- ``P meta``        hash: token_hash, spec, created_at, state_version, round, engine_status,
                    seq, done, failed, leased, failed_error, refit_failures
- ``P state``       string: the engine state blob (`honing.engine.state_to_bytes`)
- ``P proposals``   list: the current state's points not yet handed out, as point JSON
- ``P requeue``     list: points of expired runs waiting to be handed out again (first)
- ``P leases``      sorted set: run_id scored by lease expiry (unix seconds)
- ``P runs``        list: run ids in creation order
- ``P finished``    list: run ids in completion order (what a refit learns from)
- ``P run:<rid>``   hash: one run (state, epoch, worker, times, point JSON, result JSON)
- ``P refit_lock``  string with expiry: owner token of the worker refitting this calibration

Global:

- ``honing:refit:due``  sorted set: calibration ids with a refit job, scored by enqueue time
"""

from __future__ import annotations

__all__ = ["REFIT_DUE", "CalibrationKeys"]

PREFIX = "honing"
REFIT_DUE = f"{PREFIX}:refit:due"


class CalibrationKeys:
    """Key names of one calibration, all under the hash tag ``{<id>}``."""

    def __init__(self, calibration_id: str) -> None:
        self.id = calibration_id
        self.prefix = f"{PREFIX}:{{{calibration_id}}}:"
        self.meta = self.prefix + "meta"
        self.state = self.prefix + "state"
        self.proposals = self.prefix + "proposals"
        self.requeue = self.prefix + "requeue"
        self.leases = self.prefix + "leases"
        self.runs = self.prefix + "runs"
        self.finished = self.prefix + "finished"
        self.refit_lock = self.prefix + "refit_lock"
        self.run_prefix = self.prefix + "run:"

    def run(self, run_id: str) -> str:
        """Key of one run's hash."""
        return self.run_prefix + run_id

    def fixed(self) -> list[str]:
        """Every key of the calibration except the per-run hashes."""
        return [
            self.meta,
            self.state,
            self.proposals,
            self.requeue,
            self.leases,
            self.runs,
            self.finished,
            self.refit_lock,
        ]
