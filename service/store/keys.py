"""API keys: bearer tokens with a role. Only the SHA-256 of a token is stored.

Every token is made here, never chosen by a caller: ``eh_`` and 43 URL-safe base64 characters
(32 random bytes, 256 bits). A presented token of any other shape cannot be a key, so it is
refused without a database lookup (:func:`well_formed`).

Keys and their lives are insert-only: a key row is written once (name, role, token hash,
creation time); its creation and its revocation are :class:`~service.store.models.KeyEvent`
rows. A key is live while no revocation event names it: the authentication lookup is one
indexed query (the key by its hash, anti-joined with its revocation through the unique
(key_id, action) index of ``key_events``).

Every action is attributed to a credential (:class:`Actor`: the key's id and name), except
what the operator does on the database with the CLI (creating keys, revoking them), which
names the operator's operating-system account instead (:func:`operator_name`).
"""

from __future__ import annotations

import getpass
import hashlib
import hmac
import os
import re
import secrets
from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import bindparam, exists, func, select
from sqlalchemy.orm import Session, aliased

from service.errors import Conflict, Forbidden, NotFound, Unauthorized, Unprocessable
from service.store.models import ApiKey, KeyAction, KeyEvent, Role, utcnow

TOKEN_PREFIX = "eh_"
TOKEN_BYTES = 32
_TOKEN_SHAPE = re.compile(r"eh_[A-Za-z0-9_-]{43}")
KEY_NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._@-]{0,63}$"
"""Names of new keys: they appear in histories and listings, so no spaces or control
characters."""
_KEY_NAME = re.compile(KEY_NAME_PATTERN)
KEYS_LOCK_KEY = 0x45564E48_4B455953  # "EVNH" "KEYS": serialises revocations on PostgreSQL

_REVOKED = exists().where(KeyEvent.key_id == ApiKey.id, KeyEvent.action == KeyAction.REVOKE.value)
_LIVE_BY_HASH = select(ApiKey).where(ApiKey.token_hash == bindparam("digest"), ~_REVOKED)


@dataclass(frozen=True, slots=True)
class Actor:
    """The credential an action is attributed to: an API key's id and its name."""

    key_id: int
    name: str

    @classmethod
    def of(cls, key: ApiKey) -> Actor:
        return cls(key.id, key.name)


@dataclass(frozen=True, slots=True)
class KeyView:
    """A key as listed: never its hash."""

    name: str
    role: str
    created_at: datetime
    created_by: str | None
    revoked_at: datetime | None
    revoked_by: str | None
    revoke_reason: str | None

    @property
    def revoked(self) -> bool:
        return self.revoked_at is not None


def operator_name() -> str:
    """``operator:<account>``: who ran a CLI command on the database (not a credential)."""
    try:
        account = getpass.getuser()
    except (OSError, KeyError):  # no login name and no passwd entry (some containers)
        account = f"uid-{os.getuid()}"
    return f"operator:{account}"[:64]


def well_formed(token: str) -> bool:
    """Whether ``token`` has the shape of the tokens :func:`create_key` makes."""
    return _TOKEN_SHAPE.fullmatch(token) is not None


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def _by(by: Actor | str) -> tuple[int | None, str]:
    return (by.key_id, by.name) if isinstance(by, Actor) else (None, by)


def create_key(
    session: Session, name: str, role: str, by: Actor | str = "operator"
) -> tuple[ApiKey, str]:
    """A new key and its token (returned once; only the hash is kept), with its creation
    event. ``by``: the acting key, or a description of the operator."""
    if role not in {r.value for r in Role}:
        raise Unprocessable(
            f"role {role!r} is not one of {', '.join(r.value for r in Role)}", field="role"
        )
    if _KEY_NAME.fullmatch(name) is None:
        raise Unprocessable(
            "a key name is 1 to 64 letters, digits and . _ @ -, starting with a letter or digit",
            field="name",
        )
    if session.scalar(select(ApiKey.id).where(ApiKey.name == name)) is not None:
        raise Conflict(f"an API key named {name!r} already exists", code="key_exists", field="name")
    token = TOKEN_PREFIX + secrets.token_urlsafe(TOKEN_BYTES)
    now = utcnow()
    key = ApiKey(name=name, role=role, token_hash=hash_token(token), created_at=now)
    session.add(key)
    session.flush()
    by_key_id, by_name = _by(by)
    session.add(
        KeyEvent(
            key_id=key.id,
            action=KeyAction.CREATE.value,
            at=now,
            by_key_id=by_key_id,
            by=by_name,
        )
    )
    session.flush()
    return key, token


def authenticate(session: Session, token: str) -> ApiKey | None:
    """The live key for ``token``, or None (unknown or revoked): one indexed query."""
    digest = hash_token(token)
    key = session.scalar(_LIVE_BY_HASH, {"digest": digest})
    # The lookup is by hash, so it reveals nothing about the token; the comparison is
    # constant-time anyway so no code path compares secrets byte by byte.
    if key is None or not hmac.compare_digest(key.token_hash, digest):
        return None
    return key


def admin_actor(session: Session, token: str) -> Actor:
    """The live admin key ``token`` belongs to, as an :class:`Actor` (the CLI's check, the
    same as the API's): 401 ``unauthorized`` for a malformed, unknown or revoked token,
    403 ``forbidden`` for a key of another role."""
    key = authenticate(session, token) if well_formed(token) else None
    if key is None:
        raise Unauthorized("the token is not a live API key (malformed, unknown or revoked)")
    if key.role != Role.ADMIN.value:
        raise Forbidden(f"key {key.name!r} is a {key.role!r} key; policy changes need an admin key")
    return Actor.of(key)


def _hold_keys_lock(session: Session) -> None:
    """PostgreSQL: one revocation at a time (SQLite's write lock does this already), so two
    admins revoking each other's keys cannot both pass the last-admin check."""
    conn = session.connection()
    if conn.dialect.name == "postgresql":
        conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({KEYS_LOCK_KEY})")


def revoke_key(
    session: Session, name: str, reason: str, by: Actor | str, *, keep_an_admin: bool
) -> KeyView:
    """Revoke the key named ``name``: a revocation event. Revoking a revoked key again
    changes nothing and answers as the first time (a safe repeat).

    ``keep_an_admin``: refuse (409 ``last_admin_key``) to revoke the last live admin key
    (the API's rule; the operator on the database may, and can create a new one)."""
    if not reason or not reason.strip():
        raise Unprocessable("a revocation needs a reason", code="reason_required", field="reason")
    _hold_keys_lock(session)
    key = session.scalar(select(ApiKey).where(ApiKey.name == name))
    if key is None:
        raise NotFound(f"no API key named {name!r}", code="key_not_found", field="name")
    revoked = session.scalar(
        select(KeyEvent.id).where(
            KeyEvent.key_id == key.id, KeyEvent.action == KeyAction.REVOKE.value
        )
    )
    if revoked is None:
        if keep_an_admin and key.role == Role.ADMIN.value:
            others = session.scalar(
                select(func.count())
                .select_from(ApiKey)
                .where(ApiKey.role == Role.ADMIN.value, ApiKey.id != key.id, ~_REVOKED)
            )
            if not others:
                raise Conflict(
                    f"{name!r} is the last live admin key; create another admin key first "
                    "(evenhand keys create) or let the operator revoke it on the database",
                    code="last_admin_key",
                    field="name",
                )
        by_key_id, by_name = _by(by)
        session.add(
            KeyEvent(
                key_id=key.id,
                action=KeyAction.REVOKE.value,
                at=utcnow(),
                by_key_id=by_key_id,
                by=by_name,
                reason=reason.strip(),
            )
        )
        session.flush()
    return next(v for v in list_keys(session) if v.name == name)


def live_admin_count(session: Session) -> int:
    return int(
        session.scalar(
            select(func.count())
            .select_from(ApiKey)
            .where(ApiKey.role == Role.ADMIN.value, ~_REVOKED)
        )
        or 0
    )


def list_keys(session: Session) -> list[KeyView]:
    """Every key, oldest first, with who created it and its revocation, if any."""
    created = aliased(KeyEvent)
    revoked = aliased(KeyEvent)
    rows = session.execute(
        select(ApiKey, created.by, revoked.at, revoked.by, revoked.reason)
        .outerjoin(
            created,
            (created.key_id == ApiKey.id) & (created.action == KeyAction.CREATE.value),
        )
        .outerjoin(
            revoked,
            (revoked.key_id == ApiKey.id) & (revoked.action == KeyAction.REVOKE.value),
        )
        .order_by(ApiKey.id)
    )
    return [
        KeyView(
            name=key.name,
            role=key.role,
            created_at=key.created_at,
            created_by=created_by,
            revoked_at=revoked_at,
            revoked_by=revoked_by,
            revoke_reason=reason,
        )
        for key, created_by, revoked_at, revoked_by, reason in rows
    ]
