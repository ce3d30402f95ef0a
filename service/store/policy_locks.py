"""Serialising lifecycle changes of one policy: its lock, what is read under it, and the
event every change records (used by :mod:`service.store.lifecycle`).

A change first locks the policy's state row (:func:`lock_policy`) and then reads its
versions and events afresh; a switch of the active or shadow version takes the switch lock
before (``service.store.switch_lock``). :func:`record_event` inserts the change's event and
makes it the state's last.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.dialects.postgresql import insert as postgresql_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.errors import Conflict, NotFound
from service.store import policies as repo
from service.store.keys import Actor
from service.store.models import LifecycleAction, PolicyEvent, PolicyState, PolicyVersion, utcnow
from service.store.switch_lock import hold_for_switch


@dataclass(frozen=True, slots=True)
class Locked:
    """A policy as read under its lock: the state row (changed in place by switches) and its
    versions with their derived statuses."""

    state: PolicyState
    versions: dict[int, PolicyVersion]
    statuses: dict[int, str]


def record_event(
    session: Session,
    state: PolicyState,
    action: LifecycleAction,
    actor: Actor,
    *,
    from_version: int | None = None,
    to_version: int | None = None,
    reason: str | None = None,
    expected: tuple[int | None] | None = None,
) -> PolicyEvent:
    """Insert one event and make it the state's last; ``expected``: the request's
    ``expected_current`` as a 1-tuple, or None when the request carried none."""
    event = PolicyEvent(
        name=state.name,
        action=action.value,
        actor_key_id=actor.key_id,
        actor=actor.name,
        at=utcnow(),
        from_version=from_version,
        to_version=to_version,
        reason=reason,
        expected_sent=expected is not None,
        expected_current=None if expected is None else expected[0],
    )
    session.add(event)
    flush_change(session)
    state.last_event_id = event.id
    return event


def _create_state(session: Session, name: str) -> None:
    """The policy's state row, if it has none yet (a first submission); two first
    submissions at once both end up queued on the one row."""
    conn = session.connection()
    insert = postgresql_insert if conn.dialect.name == "postgresql" else sqlite_insert
    conn.execute(insert(PolicyState).values(name=name).on_conflict_do_nothing())


def lock_policy(session: Session, name: str, *, switch: bool, create: bool = False) -> Locked:
    """Serialise lifecycle changes of ``name``; its state, versions and statuses, read afresh.

    A switch of the active or shadow version first takes the switch lock exclusively (before
    any row lock: the lock order of ``service.store.switch_lock``). Then the policy's state
    row is locked (PostgreSQL ``FOR NO KEY UPDATE``: changes of one policy queue up; SQLite
    holds its single write lock already) and everything is read again, replacing whatever
    the session had loaded before: every check after this sees the latest committed state.
    """
    if switch:
        hold_for_switch(session)
    if create:
        _create_state(session, name)
    state = session.scalar(
        select(PolicyState)
        .where(PolicyState.name == name)
        .with_for_update(key_share=True)
        .execution_options(populate_existing=True)
    )
    if state is None:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    rows = repo.list_versions(session, name)
    views = repo.views_of(session, name, rows, state.active_version)
    return Locked(state, {r.version: r for r in rows}, {v.row.version: v.status for v in views})


def version_in(locked: Locked, name: str, version: int) -> PolicyVersion:
    row = locked.versions.get(version)
    if row is None:
        raise NotFound(f"policy {name!r} has no version {version}", code="unknown_version")
    return row


def flush_change(session: Session) -> None:
    try:
        session.flush()
    except IntegrityError:
        raise Conflict(
            "another lifecycle change to this policy happened at the same time; retry",
            code="concurrent_change",
        ) from None
