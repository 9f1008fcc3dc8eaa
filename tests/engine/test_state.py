"""The state blob: what it can hold comes back as written, and a damaged one is a StateError."""

import dataclasses
import json
import struct

import numpy as np
import pytest

from honing.engine.errors import StateError
from honing.engine.rounds import start
from honing.engine.spec import CalibrationSpec
from honing.engine.state import state_from_bytes, state_to_bytes

SPEC = {
    "name": "blob",
    "parameters": [{"name": "a", "prior": {"kind": "normal", "mean": 0, "sd": 1}}],
    "observations": [{"name": "y", "values": [1.0, 2.0], "sd": 0.1}],
}


@pytest.fixture
def state():
    return start(CalibrationSpec.from_dict(SPEC))


def _header(blob: bytes) -> tuple[dict, bytes]:
    (n,) = struct.unpack_from("<Q", blob, 0)
    return json.loads(blob[8 : 8 + n]), blob[8 + n :]


def _with_header(header: object, body: bytes) -> bytes:
    head = json.dumps(header).encode()
    return struct.pack("<Q", len(head)) + head + body


def test_arrays_of_every_kept_dtype_and_shape_come_back_bit_for_bit(state):
    arrays = {
        "scalar": np.float64(2.5) * np.ones(()),
        "empty": np.zeros((0, 3)),
        "strided": np.arange(12.0).reshape(3, 4)[:, ::2],
        "flags": np.array([True, False]),
        "counts": np.arange(3, dtype=np.int64),
        "single": np.array([1.5], dtype=np.float32),
    }
    restored = state_from_bytes(state_to_bytes(dataclasses.replace(state, arrays=arrays)))
    for name, value in arrays.items():
        got = restored.arrays[name]
        assert got.shape == value.shape and got.dtype == value.dtype, name
        np.testing.assert_array_equal(got, value)


@pytest.mark.parametrize("dtype", [np.int32, np.float16, np.complex128])
def test_a_dtype_the_reader_refuses_is_refused_when_written(state, dtype):
    with pytest.raises(StateError, match=r"'x\.x'"):
        state_to_bytes(dataclasses.replace(state, arrays={"x": np.zeros(2, dtype=dtype)}))


def _damaged(blob: bytes, how: str) -> bytes:
    header, body = _header(blob)
    if how == "list header":
        return _with_header([header], body)
    if how == "missing round":
        del header["round"]
    elif how == "negative offset":
        header["arrays"]["pool"]["offset"] = -8
    elif how == "negative shape":
        header["arrays"]["pool"]["shape"] = [-1, 1]
    elif how == "shape of strings":
        header["arrays"]["pool"]["shape"] = ["a"]
    elif how == "arrays not an object":
        header["arrays"] = 3
    elif how == "huge shape":
        header["arrays"]["pool"]["shape"] = [1e400]
    elif how == "fractional offset":
        header["arrays"]["pool"]["offset"] = 0.5
    elif how == "deep header":
        head = b"[" * 100_000 + b"]" * 100_000
        return struct.pack("<Q", len(head)) + head + body
    return _with_header(header, body)


@pytest.mark.parametrize(
    "how",
    [
        "list header",
        "missing round",
        "negative offset",
        "negative shape",
        "shape of strings",
        "arrays not an object",
        "huge shape",
        "fractional offset",
        "deep header",
    ],
)
def test_a_damaged_header_is_a_state_error(state, how):
    with pytest.raises(StateError):
        state_from_bytes(_damaged(state_to_bytes(state), how))
