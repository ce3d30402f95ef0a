"""The policy store: submit, approve (four-eyes), activate, roll back, shadow, history, diff.

These functions change the session and flush; they never commit (the caller — an HTTP request
or a CLI command — commits once at its end, so a lifecycle step and its event are one write).

Concurrency: every change first locks the policy (:func:`_lock_policy`) and then reads its
state afresh, so two admins acting at once are served one after the other and the second
sees what the first did (two approvals of one draft: one succeeds, the other is a 409).
Switches of the active or shadow version also take the switch lock that orders them against
scoring (``service.store.switch_lock``).

Safe repeats: activate, rollback and shadow on/off take ``expected_current``, the version the
caller believes is active (the shadow version, for shadow on/off; ``None`` for "none").
When it is current, the change is made. When it is not, and the policy's last change of that
kind is exactly this request's change made from that version (an activation from the
expected version to the requested one, say), the request is a repeat: it is answered with
the same result and changes nothing. Otherwise it is stale: 409 ``current_changed`` with the
current state in the error's details. Without ``expected_current`` nothing is checked (a
second rollback then rolls back again).
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
from service.store.expected import UNCHECKED, Expected, Unchecked
from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyShadow,
    PolicyVersion,
    VersionStatus,
    utcnow,
)
from service.store.policy_diff import Change, diff_documents
from service.store.switch_lock import hold_for_switch


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


def _lock_policy(
    session: Session, name: str, *, switch: bool, must_exist: bool = True
) -> dict[int, PolicyVersion]:
    """Serialise lifecycle changes of ``name``; its versions by number, read afresh.

    A switch of the active or shadow version first takes the switch lock exclusively (before
    any row lock: the lock order of ``service.store.switch_lock``). Then every version row of
    the policy is locked (PostgreSQL ``FOR NO KEY UPDATE``: changes of one policy queue up,
    while scoring's foreign-key checks, which take key-share locks, are not held up; SQLite
    holds its single write lock already) and read again, replacing whatever the session had
    loaded before: every check after this sees the latest committed state.
    """
    if switch:
        hold_for_switch(session)
    rows = session.scalars(
        select(PolicyVersion)
        .where(PolicyVersion.name == name)
        .order_by(PolicyVersion.version)
        .with_for_update(key_share=True)
        .execution_options(populate_existing=True)
    ).all()
    if not rows and must_exist:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    return {row.version: row for row in rows}


def _version_in(rows: dict[int, PolicyVersion], name: str, version: int) -> PolicyVersion:
    row = rows.get(version)
    if row is None:
        raise NotFound(f"policy {name!r} has no version {version}", code="unknown_version")
    return row


def _active_in(rows: dict[int, PolicyVersion]) -> PolicyVersion | None:
    return next((r for r in rows.values() if r.status == VersionStatus.ACTIVE.value), None)


def _version_text(version: int | None, role: str) -> str:
    return f"no version is {role}" if version is None else f"v{version} is {role}"


def _current_changed(
    session: Session, name: str, expected: int | None, what: str, current: int | None
) -> Conflict:
    """409 for a stale request: what the caller expected, what is current, and the state."""
    rows = {r.version: r for r in repo.list_versions(session, name)}
    active = _active_in(rows)
    shadow = repo.get_shadow(session, name)
    last = (
        repo.last_switch(session, name)
        if what == "active"
        else repo.last_shadow_change(session, name)
    )
    since = ""
    details: list[dict[str, Any]] = [
        {
            "code": "active_version",
            "message": _version_text(None if active is None else active.version, "active"),
            "field": "active_version",
            "value": None if active is None else active.version,
        },
        {
            "code": "shadow_version",
            "message": _version_text(None if shadow is None else shadow.version, "the shadow"),
            "field": "shadow_version",
            "value": None if shadow is None else shadow.version,
        },
    ]
    if last is not None:
        move = " -> ".join(
            "-" if v is None else f"v{v}" for v in (last.from_version, last.to_version)
        )
        change = f"{last.action} {move} by {last.actor} at {last.at.isoformat()}"
        since = f" (last change: {change})"
        details.append(
            {
                "code": "last_change",
                "message": change,
                "field": None,
                "value": {
                    "action": last.action,
                    "actor": last.actor,
                    "at": last.at.isoformat(),
                    "from_version": last.from_version,
                    "to_version": last.to_version,
                },
            }
        )
    expected_text = "none" if expected is None else f"v{expected}"
    current_text = "none" if current is None else f"v{current}"
    return Conflict(
        f"{name}: the request expected {expected_text} as the {what} version but "
        f"{current_text} is{since}; check the history and decide again",
        code="current_changed",
        field="expected_current",
        details=details,
    )


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
    """Store a new draft version of policy ``name``; its number is returned on the row.

    Two first submissions of a new policy at once: one gets 409 ``concurrent_change``
    (there are no rows to lock yet); later ones queue on the policy's rows."""
    document = parse_document(data)
    if document.name != name:
        raise Unprocessable(
            f"the document names policy {document.name!r} but was submitted to {name!r}",
            code="name_mismatch",
            field="name",
        )
    check_auditable(document)
    rows = _lock_policy(session, name, switch=False, must_exist=False)
    number = max(rows, default=0) + 1
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
    row = _version_in(_lock_policy(session, name, switch=False), name, version)
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
    current: PolicyVersion | None,
    target: PolicyVersion,
    actor: str,
    action: LifecycleAction,
    reason: str | None,
) -> PolicyVersion:
    """Retire ``current`` (the active version read under the policy lock), activate
    ``target`` and record it."""
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


def _repeats_switch(
    session: Session,
    name: str,
    action: LifecycleAction,
    expected: int | None,
    current: PolicyVersion | None,
    to_version: int | None,
) -> bool:
    """The policy's last switch is this very request's: ``action`` from ``expected`` to the
    version now active (which is ``to_version`` when one is named)."""
    if current is None or to_version not in (None, current.version):
        return False
    last = repo.last_switch(session, name)
    return (
        last is not None
        and last.action == action.value
        and last.from_version == expected
        and last.to_version == current.version
    )


def activate(
    session: Session,
    name: str,
    version: int,
    actor: str,
    reason: str | None = None,
    expected_current: Expected = UNCHECKED,
) -> PolicyVersion:
    """Make an approved version the active one; the previously active version retires."""
    rows = _lock_policy(session, name, switch=True)
    target = _version_in(rows, name, version)
    current = _active_in(rows)
    current_version = None if current is None else current.version
    if not isinstance(expected_current, Unchecked) and expected_current != current_version:
        action = LifecycleAction.ACTIVATE
        if _repeats_switch(session, name, action, expected_current, current, version):
            return target
        raise _current_changed(session, name, expected_current, "active", current_version)
    if target.status != VersionStatus.APPROVED.value:
        hint = (
            " (use rollback to bring back a retired version)" if target.status == "retired" else ""
        )
        raise Conflict(
            f"{name} v{version} is {target.status}; only an approved version can be "
            f"activated{hint}",
            code="invalid_transition",
        )
    return _switch(session, name, current, target, actor, LifecycleAction.ACTIVATE, reason)


def rollback(
    session: Session,
    name: str,
    actor: str,
    reason: str,
    to_version: int | None = None,
    expected_current: Expected = UNCHECKED,
) -> PolicyVersion:
    """Re-activate the previously active version, or the named approved/retired one."""
    if not reason or not reason.strip():
        raise Unprocessable("a rollback needs a reason", code="reason_required", field="reason")
    rows = _lock_policy(session, name, switch=True)
    current = _active_in(rows)
    current_version = None if current is None else current.version
    if not isinstance(expected_current, Unchecked) and expected_current != current_version:
        action = LifecycleAction.ROLLBACK
        if _repeats_switch(session, name, action, expected_current, current, to_version):
            assert current is not None  # a repeat leaves a version active
            return current
        raise _current_changed(session, name, expected_current, "active", current_version)
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
    target = _version_in(rows, name, to_version)
    if target.version == current.version:
        raise Conflict(f"{name} v{to_version} is already active", code="invalid_transition")
    if target.status not in (VersionStatus.APPROVED.value, VersionStatus.RETIRED.value):
        raise Conflict(
            f"{name} v{to_version} is {target.status}; rollback needs an approved or retired "
            "version",
            code="invalid_transition",
        )
    return _switch(session, name, current, target, actor, LifecycleAction.ROLLBACK, reason.strip())


def set_shadow(
    session: Session,
    name: str,
    version: int,
    actor: str,
    expected_current: Expected = UNCHECKED,
) -> PolicyShadow:
    """Evaluate an approved version beside the active one on every recommendation.

    ``expected_current`` is the shadow version the caller expects (``None``: none)."""
    rows = _lock_policy(session, name, switch=True)
    target = _version_in(rows, name, version)
    shadow = repo.get_shadow(session, name)
    previous = None if shadow is None else shadow.version
    if not isinstance(expected_current, Unchecked) and expected_current != previous:
        last = repo.last_shadow_change(session, name)
        if (
            shadow is not None
            and previous == version
            and last is not None
            and last.action == LifecycleAction.SHADOW.value
            and last.from_version == expected_current
            and last.to_version == version
        ):
            return shadow  # a repeat: designated by this very request
        raise _current_changed(session, name, expected_current, "shadow", previous)
    if previous == version:
        raise Conflict(f"{name} v{version} is the shadow already", code="invalid_transition")
    if target.status != VersionStatus.APPROVED.value:
        raise Conflict(
            f"{name} v{version} is {target.status}; only an approved (not active) version can "
            "be the shadow",
            code="invalid_transition",
        )
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


def clear_shadow(
    session: Session, name: str, actor: str, expected_current: Expected = UNCHECKED
) -> None:
    """Stop shadow evaluation. ``expected_current``: the shadow version the caller ends."""
    _lock_policy(session, name, switch=True)
    shadow = repo.get_shadow(session, name)
    previous = None if shadow is None else shadow.version
    if not isinstance(expected_current, Unchecked) and expected_current != previous:
        last = repo.last_shadow_change(session, name)
        if (
            shadow is None
            and last is not None
            and last.action == LifecycleAction.UNSHADOW.value
            and last.from_version == expected_current
        ):
            return  # a repeat: that shadow has ended
        raise _current_changed(session, name, expected_current, "shadow", previous)
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
