"""Bearer tokens: per-calibration tokens kept only as SHA-256 hashes, and the optional admin key.

Tokens come from `secrets.token_urlsafe` (256 bits), so one unsalted SHA-256 is enough to make
a leaked store useless for calling the API; comparisons are constant time.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets

from honing.api.errors import Forbidden, Unauthorized

__all__ = ["check_token", "hash_token", "new_token"]


def new_token() -> str:
    """A fresh calibration token."""
    return secrets.token_urlsafe(32)


def hash_token(token: str) -> str:
    """The hex SHA-256 of a token, which is all the store keeps."""
    return hashlib.sha256(token.encode()).hexdigest()


def check_token(presented: str | None, expected_hash: str) -> None:
    """Raise `Unauthorized` without a token, `Forbidden` when it does not match the hash."""
    if not presented:
        raise Unauthorized("this call needs 'Authorization: Bearer <token>'")
    if not hmac.compare_digest(hash_token(presented), expected_hash):
        raise Forbidden("the token does not grant access to this resource")
