"""Errors raised by the engine.

Exception hierarchy::

    HoningError
    ├── SpecError        a calibration spec or a result is invalid; carries field-level ``errors``
    ├── ConflictError    a different result arrives for a run that is already finished
    └── StateError       a serialised state cannot be read (wrong version, missing arrays)
"""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["ConflictError", "HoningError", "SpecError", "StateError"]


class HoningError(Exception):
    """Base class of every error the engine raises on purpose."""


class SpecError(HoningError, ValueError):
    """Invalid input, with one ``{"loc": [...], "msg": ...}`` entry per offending field."""

    def __init__(self, errors: Sequence[tuple[Sequence[str | int], str]] | str) -> None:
        if isinstance(errors, str):
            errors = [((), errors)]
        self.errors: list[dict[str, object]] = [
            {"loc": list(loc), "msg": msg} for loc, msg in errors
        ]
        super().__init__("; ".join(_describe(e) for e in self.errors))

    @classmethod
    def at(cls, loc: Sequence[str | int], msg: str) -> SpecError:
        """One error at one field location."""
        return cls([(loc, msg)])


class ConflictError(HoningError):
    """A request that contradicts what is stored: a second, different result for a run that
    already has one, or a larger budget for a calibration that has finished."""


class StateError(HoningError):
    """A stored engine state that cannot be restored."""


def _describe(error: dict[str, object]) -> str:
    loc = error["loc"]
    path = ".".join(str(p) for p in loc) if isinstance(loc, list) and loc else ""
    return f"{path}: {error['msg']}" if path else str(error["msg"])
