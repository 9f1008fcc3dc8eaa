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


#: What a call guarded by the admin key needs, said where it is refused: a client creating a
#: calibration has no token yet, so "needs a token" would point at the wrong fix.
ADMIN_KEY_NEEDED = (
    "this server creates calibrations only with its admin key, sent as 'Authorization: "
    "Bearer <admin key>' (command line: --admin-key-file F or HONING_ADMIN_KEY)"
)


def check_token(presented: str | None, expected_hash: str, what: str | None = None) -> None:
    """Raise `Unauthorized` without a token, `Forbidden` when it does not match the hash;
    ``what`` replaces the messages for a credential other than a calibration token."""
    if not presented:
        raise Unauthorized(what or "this call needs 'Authorization: Bearer <token>'")
    if not hmac.compare_digest(hash_token(presented), expected_hash):
        raise Forbidden(
            f"wrong key: {what}" if what else "the token does not grant access to this resource"
        )
