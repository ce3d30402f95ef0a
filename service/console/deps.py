"""What every console page module shares: the signed-in session and the posted form as
FastAPI dependencies, database sessions for a page, and the audit role's check."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session, sessionmaker

from service.console.sessions import ConsoleSession
from service.console.web import Form, current_session, read_form
from service.errors import Forbidden
from service.store.db import begin_read_only

Who = Annotated[ConsoleSession, Depends(current_session)]
PostedForm = Annotated[Form, Depends(read_form)]


def read_session(request: Request) -> Session:
    """A read-only transaction on the app's database (the caller closes it)."""
    factory: sessionmaker[Session] = request.app.state.session_factory
    session = factory()
    begin_read_only(session)
    return session


def write_session(request: Request) -> Session:
    """A session that may write (the caller commits and closes it)."""
    factory: sessionmaker[Session] = request.app.state.session_factory
    return factory()


def require_audit(who: ConsoleSession) -> None:
    if who.role != "audit":
        raise Forbidden(f"a {who.role!r} key may not read reports: they need an audit key")
