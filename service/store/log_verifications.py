"""Runs of the log's verification and their results (migration 0110), so the console shows
the last result without running it again, and a run can go on off the request.

A row is written when a run starts (``finished_at`` null: running) and completed in place
when it ends: what was checked, ok or the first problem, or ``error`` when the run itself
failed (say, the database went away). Not a log table. These functions never commit, except
``start_run`` and ``run_and_keep``, which own their short transactions (a run takes long:
it is never inside a caller's transaction).
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import JSON, BigInteger, Boolean, Integer, String, Text, select
from sqlalchemy.orm import Mapped, Session, mapped_column, sessionmaker

from service.store.log_verify import VerifyResult, verify_log
from service.store.models import Base, BigId, UTCDateTime, utcnow

MAX_BY = 128
START_LOCK_KEY = 0x45564E48_56524659  # "EVNH" "VRFY": one start at a time on PostgreSQL
STALE_AFTER = timedelta(hours=6)
"""A run not finished this long after it started is taken for dead (its process stopped):
the page no longer shows it as running and a new one may start."""


class LogVerificationRow(Base):
    __tablename__ = "log_verifications"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    started_at: Mapped[datetime] = mapped_column(UTCDateTime)
    started_by: Mapped[str] = mapped_column(String(MAX_BY))
    finished_at: Mapped[datetime | None] = mapped_column(UTCDateTime, default=None)
    ok: Mapped[bool | None] = mapped_column(Boolean, default=None)
    seals_checked: Mapped[int | None] = mapped_column(BigId, default=None)
    records_checked: Mapped[int | None] = mapped_column(BigId, default=None)
    tally_batches_checked: Mapped[int | None] = mapped_column(BigId, default=None)
    purged_through_seal: Mapped[int | None] = mapped_column(BigId, default=None)
    purged_leaves: Mapped[int | None] = mapped_column(BigId, default=None)
    unsealed: Mapped[dict[str, int] | None] = mapped_column(JSON, default=None)
    problem_kind: Mapped[str | None] = mapped_column(String(32), default=None)
    problem_id: Mapped[int | None] = mapped_column(BigInteger, default=None)
    problem_reason: Mapped[str | None] = mapped_column(Text, default=None)
    error: Mapped[str | None] = mapped_column(Text, default=None)

    def running(self, now: datetime) -> bool:
        return self.finished_at is None and now - self.started_at < STALE_AFTER


def start(session: Session, started_by: str, at: datetime) -> int:
    """Record that a run starts; returns its id."""
    row = LogVerificationRow(started_at=at, started_by=started_by[:MAX_BY])
    session.add(row)
    session.flush()
    return row.id


def finish(session: Session, run_id: int, result: VerifyResult, at: datetime) -> None:
    """Keep a finished run's result."""
    row = session.get(LogVerificationRow, run_id, with_for_update=True)
    if row is None:
        return
    row.finished_at = at
    row.ok = result.ok
    row.seals_checked = result.seals_checked
    row.records_checked = result.records_checked
    row.tally_batches_checked = result.tally_batches_checked
    row.purged_through_seal = result.purged_through_seal
    row.purged_leaves = result.purged_leaves
    row.unsealed = dict(result.unsealed)
    if result.problem is not None:
        row.problem_kind = result.problem.kind[:32]
        row.problem_id = result.problem.id
        row.problem_reason = result.problem.reason
    session.flush()


def fail(session: Session, run_id: int, error: str, at: datetime) -> None:
    """Keep that a run could not finish (not a finding about the log)."""
    row = session.get(LogVerificationRow, run_id, with_for_update=True)
    if row is None:
        return
    row.finished_at = at
    row.error = error[:2000]
    session.flush()


def latest(session: Session) -> LogVerificationRow | None:
    """The newest run (running or finished)."""
    return session.scalars(
        select(LogVerificationRow).order_by(LogVerificationRow.id.desc()).limit(1)
    ).first()


def last_finished(session: Session, before: int) -> LogVerificationRow | None:
    """The newest finished run with an id below ``before``."""
    return session.scalars(
        select(LogVerificationRow)
        .where(LogVerificationRow.finished_at.is_not(None), LogVerificationRow.id < before)
        .order_by(LogVerificationRow.id.desc())
        .limit(1)
    ).first()


def current_and_last(
    session: Session, now: datetime
) -> tuple[LogVerificationRow | None, LogVerificationRow | None]:
    """The run in progress (or None) and the newest finished run (or None), as of one
    reading of the newest row: a run that finishes between two statements is not shown
    both as running and, from the session's identity map, as finished without its end."""
    newest = latest(session)
    if newest is None:
        return None, None
    if newest.finished_at is not None:
        return None, newest
    running = newest if newest.running(now) else None
    return running, last_finished(session, before=newest.id)


def run_and_keep(
    factory: sessionmaker[Session],
    run_id: int,
    trusted_keys: Mapping[str, bytes],
    **options: Any,
) -> VerifyResult:
    """Verify the log (``verify_log`` with ``options``) and keep the result in run
    ``run_id``'s row; a run that fails outright is kept as its ``error``, and the error
    raised again."""
    try:
        result = verify_log(factory, trusted_keys, **options)
    except Exception as exc:
        with factory() as session:
            fail(session, run_id, f"{type(exc).__name__}: {exc}", utcnow())
            session.commit()
        raise
    with factory() as session:
        finish(session, run_id, result, utcnow())
        session.commit()
    return result


def start_run(factory: sessionmaker[Session], started_by: str) -> int | None:
    """Record a new run; None (and nothing recorded) when a run is in progress (started, not
    finished, not stale)."""
    with factory() as session:
        conn = session.connection()
        if conn.dialect.name == "postgresql":  # SQLite's write lock serialises starts already
            conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({START_LOCK_KEY})")
        now = utcnow()
        current = latest(session)
        if current is not None and current.running(now):
            session.rollback()
            return None
        run_id = start(session, started_by, now)
        session.commit()
    return run_id
