"""Failed password sign-ins counted per name and per client address in fixed windows
(migration 0120), so the limit holds across worker processes and restarts.

A row per (scope, subject): ``scope`` is ``name`` or ``address``, ``subject`` the name typed
or the client's address; ``window_start`` is when its window began and ``failures`` how many
attempts it has counted since. Each attempt is counted *before* its password is checked, in
one upsert per subject (so two workers cannot both slip under the limit), and a successful
attempt takes its own count back: the counts are of failures, and a success resets no one
else's. Not a log table: rows change and expired ones are deleted. These functions never
commit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import datetime, timedelta

from sqlalchemy import Integer, String, case, delete, select, tuple_, update
from sqlalchemy.dialects.postgresql import insert as postgresql_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Mapped, Session, mapped_column

from service.store.models import Base, UTCDateTime

MAX_SUBJECT = 128
Subject = tuple[str, str]
"""(scope, subject): ("name", "bo") or ("address", "192.0.2.7")."""


class SignInFailureRow(Base):
    __tablename__ = "console_sign_in_failures"

    scope: Mapped[str] = mapped_column(String(16), primary_key=True)
    subject: Mapped[str] = mapped_column(String(MAX_SUBJECT), primary_key=True)
    window_start: Mapped[datetime] = mapped_column(UTCDateTime)
    failures: Mapped[int] = mapped_column(Integer)


def count_attempt(
    session: Session,
    subjects: Sequence[Subject],
    now: datetime,
    window: timedelta,
    limit: int,
) -> int | None:
    """Count one attempt against every subject (a new window for a subject whose window has
    passed). Returns None while every subject has at most ``limit`` attempts in its window,
    else the seconds until the latest such window ends (the attempt must be refused)."""
    cutoff = now - window
    dialect = session.connection().dialect.name
    # Past windows go; on PostgreSQL only rows no other attempt holds (SKIP LOCKED), so the
    # purge never waits, and the upserts below take their rows in one order (name, then
    # address, as ``subjects`` gives them): two attempts cannot deadlock.
    past = select(SignInFailureRow.scope, SignInFailureRow.subject).where(
        SignInFailureRow.window_start <= cutoff
    )
    if dialect == "postgresql":
        past = past.with_for_update(skip_locked=True)
    session.execute(
        delete(SignInFailureRow).where(
            tuple_(SignInFailureRow.scope, SignInFailureRow.subject).in_(past)
        )
    )
    insert = postgresql_insert if dialect == "postgresql" else sqlite_insert
    expired = SignInFailureRow.window_start <= cutoff
    over, wait = False, 0.0
    for scope, subject in subjects:
        stmt = insert(SignInFailureRow).values(
            scope=scope, subject=subject[:MAX_SUBJECT], window_start=now, failures=1
        )
        stmt = stmt.on_conflict_do_update(
            index_elements=["scope", "subject"],
            set_={
                "failures": case((expired, 1), else_=SignInFailureRow.failures + 1),
                "window_start": case(
                    (expired, stmt.excluded.window_start), else_=SignInFailureRow.window_start
                ),
            },
        )
        session.execute(stmt)
        row = session.execute(
            select(SignInFailureRow.window_start, SignInFailureRow.failures).where(
                SignInFailureRow.scope == scope,
                SignInFailureRow.subject == subject[:MAX_SUBJECT],
            )
        ).one()
        if row.failures > limit:
            over = True
            wait = max(wait, (row.window_start + window - now).total_seconds())
    session.flush()
    return max(1, math.ceil(wait)) if over else None


def take_back(session: Session, subjects: Sequence[Subject]) -> None:
    """A successful attempt: undo its own count (and nothing else)."""
    for scope, subject in subjects:
        session.execute(
            update(SignInFailureRow)
            .where(
                SignInFailureRow.scope == scope,
                SignInFailureRow.subject == subject[:MAX_SUBJECT],
                SignInFailureRow.failures > 0,
            )
            .values(failures=SignInFailureRow.failures - 1)
        )
    session.flush()
