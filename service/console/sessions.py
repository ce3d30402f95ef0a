"""Console sessions: a random session id in the cookie, mapped in the database (table
``console_sessions``) to the signed-in key's id, name and role and to the session's CSRF
token, so every worker process serves every signed-in person.

The cookie carries only the session id (32 random bytes); the table is keyed by its SHA-256,
so a copy of the table yields no usable cookie. The API key itself is never kept after
sign-in. A session ends at sign-out, after ``idle_seconds`` without a request,
``lifetime_seconds`` after sign-in, or when its key is revoked, whichever comes first.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy.orm import Session, sessionmaker

from service.store import console_sessions as table
from service.store.models import utcnow

SESSION_ID_BYTES = 32
CSRF_BYTES = 32


@dataclass(frozen=True, slots=True)
class ConsoleSession:
    """Who is signed in (the key's id, name and role) and the session's CSRF token."""

    key_id: int
    key_name: str
    role: str
    csrf: str
    started: datetime
    last_seen: datetime


def _digest(session_id: str) -> str:
    return hashlib.sha256(session_id.encode("utf-8")).hexdigest()


def same_token(a: str, b: str) -> bool:
    """Constant-time comparison of two tokens (CSRF tokens, session ids)."""
    return hmac.compare_digest(a.encode("utf-8"), b.encode("utf-8"))


class SessionStore:
    """Create, find and end sessions; each call is one short transaction of its own."""

    def __init__(
        self,
        factory: sessionmaker[Session],
        idle_seconds: float,
        lifetime_seconds: float,
        clock: Callable[[], datetime] = utcnow,
    ) -> None:
        self._factory = factory
        self.idle_seconds = idle_seconds
        self.lifetime_seconds = lifetime_seconds
        self._clock = clock

    def _limits(self, now: datetime) -> tuple[datetime, datetime]:
        return (
            now - timedelta(seconds=self.idle_seconds),
            now - timedelta(seconds=self.lifetime_seconds),
        )

    def create(self, key_id: int, key_name: str, role: str) -> str:
        """A new session for the key; returns the session id for the cookie. Expired
        sessions of anyone are deleted on the way."""
        session_id = secrets.token_urlsafe(SESSION_ID_BYTES)
        now = self._clock()
        with self._factory() as db:
            table.purge_expired(db, *self._limits(now))
            table.add(
                db,
                table.ConsoleSessionRow(
                    id_hash=_digest(session_id),
                    key_id=key_id,
                    key_name=key_name,
                    role=role,
                    csrf=secrets.token_urlsafe(CSRF_BYTES),
                    started_at=now,
                    last_seen=now,
                ),
            )
            db.commit()
        return session_id

    def get(self, session_id: str) -> ConsoleSession | None:
        """The live session with this id (its idle clock restarted), or None."""
        now = self._clock()
        with self._factory() as db:
            row = table.live(db, _digest(session_id), now, *self._limits(now))
            found = (
                None
                if row is None
                else ConsoleSession(
                    row.key_id, row.key_name, row.role, row.csrf, row.started_at, row.last_seen
                )
            )
            db.commit()
        return found

    def end(self, session_id: str) -> None:
        with self._factory() as db:
            table.end(db, _digest(session_id))
            db.commit()

    def end_others(self, key_id: int, session_id: str) -> int:
        """End the key's other sessions (after its person's password changed), keeping
        ``session_id``; returns how many ended."""
        with self._factory() as db:
            ended = table.end_others(db, key_id, _digest(session_id))
            db.commit()
        return ended
