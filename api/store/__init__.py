"""Storage backends behind one `Store` protocol, chosen by URL."""

from __future__ import annotations

from urllib.parse import urlsplit

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


#: URL prefixes of each backend (a Redis server over TCP, or over a Unix socket).
_SQLITE = ("sqlite:///",)
_REDIS_TCP = ("redis://", "rediss://")
_REDIS = (*_REDIS_TCP, "unix://")


def check_store_url(url: str) -> None:
    """Raise ValueError unless ``url`` names a supported store in a form it can open: the
    scheme, and for a Redis server a numeric port and database (nothing is opened)."""
    usage = f"unsupported store URL {url!r}: use sqlite:///path.db or redis://host:port/db"
    if not url.startswith(_SQLITE + _REDIS):
        raise ValueError(usage)
    if url.startswith(_REDIS_TCP):
        parts = urlsplit(url)
        try:
            parts.port  # noqa: B018 - raises ValueError for a port that is not a number
        except ValueError as exc:
            raise ValueError(f"{usage} ({exc})") from None
        database = parts.path.strip("/")
        if database and not database.isdigit():
            raise ValueError(f"{usage} (the database must be a number, not {database!r})")


def open_store(url: str) -> Store:
    """Open the store a URL names: ``sqlite:///file.db``, ``sqlite:////abs.db``, ``redis://...``."""
    check_store_url(url)
    if url.startswith(_SQLITE):
        from honing.api.store.sqlite_store import SqliteStore

        return SqliteStore(url)
    from honing.api.store.redis_store import RedisStore

    return RedisStore(url)
