"""The policy store: submit, approve (four-eyes), activate, roll back, shadow, history, diff.

These functions change the session and flush; they never commit (the caller — an HTTP request
or a CLI command — commits once at its end, so a lifecycle step and its event are one write).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pydantic import ValidationError
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.errors import Conflict, Forbidden, NotFound, Unprocessable
from service.policy.document import (
    PolicyDocument,
    content_hash,
    document_json,
    resolve_rule_key,
)
from service.store import policies as repo
from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyShadow,
    PolicyVersion,
    VersionStatus,
    utcnow,
)


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


def submit(session: Session, name: str, data: Any, author: str) -> PolicyVersion:
    """Store a new draft version of policy ``name``; its number is returned on the row."""
    document = parse_document(data)
    if document.name != name:
        raise Unprocessable(
            f"the document names policy {document.name!r} but was submitted to {name!r}",
            code="name_mismatch",
            field="name",
        )
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
    current = next((r for r in _lock_policy(session, name) if r.status == "active"), None)
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


# -- diff ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class Change:
    """One difference between two versions, in words a reviewer can read."""

    section: str
    before: str | None
    after: str | None
    text: str


def _q(value: Any) -> str:
    return repr(value) if isinstance(value, str) else str(value)


def diff_documents(a: PolicyDocument, b: PolicyDocument) -> list[Change]:
    changes: list[Change] = []

    def field(section: str, before: Any, after: Any, label: str) -> None:
        if before != after:
            changes.append(
                Change(
                    section,
                    _q(before),
                    _q(after),
                    f"{label} changed from {_q(before)} to {_q(after)}",
                )
            )

    field("description", a.description, b.description, "description")
    field("score_meaning", a.score_meaning, b.score_meaning, "score meaning")
    field("score_range", list(a.score_range), list(b.score_range), "score range")
    field("action_label", a.action_label, b.action_label, "action label")
    field("no_action_label", a.no_action_label, b.no_action_label, "no-action label")
    field("favourable", a.favourable, b.favourable, "favourable outcome")
    field(
        "outcome_observed_after",
        a.outcome_observed_after,
        b.outcome_observed_after,
        "outcomes observed after",
    )
    field(
        "costs.false_positive",
        a.costs.false_positive,
        b.costs.false_positive,
        "cost of a false positive",
    )
    field(
        "costs.false_negative",
        a.costs.false_negative,
        b.costs.false_negative,
        "cost of a false negative",
    )
    field("groups.attributes", a.groups.attributes, b.groups.attributes, "group attributes")

    known_a, known_b = set(a.groups.known), set(b.groups.known)
    for g in sorted(known_b - known_a):
        changes.append(Change(f"groups.known[{g!r}]", None, g, f"group {g!r} added"))
    for g in sorted(known_a - known_b):
        changes.append(Change(f"groups.known[{g!r}]", g, None, f"group {g!r} removed"))

    fa, fb = a.groups.fallback, b.groups.fallback
    field(
        "groups.fallback.use_parent", fa.use_parent, fb.use_parent, "fallback to the parent group"
    )
    field("groups.fallback.unknown_groups", fa.unknown_groups, fb.unknown_groups, "unknown groups")
    da = None if fa.default is None else fa.default.describe()
    db = None if fb.default is None else fb.default.describe()
    if da != db:
        changes.append(
            Change(
                "groups.fallback.default",
                da,
                db,
                _rule_change_text("the fallback default rule", da, db),
            )
        )

    for key in sorted(set(a.rules) | set(b.rules)):
        ra = a.rules[key].describe() if key in a.rules else None
        rb = b.rules[key].describe() if key in b.rules else None
        if ra != rb:
            changes.append(
                Change(f"rules[{key!r}]", ra, rb, _rule_change_text(f"rule for {key!r}", ra, rb))
            )

    # A group can change rule without its own rule changing (a fallback or parent rule moved).
    for g in sorted(known_a & known_b):
        ka, kb = resolve_rule_key(a, g), resolve_rule_key(b, g)
        if ka != kb:
            changes.append(
                Change(
                    f"groups.known[{g!r}]",
                    str(ka),
                    str(kb),
                    f"group {g!r} now uses rule {kb!r} instead of {ka!r}",
                )
            )

    ta = None if a.targets is None else a.targets.criterion.value
    tb = None if b.targets is None else b.targets.criterion.value
    field("targets.criterion", ta, tb, "criterion")
    tola = None if a.targets is None else a.targets.tolerance
    tolb = None if b.targets is None else b.targets.tolerance
    field("targets.tolerance", tola, tolb, "tolerance")
    return changes


def _rule_change_text(what: str, before: str | None, after: str | None) -> str:
    if before is None:
        return f"{what} added: {after}"
    if after is None:
        return f"{what} removed (was: {before})"
    return f"{what} changed: was {before}; now {after}"


def diff(session: Session, name: str, from_version: int, to_version: int) -> list[Change]:
    a = require_version(session, name, from_version)
    b = require_version(session, name, to_version)
    return diff_documents(
        PolicyDocument.model_validate(a.document), PolicyDocument.model_validate(b.document)
    )
