"""The policy store: submit, approve (four-eyes), activate, roll back, shadow, history, diff.

These functions change the session and flush; they never commit (the caller — an HTTP request
or a CLI command — commits once at its end, so a lifecycle step and its event are one write).
"""

from __future__ import annotations

from typing import Any

from pydantic import ValidationError
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.errors import Conflict, Forbidden, NotFound, Unprocessable
from service.policy.document import PolicyDocument, content_hash, document_json
from service.store import policies as repo
from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyShadow,
    PolicyVersion,
    VersionStatus,
    utcnow,
)
from service.store.policy_diff import Change, diff_documents


def parse_document(data: Any) -> PolicyDocument:
    """Validate a policy document, turning pydantic errors into one 422 with details."""
    if isinstance(data, PolicyDocument):
        return data
    try:
        return PolicyDocument.model_validate(data)
    except ValidationError as exc:
        details = [
            {
                "code": str(e["type"]),
                "message": str(e["msg"]),
                "field": ".".join(str(p) for p in e["loc"]) or None,
            }
            for e in exc.errors()
        ]
        first = details[0]
        where = f"{first['field']}: " if first["field"] else ""
        raise Unprocessable(
            f"invalid policy document: {where}{first['message']}",
            code="invalid_policy",
            field=first["field"],
            details=details,
        ) from None


def _record(
    session: Session,
    name: str,
    action: LifecycleAction,
    actor: str,
    *,
    from_version: int | None = None,
    to_version: int | None = None,
    reason: str | None = None,
) -> PolicyEvent:
    event = PolicyEvent(
        name=name,
        action=action.value,
        actor=actor,
        at=utcnow(),
        from_version=from_version,
        to_version=to_version,
        reason=reason,
    )
    session.add(event)
    return event


def require_version(session: Session, name: str, version: int) -> PolicyVersion:
    row = repo.get_version(session, name, version)
    if row is None:
        if not repo.policy_exists(session, name):
            raise NotFound(f"no policy named {name!r}", code="unknown_policy")
        raise NotFound(f"policy {name!r} has no version {version}", code="unknown_version")
    return row


def _lock_policy(session: Session, name: str) -> list[PolicyVersion]:
    """Lock every version row of ``name`` (PostgreSQL) so lifecycle changes queue up."""
    rows = session.scalars(
        select(PolicyVersion).where(PolicyVersion.name == name).with_for_update()
    ).all()
    if not rows:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    return list(rows)


def _flush(session: Session) -> None:
    try:
        session.flush()
    except IntegrityError:
        raise Conflict(
            "another lifecycle change to this policy happened at the same time; retry",
            code="concurrent_change",
        ) from None


MAX_TOLERANCE = 0.5


def check_auditable(document: PolicyDocument) -> None:
    """A version that makes promises must say how far realized rates may stray: its audit
    tests every gap against that tolerance, so it must be positive (never 0 by omission)."""
    targets = document.targets
    if targets is None:
        return
    tolerance = targets.tolerance
    if tolerance is None or not 0 < tolerance <= MAX_TOLERANCE:
        raise Unprocessable(
            f"targets.tolerance is {tolerance}: a version with targets needs a tolerance "
            f"greater than 0 and at most {MAX_TOLERANCE} (the largest gap that keeps the "
            "promise; the audit tests every gap against it)",
            code="tolerance_required",
            field="targets.tolerance",
        )


def submit(session: Session, name: str, data: Any, author: str) -> PolicyVersion:
    """Store a new draft version of policy ``name``; its number is returned on the row."""
    document = parse_document(data)
    if document.name != name:
        raise Unprocessable(
            f"the document names policy {document.name!r} but was submitted to {name!r}",
            code="name_mismatch",
            field="name",
        )
    check_auditable(document)
    number = repo.latest_version_number(session, name) + 1
    row = PolicyVersion(
        name=name,
        version=number,
        document=document_json(document),
        content_hash=content_hash(document),
        status=VersionStatus.DRAFT.value,
        author=author,
        created_at=utcnow(),
    )
    session.add(row)
    _flush(session)
    _record(session, name, LifecycleAction.SUBMIT, author, to_version=number)
    _flush(session)
    return row


def approve(session: Session, name: str, version: int, approver: str) -> PolicyVersion:
    row = require_version(session, name, version)
    if row.status != VersionStatus.DRAFT.value:
        raise Conflict(
            f"{name} v{version} is {row.status}; only a draft can be approved",
            code="invalid_transition",
        )
    if row.author == approver:
        raise Forbidden(
            f"{name} v{version} was submitted by {approver!r}; a different admin key must "
            "approve it (four-eyes rule)",
            code="four_eyes",
        )
    row.status = VersionStatus.APPROVED.value
    row.approver = approver
    row.approved_at = utcnow()
    _record(session, name, LifecycleAction.APPROVE, approver, to_version=version)
    _flush(session)
    return row


def _switch(
    session: Session,
    name: str,
    target: PolicyVersion,
    actor: str,
    action: LifecycleAction,
    reason: str | None,
) -> PolicyVersion:
    current = next(
        (r for r in _lock_policy(session, name) if r.status == VersionStatus.ACTIVE.value), None
    )
    if current is not None:
        current.status = VersionStatus.RETIRED.value
        _flush(session)  # retire first: the one-active index would refuse two at once
    target.status = VersionStatus.ACTIVE.value
    _flush(session)
    shadow = repo.get_shadow(session, name)
    if shadow is not None and shadow.version == target.version:
        # Shadowing the active version itself would only duplicate it.
        session.delete(shadow)
        _record(session, name, LifecycleAction.UNSHADOW, actor, from_version=target.version)
    _record(
        session,
        name,
        action,
        actor,
        from_version=None if current is None else current.version,
        to_version=target.version,
        reason=reason,
    )
    _flush(session)
    return target


def activate(
    session: Session, name: str, version: int, actor: str, reason: str | None = None
) -> PolicyVersion:
    """Make an approved version the active one; the previously active version retires."""
    target = require_version(session, name, version)
    if target.status != VersionStatus.APPROVED.value:
        hint = (
            " (use rollback to bring back a retired version)" if target.status == "retired" else ""
        )
        raise Conflict(
            f"{name} v{version} is {target.status}; only an approved version can be "
            f"activated{hint}",
            code="invalid_transition",
        )
    return _switch(session, name, target, actor, LifecycleAction.ACTIVATE, reason)


def rollback(
    session: Session, name: str, actor: str, reason: str, to_version: int | None = None
) -> PolicyVersion:
    """Re-activate the previously active version, or the named approved/retired one."""
    if not reason or not reason.strip():
        raise Unprocessable("a rollback needs a reason", code="reason_required", field="reason")
    _lock_policy(session, name)
    current = repo.active_version(session, name)
    if current is None:
        raise Conflict(
            f"policy {name!r} has no active version to roll back", code="no_active_version"
        )
    if to_version is None:
        activation = repo.last_activation_of(session, name, current.version)
        if activation is None or activation.from_version is None:
            raise Conflict(
                f"{name} v{current.version} was the first active version; there is nothing "
                "to roll back to (name a version with to_version)",
                code="nothing_to_roll_back_to",
            )
        to_version = activation.from_version
    target = require_version(session, name, to_version)
    if target.version == current.version:
        raise Conflict(f"{name} v{to_version} is already active", code="invalid_transition")
    if target.status not in (VersionStatus.APPROVED.value, VersionStatus.RETIRED.value):
        raise Conflict(
            f"{name} v{to_version} is {target.status}; rollback needs an approved or retired "
            "version",
            code="invalid_transition",
        )
    return _switch(session, name, target, actor, LifecycleAction.ROLLBACK, reason.strip())


def set_shadow(session: Session, name: str, version: int, actor: str) -> PolicyShadow:
    """Evaluate an approved version beside the active one on every recommendation."""
    target = require_version(session, name, version)
    if target.status != VersionStatus.APPROVED.value:
        raise Conflict(
            f"{name} v{version} is {target.status}; only an approved (not active) version can "
            "be the shadow",
            code="invalid_transition",
        )
    shadow = repo.get_shadow(session, name)
    previous = None if shadow is None else shadow.version
    if shadow is None:
        shadow = PolicyShadow(
            name=name, version=version, designated_by=actor, designated_at=utcnow()
        )
        session.add(shadow)
    else:
        shadow.version = version
        shadow.designated_by = actor
        shadow.designated_at = utcnow()
    _record(session, name, LifecycleAction.SHADOW, actor, from_version=previous, to_version=version)
    _flush(session)
    return shadow


def clear_shadow(session: Session, name: str, actor: str) -> None:
    shadow = repo.get_shadow(session, name)
    if shadow is None:
        raise NotFound(f"policy {name!r} has no shadow version", code="no_shadow")
    _record(session, name, LifecycleAction.UNSHADOW, actor, from_version=shadow.version)
    session.delete(shadow)
    _flush(session)


def history(session: Session, name: str) -> list[PolicyEvent]:
    rows = list(repo.events(session, name))
    if not rows:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    return rows


def diff(session: Session, name: str, from_version: int, to_version: int) -> list[Change]:
    a = require_version(session, name, from_version)
    b = require_version(session, name, to_version)
    return diff_documents(
        PolicyDocument.model_validate(a.document), PolicyDocument.model_validate(b.document)
    )
