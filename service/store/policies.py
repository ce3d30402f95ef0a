"""Queries on policy versions, lifecycle events and shadow designations (no commits)."""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyShadow,
    PolicyVersion,
    VersionStatus,
)


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


def active_version(session: Session, name: str) -> PolicyVersion | None:
    return session.scalar(
        select(PolicyVersion).where(
            PolicyVersion.name == name, PolicyVersion.status == VersionStatus.ACTIVE.value
        )
    )


def policy_exists(session: Session, name: str) -> bool:
    return (
        session.scalar(select(PolicyVersion.id).where(PolicyVersion.name == name).limit(1))
        is not None
    )


def get_shadow(session: Session, name: str) -> PolicyShadow | None:
    # Always read from the database: lifecycle changes check it after taking their lock.
    return session.get(PolicyShadow, name, populate_existing=True)


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
