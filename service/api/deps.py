"""Request dependencies: the database session and the bearer-token role check.

Routers use ``DbSession`` for the session and ``require_role("audit")`` (or several roles)
for access. The session never commits on its own: a route that writes calls
``session.commit()`` itself before it returns, so the write is durable before the response is
sent (FastAPI runs the exit code of yield dependencies only after the response by default).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session, sessionmaker

from service.errors import Forbidden, Unauthorized
from service.settings import Settings
from service.store import keys
from service.store.db import begin_read_only


def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def get_session(request: Request) -> Iterator[Session]:
    factory: sessionmaker[Session] = request.app.state.session_factory
    session = factory()
    try:
        yield session
    finally:
        # Anything not committed by the route is rolled back here.
        session.close()


DbSession = Annotated[Session, Depends(get_session, scope="function")]
AppSettings = Annotated[Settings, Depends(get_settings)]


def _bearer_token(request: Request) -> str:
    header = request.headers.get("authorization")
    if not header:
        raise Unauthorized("missing bearer token: send 'Authorization: Bearer <token>'")
    scheme, _, token = header.partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        raise Unauthorized("malformed Authorization header: expected 'Bearer <token>'")
    return token.strip()


@dataclass(frozen=True, slots=True)
class Caller:
    """The authenticated API key: ``name`` is the actor recorded in histories."""

    id: int
    name: str
    role: str


def require_role(*roles: str) -> Callable[..., Caller]:
    """A dependency that admits keys with one of ``roles`` and returns the caller."""
    allowed = frozenset(roles)

    def check(request: Request, session: DbSession) -> Caller:
        token = _bearer_token(request)
        # A short read of its own: the route's writes start a fresh (write) transaction.
        begin_read_only(session)
        found = keys.authenticate(session, token)
        key = None if found is None else Caller(found.id, found.name, found.role)
        session.rollback()
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
