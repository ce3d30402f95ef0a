"""Per-person console passwords in the database (migration 0100): a person's name bound to
one API key, with the scrypt hash of their password. These functions never commit."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import ForeignKey, Integer, LargeBinary, String, delete, exists, select
from sqlalchemy.orm import Mapped, Session, mapped_column

from service.console.passwords import Hashed
from service.store.models import ApiKey, Base, KeyAction, KeyEvent, UTCDateTime


class ConsolePasswordRow(Base):
    __tablename__ = "console_passwords"

    person: Mapped[str] = mapped_column(String(64), primary_key=True)
    key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id"), unique=True)
    salt: Mapped[bytes] = mapped_column(LargeBinary(16))
    hash: Mapped[bytes] = mapped_column(LargeBinary(64))
    n: Mapped[int] = mapped_column(Integer)
    r: Mapped[int] = mapped_column(Integer)
    p: Mapped[int] = mapped_column(Integer)
    set_by: Mapped[str] = mapped_column(String(64))
    set_at: Mapped[datetime] = mapped_column(UTCDateTime)

    def hashed(self) -> Hashed:
        return Hashed(self.salt, self.hash, self.n, self.r, self.p)


def set_password(
    session: Session, person: str, key: ApiKey, hashed: Hashed, set_by: str, at: datetime
) -> None:
    """Bind ``person`` to ``key`` with this password; replaces the person's earlier row and
    any other person's binding to the same key."""
    session.execute(
        delete(ConsolePasswordRow).where(
            (ConsolePasswordRow.person == person) | (ConsolePasswordRow.key_id == key.id)
        )
    )
    session.flush()
    session.add(
        ConsolePasswordRow(
            person=person,
            key_id=key.id,
            salt=hashed.salt,
            hash=hashed.hash,
            n=hashed.n,
            r=hashed.r,
            p=hashed.p,
            set_by=set_by,
            set_at=at,
        )
    )
    session.flush()


def find(session: Session, person: str) -> ConsolePasswordRow | None:
    return session.get(ConsolePasswordRow, person)


def live_key(session: Session, key_id: int) -> ApiKey | None:
    """The key if it exists and is not revoked."""
    revoked = session.scalar(
        select(exists().where(KeyEvent.key_id == key_id, KeyEvent.action == KeyAction.REVOKE.value))
    )
    return None if revoked else session.get(ApiKey, key_id)


def people(session: Session) -> list[tuple[ConsolePasswordRow, str]]:
    """Every person with the name of the key they stand for."""
    rows = session.execute(
        select(ConsolePasswordRow, ApiKey.name)
        .join(ApiKey, ApiKey.id == ConsolePasswordRow.key_id)
        .order_by(ConsolePasswordRow.person)
    )
    return [(row, name) for row, name in rows]


def of_key(session: Session, key_id: int) -> ConsolePasswordRow | None:
    """The person bound to this key, if any (one per key)."""
    return session.scalars(
        select(ConsolePasswordRow).where(ConsolePasswordRow.key_id == key_id)
    ).first()


def change_password(
    session: Session, person: str, hashed: Hashed, set_by: str, at: datetime
) -> None:
    """Replace the person's password hash (salt and parameters with it) in place."""
    row = session.get(ConsolePasswordRow, person, with_for_update=True)
    if row is None:
        return
    row.salt, row.hash, row.n, row.r, row.p = hashed.salt, hashed.hash, hashed.n, hashed.r, hashed.p
    row.set_by, row.set_at = set_by, at
    session.flush()
