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
    "check_store_url",
    "open_store",
]


#: URL prefixes of each backend.
_SQLITE = ("sqlite:///",)
_REDIS = ("redis://", "rediss://", "unix://")


def check_store_url(url: str) -> None:
    """Raise ValueError unless ``url`` names a supported store (nothing is opened)."""
    if not url.startswith(_SQLITE + _REDIS):
        raise ValueError(
            f"unsupported store URL {url!r}: use sqlite:///path.db or redis://host:port/db"
        )


def open_store(url: str) -> Store:
    """Open the store a URL names: ``sqlite:///file.db``, ``sqlite:////abs.db``, ``redis://...``."""
    check_store_url(url)
    if url.startswith(_SQLITE):
        from honing.api.store.sqlite_store import SqliteStore

        return SqliteStore(url)
    from honing.api.store.redis_store import RedisStore

    return RedisStore(url)
