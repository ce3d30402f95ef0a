"""The suite's half of the insert-only rule: any UPDATE or DELETE that the service sends to a
table of the log fails the test that caused it (PostgreSQL's triggers are the other half).

Registered on every SQLAlchemy engine of this process: the apps, CLI commands and jobs the
tests run. Only the fixtures' cleanup, migrations and the tamper helper may change the tables,
inside :func:`changes_allowed`. The one exception, as in PostgreSQL's trigger: a retention purge
(``service.store.retention``) may DELETE from the tables of personal records on the connection
it has marked as purging.
"""

from __future__ import annotations

import re
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy import Engine, event

from service.store.retention import PURGING

LOG_TABLES = frozenset(
    {
        "policy_versions",
        "policy_events",
        "api_keys",
        "key_events",
        "recommendations",
        "outcome_records",
        "final_decisions",
        "audit_snapshots",
        "seals",
        "tree_nodes",
        "signing_keys",
        "tally_batches",
        "tallies",
        "log_purges",
        "purged_leaves",
    }
)
PURGEABLE = frozenset({"recommendations", "outcome_records", "final_decisions"})
_CHANGE = re.compile(r'^\s*(UPDATE|DELETE\s+FROM)\s+"?([A-Za-z_]+)"?', re.IGNORECASE)
_lock = threading.Lock()
_allowed = 0


@contextmanager
def changes_allowed() -> Iterator[None]:
    global _allowed
    with _lock:
        _allowed += 1
    try:
        yield
    finally:
        with _lock:
            _allowed -= 1


@event.listens_for(Engine, "before_cursor_execute")
def _refuse_changes(
    conn: Any, _cursor: Any, statement: str, _params: Any, _context: Any, _many: bool
) -> None:
    if _allowed:
        return
    found = _CHANGE.match(statement)
    if found and found.group(2).lower() in LOG_TABLES:
        purging = conn.info.get(PURGING, False)
        if purging and found.group(1).upper() != "UPDATE" and found.group(2).lower() in PURGEABLE:
            return
        raise AssertionError(
            f"{found.group(1).upper()} on the insert-only table {found.group(2)}: {statement[:200]}"
        )


def allow_migrations() -> None:
    """Migrations rewrite tables by design (migration 0060 moves the old rows into the log):
    every Alembic upgrade or downgrade of this process runs inside :func:`changes_allowed`."""
    from alembic import command

    for name in ("upgrade", "downgrade"):
        real = getattr(command, name)
        if getattr(real, "_changes_allowed", False):
            continue

        def wrapped(*args: Any, _real: Any = real, **kwargs: Any) -> Any:
            with changes_allowed():
                return _real(*args, **kwargs)

        wrapped._changes_allowed = True  # type: ignore[attr-defined]
        setattr(command, name, wrapped)
