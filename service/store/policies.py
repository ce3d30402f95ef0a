"""Queries on policy versions, lifecycle events and the derived policy state (no commits).

A version's status is not stored: it follows from the policy's events and its state row.
``active`` is the state's active version; ``retired`` a version that was active once (the
target or the origin of an activation or a rollback, or named by a migrated ``retire``
event) and is not now; ``approved`` a version with an approval and never active; ``draft``
the rest.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyState,
    PolicyVersion,
    VersionStatus,
)


@dataclass(frozen=True, slots=True)
class VersionView:
    """A stored version with what its events say about it."""

    row: PolicyVersion
    status: str
    approver: str | None
    approved_at: datetime | None


@dataclass(frozen=True, slots=True)
class ShadowView:
    """The shadow designation of a policy: the version and the event that designated it."""

    name: str
    version: int
    designated_by: str | None  # None only for a designation no event records
    designated_at: datetime | None


def get_version(session: Session, name: str, version: int) -> PolicyVersion | None:
    return session.scalar(
        select(PolicyVersion).where(PolicyVersion.name == name, PolicyVersion.version == version)
    )


def list_versions(session: Session, name: str) -> Sequence[PolicyVersion]:
    return session.scalars(
        select(PolicyVersion).where(PolicyVersion.name == name).order_by(PolicyVersion.version)
    ).all()


def policy_names(session: Session) -> Sequence[str]:
    return session.scalars(select(PolicyVersion.name).distinct().order_by(PolicyVersion.name)).all()


def latest_version_number(session: Session, name: str) -> int:
    value = session.scalar(
        select(func.max(PolicyVersion.version)).where(PolicyVersion.name == name)
    )
    return int(value or 0)


def policy_exists(session: Session, name: str) -> bool:
    return (
        session.scalar(select(PolicyVersion.id).where(PolicyVersion.name == name).limit(1))
        is not None
    )


def get_state(session: Session, name: str) -> PolicyState | None:
    # Always read from the database: lifecycle changes check it after taking their lock.
    return session.get(PolicyState, name, populate_existing=True)


def active_version_number(session: Session, name: str) -> int | None:
    state = get_state(session, name)
    return None if state is None else state.active_version


_STATUS_ACTIONS = [
    LifecycleAction.APPROVE.value,
    LifecycleAction.ACTIVATE.value,
    LifecycleAction.ROLLBACK.value,
    LifecycleAction.RETIRE.value,
]


def derive_statuses(
    numbers: Iterable[int], events: Iterable[PolicyEvent], active: int | None
) -> dict[int, tuple[str, str | None, datetime | None]]:
    """(status, approver, approval time) of each version number, from the policy's events
    (oldest first) and its active version."""
    approvals: dict[int, tuple[str, datetime]] = {}
    was_active: set[int] = set()
    for e in events:
        if e.action == LifecycleAction.APPROVE.value and e.to_version is not None:
            approvals[e.to_version] = (e.actor, e.at)
        elif e.action in (LifecycleAction.ACTIVATE.value, LifecycleAction.ROLLBACK.value):
            was_active.update(v for v in (e.from_version, e.to_version) if v is not None)
        elif e.action == LifecycleAction.RETIRE.value and e.from_version is not None:
            was_active.add(e.from_version)
    out: dict[int, tuple[str, str | None, datetime | None]] = {}
    for n in numbers:
        if n == active:
            status = VersionStatus.ACTIVE
        elif n in was_active:
            status = VersionStatus.RETIRED
        elif n in approvals:
            status = VersionStatus.APPROVED
        else:
            status = VersionStatus.DRAFT
        approver, at = approvals.get(n, (None, None))
        out[n] = (status.value, approver, at)
    return out


def status_events(session: Session, name: str) -> Sequence[PolicyEvent]:
    """The events a status follows from, oldest first."""
    return session.scalars(
        select(PolicyEvent)
        .where(PolicyEvent.name == name, PolicyEvent.action.in_(_STATUS_ACTIONS))
        .order_by(PolicyEvent.id)
    ).all()


def views_of(
    session: Session, name: str, rows: Sequence[PolicyVersion], active: int | None
) -> list[VersionView]:
    derived = derive_statuses((r.version for r in rows), status_events(session, name), active)
    return [VersionView(r, *derived[r.version]) for r in rows]


def version_views(session: Session, name: str) -> list[VersionView]:
    """Every version of ``name`` with its status, oldest first (empty: no such policy)."""
    rows = list_versions(session, name)
    return views_of(session, name, rows, active_version_number(session, name)) if rows else []


def version_view(session: Session, name: str, version: int) -> VersionView | None:
    row = get_version(session, name, version)
    if row is None:
        return None
    return views_of(session, name, [row], active_version_number(session, name))[0]


def shadow_view(session: Session, name: str) -> ShadowView | None:
    state = get_state(session, name)
    if state is None or state.shadow_version is None:
        return None
    event = session.scalar(
        select(PolicyEvent)
        .where(
            PolicyEvent.name == name,
            PolicyEvent.action == LifecycleAction.SHADOW.value,
            PolicyEvent.to_version == state.shadow_version,
        )
        .order_by(PolicyEvent.id.desc())
        .limit(1)
    )
    if event is None:  # written outside the service: no event tells who designated it
        return ShadowView(name, state.shadow_version, None, None)
    return ShadowView(name, state.shadow_version, event.actor, event.at)


def events(session: Session, name: str) -> Sequence[PolicyEvent]:
    return session.scalars(
        select(PolicyEvent).where(PolicyEvent.name == name).order_by(PolicyEvent.id)
    ).all()


def last_activation_of(session: Session, name: str, version: int) -> PolicyEvent | None:
    """The most recent event that made ``version`` the active one."""
    return session.scalar(
        select(PolicyEvent)
        .where(
            PolicyEvent.name == name,
            PolicyEvent.to_version == version,
            PolicyEvent.action.in_(
                [LifecycleAction.ACTIVATE.value, LifecycleAction.ROLLBACK.value]
            ),
        )
        .order_by(PolicyEvent.id.desc())
        .limit(1)
    )


_SWITCHES = [LifecycleAction.ACTIVATE.value, LifecycleAction.ROLLBACK.value]
_SHADOW_CHANGES = [LifecycleAction.SHADOW.value, LifecycleAction.UNSHADOW.value]


def last_switch(session: Session, name: str) -> PolicyEvent | None:
    """The policy's most recent activation or rollback."""
    return _last_event(session, name, _SWITCHES)


def last_shadow_change(session: Session, name: str) -> PolicyEvent | None:
    """The policy's most recent shadow designation or end of one."""
    return _last_event(session, name, _SHADOW_CHANGES)


def _last_event(session: Session, name: str, actions: list[str]) -> PolicyEvent | None:
    return session.scalar(
        select(PolicyEvent)
        .where(PolicyEvent.name == name, PolicyEvent.action.in_(actions))
        .order_by(PolicyEvent.id.desc())
        .limit(1)
    )
