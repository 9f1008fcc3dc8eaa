"""Storage backends behind one `Store` protocol, chosen by URL."""

from __future__ import annotations

from honing.api.store.base import (
    CalibrationMeta,
    ExtendResult,
    FinishResult,
    LeaseResult,
    NewCalibration,
    RunRecord,
    Store,
    StoreUnavailable,
)

__all__ = [
    "CalibrationMeta",
    "ExtendResult",
    "FinishResult",
    "LeaseResult",
    "NewCalibration",
    "RunRecord",
    "Store",
    "StoreUnavailable",
    "open_store",
]


def open_store(url: str) -> Store:
    """Open the store a URL names: ``sqlite:///file.db``, ``sqlite:////abs.db``, ``redis://...``."""
    if url.startswith("sqlite:///"):
        from honing.api.store.sqlite_store import SqliteStore

        return SqliteStore(url)
    if url.startswith(("redis://", "rediss://", "unix://")):
        from honing.api.store.redis_store import RedisStore

        return RedisStore(url)
    raise ValueError(
        f"unsupported store URL {url!r}: use sqlite:///path.db or redis://host:port/db"
    )
