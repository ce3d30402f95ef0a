"""API keys: bearer tokens with a role. Only the SHA-256 of a token is stored.

Every token is made here, never chosen by a caller: ``eh_`` and 43 URL-safe base64 characters
(32 random bytes, 256 bits). A presented token of any other shape cannot be a key, so it is
refused without a database lookup (:func:`well_formed`).
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from collections.abc import Sequence

from sqlalchemy import bindparam, select
from sqlalchemy.orm import Session

from service.errors import Conflict, NotFound, Unprocessable
from service.store.models import ApiKey, Role, utcnow

TOKEN_PREFIX = "eh_"
TOKEN_BYTES = 32
_TOKEN_SHAPE = re.compile(r"eh_[A-Za-z0-9_-]{43}")
_BY_HASH = select(ApiKey).where(ApiKey.token_hash == bindparam("digest"))


def well_formed(token: str) -> bool:
    """Whether ``token`` has the shape of the tokens :func:`create_key` makes."""
    return _TOKEN_SHAPE.fullmatch(token) is not None


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def create_key(session: Session, name: str, role: str) -> tuple[ApiKey, str]:
    """A new key and its token (returned once; only the hash is kept)."""
    if role not in {r.value for r in Role}:
        raise Unprocessable(
            f"role {role!r} is not one of {', '.join(r.value for r in Role)}", field="role"
        )
    if not name or len(name) > 64:
        raise Unprocessable("key name must be 1 to 64 characters", field="name")
    if session.scalar(select(ApiKey.id).where(ApiKey.name == name)) is not None:
        raise Conflict(f"an API key named {name!r} already exists", code="key_exists", field="name")
    token = TOKEN_PREFIX + secrets.token_urlsafe(TOKEN_BYTES)
    key = ApiKey(name=name, role=role, token_hash=hash_token(token), created_at=utcnow())
    session.add(key)
    session.flush()
    return key, token


def authenticate(session: Session, token: str) -> ApiKey | None:
    """The live key for ``token``, or None (unknown or revoked)."""
    digest = hash_token(token)
    key = session.scalar(_BY_HASH, {"digest": digest})
    # The lookup is by hash, so it reveals nothing about the token; the comparison is
    # constant-time anyway so no code path compares secrets byte by byte.
    if key is None or not hmac.compare_digest(key.token_hash, digest):
        return None
    if key.revoked_at is not None:
        return None
    return key


def revoke_key(session: Session, name: str) -> ApiKey:
    key = session.scalar(select(ApiKey).where(ApiKey.name == name))
    if key is None:
        raise NotFound(f"no API key named {name!r}", code="key_not_found", field="name")
    if key.revoked_at is None:
        key.revoked_at = utcnow()
        session.flush()
    return key


def list_keys(session: Session) -> Sequence[ApiKey]:
    return session.scalars(select(ApiKey).order_by(ApiKey.id)).all()
