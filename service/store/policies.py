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


def active_and_shadow(session: Session, name: str) -> tuple[int, int | None] | None:
    """(active version, shadow version or None) in one indexed query; None if no active."""
    row = session.execute(
        select(PolicyVersion.version, PolicyShadow.version)
        .outerjoin(PolicyShadow, PolicyShadow.name == PolicyVersion.name)
        .where(PolicyVersion.name == name, PolicyVersion.status == VersionStatus.ACTIVE.value)
    ).first()
    if row is None:
        return None
    return int(row[0]), (None if row[1] is None else int(row[1]))


def policy_exists(session: Session, name: str) -> bool:
    return (
        session.scalar(select(PolicyVersion.id).where(PolicyVersion.name == name).limit(1))
        is not None
    )


def get_shadow(session: Session, name: str) -> PolicyShadow | None:
    return session.get(PolicyShadow, name)


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
