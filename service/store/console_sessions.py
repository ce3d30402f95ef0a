"""Console sessions in the database, so every worker process knows every signed-in person.

A row per session: the SHA-256 of its random id (the cookie holds the id itself, so the table
never yields a usable cookie), the key it was signed in with (id, name, role), its CSRF token
and its start and last request times. Unlike the log's tables this one is changed in place:
``last_seen`` moves on each request and rows are deleted at sign-out and expiry. These
functions never commit (the console's request commits).

No index beyond the primary key: a request finds its session by the hash; the purge of
expired sessions at each sign-in scans a table holding one row per signed-in person.
"""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import ForeignKey, String, delete, exists, or_, select
from sqlalchemy.orm import Mapped, Session, mapped_column

from service.store.models import ApiKey, Base, KeyAction, KeyEvent, UTCDateTime


class ConsoleSessionRow(Base):
    __tablename__ = "console_sessions"

    id_hash: Mapped[str] = mapped_column(String(64), primary_key=True)
    key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id"))
    key_name: Mapped[str] = mapped_column(String(64))
    role: Mapped[str] = mapped_column(String(16))
    csrf: Mapped[str] = mapped_column(String(64))
    started_at: Mapped[datetime] = mapped_column(UTCDateTime)
    last_seen: Mapped[datetime] = mapped_column(UTCDateTime)


def add(session: Session, row: ConsoleSessionRow) -> None:
    session.add(row)
    session.flush()


TOUCH_EVERY = timedelta(seconds=30)
"""``last_seen`` moves at most this often, so most console requests write nothing (on
SQLite a write waits for, and holds up, the scoring path's writer); a session may therefore
end up to this much earlier than its idle time says."""


def live(
    session: Session, id_hash: str, now: datetime, idle_since: datetime, started_since: datetime
) -> ConsoleSessionRow | None:
    """The session if it is live (seen after ``idle_since``, started after ``started_since``)
    and its key is not revoked; its ``last_seen`` becomes ``now`` (at most every
    ``TOUCH_EVERY``). A dead one is deleted."""
    row = session.get(ConsoleSessionRow, id_hash, with_for_update=True)
    if row is None:
        return None
    revoked = session.scalar(
        select(
            exists().where(KeyEvent.key_id == row.key_id, KeyEvent.action == KeyAction.REVOKE.value)
        )
    )
    key_known = session.get(ApiKey, row.key_id) is not None
    if revoked or not key_known or row.last_seen <= idle_since or row.started_at <= started_since:
        session.delete(row)
        session.flush()
        return None
    if now - row.last_seen >= TOUCH_EVERY:  # most requests only read
        row.last_seen = now
        session.flush()
    return row


def end(session: Session, id_hash: str) -> None:
    session.execute(delete(ConsoleSessionRow).where(ConsoleSessionRow.id_hash == id_hash))


def end_others(session: Session, key_id: int, keep_id_hash: str) -> int:
    """End every session of ``key_id`` but the one whose id hashes to ``keep_id_hash``;
    returns how many ended."""
    result = session.execute(
        delete(ConsoleSessionRow).where(
            ConsoleSessionRow.key_id == key_id, ConsoleSessionRow.id_hash != keep_id_hash
        )
    )
    return int(getattr(result, "rowcount", 0) or 0)


def purge_expired(session: Session, idle_since: datetime, started_since: datetime) -> int:
    """Delete every session past its idle time or lifetime; returns how many."""
    result = session.execute(
        delete(ConsoleSessionRow).where(
            or_(
                ConsoleSessionRow.last_seen <= idle_since,
                ConsoleSessionRow.started_at <= started_since,
            )
        )
    )
    return int(getattr(result, "rowcount", 0) or 0)
