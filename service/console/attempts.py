"""The limit on password attempts (sign-in, and the old password when changing one): per
name and per client address, a fixed window counted in the database
(``service/store/sign_in_limits.py``), settings ``EVENHAND_CONSOLE_SIGN_IN_LIMIT`` and
``EVENHAND_CONSOLE_SIGN_IN_WINDOW_MINUTES``."""

from __future__ import annotations

from datetime import timedelta

from fastapi import Request

from service.console.deps import write_session
from service.errors import TooManyRequests
from service.settings import Settings
from service.store import sign_in_limits
from service.store.models import utcnow
from service.store.sign_in_limits import Subject


def subjects(request: Request, person: str) -> list[Subject]:
    address = request.client.host if request.client is not None else "unknown"
    return [("name", person), ("address", address)]


def count(request: Request, person: str) -> list[Subject]:
    """Count an attempt for ``person`` from this client before its password is checked;
    429 ``too_many_attempts`` (with Retry-After) when either is over the limit."""
    settings: Settings = request.app.state.settings
    who = subjects(request, person)
    with write_session(request) as session:
        wait = sign_in_limits.count_attempt(
            session,
            who,
            utcnow(),
            timedelta(minutes=settings.console_sign_in_window_minutes),
            settings.console_sign_in_limit,
        )
        session.commit()
    if wait is not None:
        raise TooManyRequests(
            f"too many failed password attempts for this name or from this address: try "
            f"again in {wait} seconds",
            retry_after=wait,
        )
    return who


def succeeded(request: Request, who: list[Subject]) -> None:
    """The attempt succeeded: take its count back (no one else's)."""
    with write_session(request) as session:
        sign_in_limits.take_back(session, who)
        session.commit()
