"""The one retry for idempotent writes that race: the same key stored meanwhile.

Outcomes, final decisions and scoring requests are idempotent by a unique key (the
recommendation, the request id). Two concurrent requests with the same key both find
nothing stored and both insert; the database's unique index refuses the second. The answer
is the same everywhere: undo the refused attempt and decide once more, now against the
stored record (which then answers as a repeat, or as a conflict when it differs).
"""

from __future__ import annotations

from collections.abc import Callable
from contextlib import AbstractContextManager
from typing import Any, TypeVar

from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

T = TypeVar("T")


def retry_if_stored_meanwhile(
    attempt: Callable[[], AbstractContextManager[Any]], write: Callable[[], T]
) -> T:
    """Run ``write`` inside ``attempt()`` (a savepoint or a transaction); if the unique index
    refuses it, run it once more inside a new ``attempt()``. A second refusal is raised."""
    try:
        with attempt():
            return write()
    except IntegrityError:
        with attempt():
            return write()


def in_savepoint(session: Session, write: Callable[[], T]) -> T:
    """:func:`retry_if_stored_meanwhile` inside the caller's transaction: each attempt is a
    savepoint, so only the refused attempt is undone; the transaction itself is left to the
    caller (the request's session dependency, a job's entry point) to commit or roll back."""
    return retry_if_stored_meanwhile(session.begin_nested, write)
