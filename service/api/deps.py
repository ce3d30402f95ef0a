"""Request dependencies: the database session and the bearer-token role check.

Routers use ``DbSession`` for the session (``ReadSession`` when the route only reads) and
``require_role("audit")`` (or several roles) for access.

The transaction rule: the request's session is committed here when the route returns and
rolled back when it raises; routes, services and repositories never commit or roll back.
Both sessions are declared with ``scope="function"``, so FastAPI runs this exit code right
after the route function has returned and its response has been built, but before the
response is sent (the default, ``scope="request"``, would run it after the response). A
commit that fails therefore raises before anything is sent: the client gets the error
(``service.api.errors``: 503 when the database is unavailable, else 500), never a 2xx for
a write that was not made durable.
"""

from __future__ import annotations

import time
from collections.abc import Awaitable, Callable, Iterator
from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sqlalchemy.orm import Session, sessionmaker

from service.errors import Forbidden, Unauthorized
from service.settings import Settings
from service.store import keys
from service.store.db import begin_read_only


def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def get_session(request: Request) -> Iterator[Session]:
    """The request's one transaction: committed when the route returns, rolled back (and
    nothing of it kept) when the route or its response raises."""
    factory: sessionmaker[Session] = request.app.state.session_factory
    with factory() as session:
        try:
            yield session
        except BaseException:
            session.rollback()
            raise
        session.commit()


def get_read_session(request: Request) -> Iterator[Session]:
    """A session whose transaction only reads: on SQLite a WAL snapshot without the write
    lock, so long reads (reports, listings) never hold up scoring."""
    factory: sessionmaker[Session] = request.app.state.session_factory
    session = factory()
    try:
        begin_read_only(session)
        yield session
    finally:
        session.close()


DbSession = Annotated[Session, Depends(get_session, scope="function")]
ReadSession = Annotated[Session, Depends(get_read_session, scope="function")]
AppSettings = Annotated[Settings, Depends(get_settings)]


def _bearer_token(request: Request) -> str:
    header = request.headers.get("authorization")
    if not header:
        raise Unauthorized("missing bearer token: send 'Authorization: Bearer <token>'")
    scheme, _, token = header.partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        raise Unauthorized("malformed Authorization header: expected 'Bearer <token>'")
    token = token.strip()
    if not keys.well_formed(token):
        # Not a token this service made: refused without asking the database.
        raise Unauthorized("malformed API key: tokens are 'eh_' and 43 characters")
    return token


@dataclass(frozen=True, slots=True)
class Caller:
    """The authenticated API key: every change it makes is attributed to it (its id and
    name: :attr:`actor`)."""

    id: int
    name: str
    role: str

    @property
    def actor(self) -> keys.Actor:
        return keys.Actor(self.id, self.name)


class KeyCache:
    """Live keys seen in the last ``ttl`` seconds, by token hash (0 turns it off).

    Spares the hot path a database round trip per request; the price is that a revoked key
    may still be accepted for up to ``ttl`` seconds in a process that saw it just before.
    Unknown and revoked tokens are never cached: they always ask the database.
    """

    def __init__(self, ttl: float, max_entries: int = 10_000) -> None:
        self.ttl = ttl
        self._max = max_entries
        self._entries: dict[str, tuple[Caller, float]] = {}

    def get(self, digest: str) -> Caller | None:
        entry = self._entries.get(digest)
        if entry is None or entry[1] < time.monotonic():
            return None
        return entry[0]

    def clear(self) -> None:
        """Forget every entry (after a revocation: this process then asks the database)."""
        self._entries.clear()

    def put(self, digest: str, caller: Caller) -> None:
        if self.ttl <= 0:
            return
        if len(self._entries) >= self._max:
            self._entries.clear()
        self._entries[digest] = (caller, time.monotonic() + self.ttl)


def _lookup_in_db(request: Request, digest: str, token: str) -> Caller | None:
    factory: sessionmaker[Session] = request.app.state.session_factory
    with factory() as session:
        # A short read of its own, never sharing the route's (write) transaction.
        begin_read_only(session)
        found = keys.authenticate(session, token)
        caller = None if found is None else Caller(found.id, found.name, found.role)
        session.rollback()
    cache: KeyCache | None = getattr(request.app.state, "key_cache", None)
    if caller is not None and cache is not None:
        cache.put(digest, caller)
    return caller


async def _lookup(request: Request, token: str) -> Caller | None:
    # A cached key is checked on the event loop: no thread-pool hop and no session for the
    # common case; only a cache miss reads the database, in a worker thread.
    cache: KeyCache | None = getattr(request.app.state, "key_cache", None)
    digest = keys.hash_token(token)
    if cache is not None:
        cached = cache.get(digest)
        if cached is not None:
            return cached
    return await run_in_threadpool(_lookup_in_db, request, digest, token)


BEARER_SCHEME = HTTPBearer(
    auto_error=False,
    scheme_name="apiKey",
    description="An Evenhand API key (`evenhand keys create`), sent as "
    "`Authorization: Bearer eh_...`. Each route needs one role: scoring, audit or admin.",
)
"""Declares the bearer scheme in the OpenAPI document on every route that needs a key (so
/docs can send one). It reads nothing itself: ``check`` parses the header."""
DeclaredBearer = Annotated[HTTPAuthorizationCredentials | None, Depends(BEARER_SCHEME)]


def require_role(*roles: str) -> Callable[..., Awaitable[Caller]]:
    """A dependency that admits keys with one of ``roles`` and returns the caller."""
    allowed = frozenset(roles)

    async def check(request: Request, _declared: DeclaredBearer = None) -> Caller:
        key = await _lookup(request, _bearer_token(request))
        if key is None:
            raise Unauthorized("unknown or revoked API key")
        if key.role not in allowed:
            needs = ", ".join(sorted(allowed))
            raise Forbidden(f"a {key.role!r} key may not call this endpoint (needs: {needs})")
        return key

    return check


ScoringKey = Annotated[Caller, Depends(require_role("scoring"))]
AuditKey = Annotated[Caller, Depends(require_role("audit"))]
AdminKey = Annotated[Caller, Depends(require_role("admin"))]
PolicyReaderKey = Annotated[Caller, Depends(require_role("admin", "audit"))]
"""Reads of the policy store: the auditor checks what was approved and served, read-only."""
