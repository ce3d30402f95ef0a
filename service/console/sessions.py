"""Console sessions: a random session id in the cookie, mapped in this process's memory to
the signed-in key's id, name and role and to the session's CSRF token.

The cookie carries only the session id (32 random bytes); the store is keyed by its SHA-256,
so not even a dump of the process's memory yields a usable cookie. The API key itself is
never kept after sign-in. A session ends at sign-out, after ``idle`` without a request, or
``lifetime`` after sign-in, whichever comes first.

The store lives in one process: with ``EVENHAND_WORKERS`` above 1 a request may reach a
worker that never saw the sign-in (the console then asks to sign in again), and a restart
signs everyone out. See docs/console.md.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, replace

SESSION_ID_BYTES = 32
CSRF_BYTES = 32


@dataclass(frozen=True, slots=True)
class ConsoleSession:
    """Who is signed in (the key's id, name and role) and the session's CSRF token."""

    key_id: int
    key_name: str
    role: str
    csrf: str
    started: float
    last_seen: float


def _digest(session_id: str) -> str:
    return hashlib.sha256(session_id.encode("utf-8")).hexdigest()


def same_token(a: str, b: str) -> bool:
    """Constant-time comparison of two tokens (CSRF tokens, session ids)."""
    return hmac.compare_digest(a.encode("utf-8"), b.encode("utf-8"))


class SessionStore:
    """Live sessions by the SHA-256 of their id; thread-safe (sync routes run in threads)."""

    def __init__(
        self,
        idle_seconds: float,
        lifetime_seconds: float,
        clock: Callable[[], float] = time.monotonic,
        max_sessions: int = 10_000,
    ) -> None:
        self.idle_seconds = idle_seconds
        self.lifetime_seconds = lifetime_seconds
        self._clock = clock
        self._max = max_sessions
        self._lock = threading.Lock()
        self._sessions: dict[str, ConsoleSession] = {}

    def _expired(self, s: ConsoleSession, now: float) -> bool:
        return now - s.last_seen > self.idle_seconds or now - s.started > self.lifetime_seconds

    def create(self, key_id: int, key_name: str, role: str) -> str:
        """A new session for the key; returns the session id for the cookie."""
        session_id = secrets.token_urlsafe(SESSION_ID_BYTES)
        now = self._clock()
        entry = ConsoleSession(key_id, key_name, role, secrets.token_urlsafe(CSRF_BYTES), now, now)
        with self._lock:
            if len(self._sessions) >= self._max:
                self._drop_expired(now)
            if len(self._sessions) >= self._max:  # still full: the oldest goes
                oldest = min(self._sessions, key=lambda k: self._sessions[k].last_seen)
                del self._sessions[oldest]
            self._sessions[_digest(session_id)] = entry
        return session_id

    def get(self, session_id: str) -> ConsoleSession | None:
        """The live session with this id (its idle clock restarted), or None."""
        digest = _digest(session_id)
        now = self._clock()
        with self._lock:
            entry = self._sessions.get(digest)
            if entry is None:
                return None
            if self._expired(entry, now):
                del self._sessions[digest]
                return None
            entry = replace(entry, last_seen=now)
            self._sessions[digest] = entry
            return entry

    def end(self, session_id: str) -> None:
        with self._lock:
            self._sessions.pop(_digest(session_id), None)

    def _drop_expired(self, now: float) -> None:
        for digest in [k for k, s in self._sessions.items() if self._expired(s, now)]:
            del self._sessions[digest]
