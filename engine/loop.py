"""The ask/tell loop in one process: the service's semantics without a store.

`CalibrationLoop` hands out proposals, records results in any order, and refits once a
batch's worth is in. It is how the engine is driven in tests and benchmarks, and the model the
HTTP service follows with leases and a store.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from honing.engine.diagnostics import trust_from_error
from honing.engine.errors import ConflictError, SpecError
from honing.engine.rounds import prediction_error, raise_budget, refit, refit_due, start
from honing.engine.spec import CalibrationSpec
from honing.engine.state import EngineState, RunTable

__all__ = ["CalibrationLoop", "Proposal"]

Simulator = Callable[[dict[str, float]], Mapping[str, Any]]


@dataclass
class Proposal:
    """One point handed out, with the surrogate's prediction made before it ran."""

    point_id: int
    theta: np.ndarray
    prediction: np.ndarray | None
    outputs: np.ndarray | None = None
    failed: bool = False
    trust: float | None = None
    error: float = float("nan")


class CalibrationLoop:
    """Ask/tell calibration held in memory.

    Parameters
    ----------
    spec : CalibrationSpec
    state : EngineState, optional
        A state to resume from (see `honing.engine.state.state_from_bytes`).
    """

    def __init__(self, spec: CalibrationSpec, state: EngineState | None = None) -> None:
        self.spec = spec
        self.state = start(spec) if state is None else state
        self.proposals: list[Proposal] = []
        self.finished: list[int] = []
        self._next = 0

    @property
    def status(self) -> str:
        return self.state.status

    def ask(self, count: int) -> list[Proposal]:
        """Up to ``count`` new points, never past the run budget."""
        room = self.spec.max_runs - len(self.proposals)
        queue = self.state.proposals[self._next :]
        take = max(0, min(count, room, queue.shape[0]))
        out = []
        for k in range(take):
            i = self._next + k
            prediction = self.state.predictions[i] if self.state.predictions.shape[0] else None
            out.append(Proposal(len(self.proposals), self.state.proposals[i].copy(), prediction))
            self.proposals.append(out[-1])
        self._next += take
        return out

    def tell(
        self,
        point_id: int,
        outputs: Mapping[str, Any] | None = None,
        error: str | None = None,
    ) -> float | None:
        """Record one result (outputs or an error message); returns the run's trust.

        The same result twice is a no-op; a different one for a finished run raises
        `ConflictError`. A refit runs once enough results are in.
        """
        if not 0 <= point_id < len(self.proposals):
            raise SpecError.at(("point_id",), f"unknown point {point_id}")
        run = self.proposals[point_id]
        if (outputs is None) == (error is None):
            raise SpecError.at(("outputs",), "give either outputs or an error")
        flat = None if outputs is None else self.spec.flatten_outputs(outputs)
        if point_id in self.finished:
            same = (
                run.failed
                if flat is None
                else (run.outputs is not None and np.array_equal(run.outputs, flat))
            )
            if not same:
                raise ConflictError(f"point {point_id} already has a different result")
            return run.trust
        if flat is None:
            run.failed = True
        else:
            run.outputs = flat
            run.error = prediction_error(self.spec, run.prediction, flat)
            run.trust = 1.0 if np.isnan(run.error) else trust_from_error(run.error)
        self.finished.append(point_id)
        self._maybe_refit()
        return run.trust

    def raise_budget(self, max_runs: int) -> None:
        """Allow up to ``max_runs`` runs in all, reopening a calibration the old budget
        stopped (`honing.engine.rounds.raise_budget`; every point handed out counts as
        spent); nothing changes if it raises."""
        self.spec, self.state = raise_budget(self.spec, self.state, max_runs, len(self.proposals))

    def run(self, simulator: Simulator, workers: int = 1) -> EngineState:
        """Drive the loop to its end with a Python simulator, ``workers`` points at a time."""
        while self.status == "collecting":
            batch = self.ask(max(1, workers))
            if not batch:
                break
            for p in batch:
                self.tell(p.point_id, outputs=simulator(self.spec.parameters_dict(p.theta)))
        return self.state

    def runs(self) -> RunTable:
        """Every finished run in completion order."""
        done = [self.proposals[i] for i in self.finished]
        size = self.spec.output_size
        return RunTable(
            theta=np.array([p.theta for p in done]).reshape(len(done), self.spec.dim),
            outputs=np.array(
                [np.full(size, np.nan) if p.outputs is None else p.outputs for p in done]
            ).reshape(len(done), size),
            failed=np.array([p.failed for p in done], dtype=bool),
            trust=np.array([1.0 if p.trust is None else p.trust for p in done]),
            error=np.array([p.error for p in done]),
        )

    def _maybe_refit(self) -> None:
        outstanding = len(self.proposals) - len(self.finished)
        queued = self.state.proposals.shape[0] - self._next
        if refit_due(self.spec, self.state, len(self.finished), outstanding, queued):
            self.state = refit(self.spec, self.state, self.runs())
            self._next = 0
