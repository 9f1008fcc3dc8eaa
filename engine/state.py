"""The engine's state between rounds, and its lossless, pickle-free serialisation.

A state is plain JSON-able metadata plus named numeric arrays. `state_to_bytes` writes one
blob: an 8-byte header length, a UTF-8 JSON header, then each array's raw little-endian bytes;
`state_from_bytes` reads it back bit for bit. Nothing in the blob is executable.
"""

from __future__ import annotations

import json
import math
import struct
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from honing.engine.errors import StateError

__all__ = ["STATE_VERSION", "EngineState", "RunTable", "state_from_bytes", "state_to_bytes"]

#: Version of the serialised layout; bump on any incompatible change.
STATE_VERSION = 1

_ALLOWED_DTYPES = {"<f8", "<f4", "<i8", "|b1", "|u1"}


@dataclass
class RunTable:
    """Every finished run the engine learns from, in completion order.

    Attributes
    ----------
    theta : ndarray, shape (n_runs, dim)
        Parameter values in physical units.
    outputs : ndarray, shape (n_runs, output_size)
        Raw outputs in channel order; rows of failed runs are NaN.
    failed : ndarray of bool, shape (n_runs,)
    trust : ndarray, shape (n_runs,)
        Trust index of each run in (0, 1] (ignored for failed runs).
    error : ndarray, shape (n_runs,), optional
        Rms of (true - predicted) whitened residuals, the prediction made before the run;
        NaN where there was none (initial design, imported runs). Defaults to all NaN.
    """

    theta: np.ndarray
    outputs: np.ndarray
    failed: np.ndarray
    trust: np.ndarray
    error: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        n = self.theta.shape[0]
        if self.error.shape[0] == 0 and n:
            self.error = np.full(n, np.nan)
        checks = (
            ("outputs", self.outputs),
            ("failed", self.failed),
            ("trust", self.trust),
            ("error", self.error),
        )
        for label, arr in checks:
            if arr.shape[0] != n:
                raise ValueError(f"RunTable.{label} has {arr.shape[0]} rows, theta has {n}")

    @property
    def n_runs(self) -> int:
        return int(self.theta.shape[0])

    @classmethod
    def empty(cls, dim: int, output_size: int) -> RunTable:
        return cls(np.zeros((0, dim)), np.zeros((0, output_size)), np.zeros(0, bool), np.zeros(0))


@dataclass
class EngineState:
    """What one round leaves for the next: the proposal queue, the surrogate, the posterior pool.

    Attributes
    ----------
    round : int
        Number of completed fits (0 before the first).
    status : str
        ``"collecting"``, ``"converged"``, ``"budget_exhausted"`` or ``"failed"``.
    runs_at_fit : int
        Number of finished runs the latest fit saw.
    proposals : ndarray, shape (n_proposals, dim)
        Points to hand out, in order: the batch, then spares for use while a refit runs.
    predictions : ndarray of float32, shape (n_proposals, output_size) or (0, output_size)
        The surrogate's whitened prediction for each proposal (empty before the first fit).
    pool : ndarray, shape (n_pool, n_columns)
        Posterior draws in physical units (parameters, then ``noise_scale`` when estimated).
    summary : dict
        The posterior summary served by the API.
    history : list of dict
        Per-round diagnostics, oldest first.
    surrogate : dict
        JSON-able description of the fitted surrogate (empty before the first fit).
    arrays : dict of ndarray
        Numeric parts of the surrogate and other round data, by name.
    rng : dict
        State of the engine's `numpy.random.PCG64` bit generator.
    """

    round: int
    status: str
    runs_at_fit: int
    proposals: np.ndarray
    predictions: np.ndarray
    pool: np.ndarray
    summary: dict[str, Any]
    history: list[dict[str, Any]]
    rng: dict[str, Any]
    surrogate: dict[str, Any] = field(default_factory=dict)
    arrays: dict[str, np.ndarray] = field(default_factory=dict)

    def generator(self) -> np.random.Generator:
        """A generator positioned where the state's random stream left off."""
        bit = np.random.PCG64()
        bit.state = self.rng  # type: ignore[assignment]
        return np.random.Generator(bit)


def state_to_bytes(state: EngineState) -> bytes:
    """Serialise a state into one self-describing blob (JSON header plus raw arrays)."""
    arrays = {
        "proposals": state.proposals,
        "predictions": state.predictions,
        "pool": state.pool,
        **{f"x.{k}": v for k, v in state.arrays.items()},
    }
    specs, chunks, offset = {}, [], 0
    for name, value in arrays.items():
        arr = np.asarray(value)
        arr = arr.astype(arr.dtype.newbyteorder("<"), copy=False)
        if arr.dtype.str not in _ALLOWED_DTYPES:
            raise StateError(
                f"array {name!r} has dtype {arr.dtype.str!r}, which a state cannot hold"
            )
        raw = arr.tobytes(order="C")
        specs[name] = {"dtype": arr.dtype.str, "shape": list(arr.shape), "offset": offset}
        chunks.append(raw)
        offset += len(raw)
    header = {
        "version": STATE_VERSION,
        "round": state.round,
        "status": state.status,
        "runs_at_fit": state.runs_at_fit,
        "summary": state.summary,
        "history": state.history,
        "rng": _rng_to_json(state.rng),
        "surrogate": state.surrogate,
        "arrays": specs,
    }
    head = json.dumps(header, allow_nan=False, separators=(",", ":")).encode()
    return struct.pack("<Q", len(head)) + head + b"".join(chunks)


def state_from_bytes(blob: bytes) -> EngineState:
    """Restore a state written by `state_to_bytes`; raises `StateError` on anything unexpected."""
    try:
        (n_head,) = struct.unpack_from("<Q", blob, 0)
        header = json.loads(blob[8 : 8 + n_head].decode())
    except (struct.error, UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise StateError(f"unreadable state header: {exc}") from exc
    if not isinstance(header, dict):
        raise StateError("unreadable state header: not an object")
    if header.get("version") != STATE_VERSION:
        raise StateError(f"state version {header.get('version')!r}, expected {STATE_VERSION}")
    try:
        return _read_state(header, memoryview(blob)[8 + n_head :])
    except (KeyError, TypeError, ValueError, AttributeError, OverflowError) as exc:
        raise StateError(f"malformed state: {exc!r}") from exc


def _read_state(header: dict[str, Any], body: memoryview) -> EngineState:
    """The state a version-checked header describes, its arrays read from ``body``."""
    arrays: dict[str, np.ndarray] = {}
    for name, spec in header["arrays"].items():
        if spec["dtype"] not in _ALLOWED_DTYPES:
            raise StateError(f"array {name!r} has unsupported dtype {spec['dtype']!r}")
        dtype = np.dtype(spec["dtype"])
        shape, offset = spec["shape"], spec["offset"]
        whole = [offset, *shape]
        if not all(isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in whole):
            raise StateError(f"array {name!r} needs whole, non-negative offset and sizes")
        end = offset + math.prod(shape) * dtype.itemsize
        if end > len(body):
            raise StateError(f"array {name!r} runs past the end of the state")
        arrays[name] = np.frombuffer(body[offset:end], dtype=dtype).reshape(shape).copy()
    for required in ("proposals", "predictions", "pool"):
        if required not in arrays:
            raise StateError(f"state lacks the array {required!r}")
    return EngineState(
        round=int(header["round"]),
        status=str(header["status"]),
        runs_at_fit=int(header["runs_at_fit"]),
        proposals=arrays.pop("proposals"),
        predictions=arrays.pop("predictions"),
        pool=arrays.pop("pool"),
        summary=header["summary"],
        history=header["history"],
        rng=_rng_from_json(header["rng"]),
        surrogate=header["surrogate"],
        arrays={k[2:]: v for k, v in arrays.items()},
    )


def _rng_to_json(state: dict[str, Any]) -> dict[str, Any]:
    # PCG64 state holds 128-bit integers: JSON numbers would lose them in other readers.
    inner = state["state"]
    return {
        "bit_generator": state["bit_generator"],
        "state": {"state": str(inner["state"]), "inc": str(inner["inc"])},
        "has_uint32": int(state["has_uint32"]),
        "uinteger": int(state["uinteger"]),
    }


def _rng_from_json(data: dict[str, Any]) -> dict[str, Any]:
    return {
        "bit_generator": data["bit_generator"],
        "state": {"state": int(data["state"]["state"]), "inc": int(data["state"]["inc"])},
        "has_uint32": int(data["has_uint32"]),
        "uinteger": int(data["uinteger"]),
    }
