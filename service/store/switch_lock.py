"""The switch lock: orders scoring against changes of the active or shadow version.

A record must name the version that was active at its ``issued_at`` as the history tells it
(an activation's event time to the next switch's). Reading the active version and stamping
the time after it is not enough on PostgreSQL: a switch stamps its event inside its
transaction, before it commits, and until then scoring still reads the old version. So the
two take one lock (a transaction-level advisory lock, in the lock manager's memory: no row
is written for it):

- every scoring transaction holds it *shared* from before it reads the active versions until
  it commits (many at once; taken by an earlier statement than those reads, whose snapshots
  therefore show what any switch that held it committed);
- every switch (activate, rollback, shadow on/off) takes it *exclusively* before it reads
  anything, and holds it until it commits.

A switch therefore happens wholly between scoring transactions: a record stamped before a
switch took the lock committed before the switch stamped its event, and a record read after
a switch read it after the switch committed. One key for all policies: switches are rare and
short, and scoring never waits on anything but a switch in progress.

SQLite needs nothing: every write transaction, scoring's and a switch's alike, holds the
database's single write lock from ``BEGIN IMMEDIATE`` to its commit (``service.store.db``).
The lock order is always this lock first, then a policy's state row (``lifecycle``), so a
switch waiting for the row never holds up scoring that waits for it.
"""

from __future__ import annotations

from sqlalchemy import Connection
from sqlalchemy.orm import Session

SWITCH_LOCK_KEY = 0x45564E48_53574348  # "EVNH" "SWCH"; the sealer uses "EVNH" "SEAL"

SCORING_LOCK_SQL = f"SELECT pg_advisory_xact_lock_shared({SWITCH_LOCK_KEY})"
"""PostgreSQL: scoring's shared hold, as a statement (or a subquery of another one)."""
_EXCLUSIVE_SQL = f"SELECT pg_advisory_xact_lock({SWITCH_LOCK_KEY})"


def hold_for_scoring(conn: Connection) -> None:
    """Scoring: hold the lock shared until this transaction ends (PostgreSQL; a no-op on
    SQLite). Call before reading the active versions."""
    if conn.dialect.name == "postgresql":
        conn.exec_driver_sql(SCORING_LOCK_SQL)


def hold_for_switch(session: Session) -> None:
    """A switch: hold the lock exclusively until the session's transaction ends. Call before
    the switch reads anything, and before it locks the policy's state row."""
    conn = session.connection()
    if conn.dialect.name == "postgresql":
        conn.exec_driver_sql(_EXCLUSIVE_SQL)
