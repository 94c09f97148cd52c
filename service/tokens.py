"""API tokens: ``ss1_<key id>_<secret>``, 256 random bits of secret, stored only hashed.

The key id is public (it finds the row); the database keeps the SHA-256 of the whole token,
and a presented token is checked with a constant-time comparison. A fast hash is right here:
the secret is random, not a password, so there is nothing to guess from a leaked hash.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets

PREFIX = "ss1"
_FORMAT = re.compile(r"^ss1_([0-9a-f]{16})_([A-Za-z0-9_-]{43})$")


def new_token() -> tuple[str, str]:
    """A fresh token and its key id."""
    key_id = secrets.token_hex(8)
    return f"{PREFIX}_{key_id}_{secrets.token_urlsafe(32)}", key_id


def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def key_id_of(token: str) -> str | None:
    """The key id of a well-formed token, else None."""
    m = _FORMAT.match(token)
    return m.group(1) if m else None


def matches(token: str, stored_sha256: str) -> bool:
    return hmac.compare_digest(token_hash(token), stored_sha256)
