"""The policy store: submit, approve (four-eyes), activate, roll back, shadow, history, diff.

These functions change the session and flush; they never commit (the caller — an HTTP request
or a CLI command — commits once at its end, so a lifecycle step and its event are one write).

Every change is attributed to a credential (:class:`~service.store.keys.Actor`: the API key's
id and name), and four-eyes compares credentials, not names: the key that submitted a version
cannot approve it. Versions and events are insert-only; what a change moves is the policy's
derived state row (``policy_state``: active version, shadow version, last event), updated in
the transaction that records the event.

Concurrency: every change first locks the policy's state row
(:func:`~service.store.policy_locks.lock_policy`) and then reads its versions and events
afresh, so two admins acting at once are served one after the other and the second sees what
the first did (two approvals of one draft: one succeeds, the other is a 409). Switches of the
active or shadow version also take the switch lock that orders them against scoring
(``service.store.switch_lock``).

Safe repeats: activate, rollback and shadow on/off require ``expected_current``, the version
the caller believes is active (the shadow version, for shadow on/off; ``None`` for "none").
When it is current, the change is made. When it is not, and the policy's last change of that
kind is exactly this request's change made from that version (an activation from the
expected version to the requested one, say), the request is a repeat: it is answered with
the same result and changes nothing. Otherwise it is stale: 409 ``current_changed`` with the
current state in the error's details. The event records the expectation the request carried.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from service.errors import Conflict, Forbidden, NotFound, Unprocessable
from service.policy.document import PolicyDocument, content_hash, document_json
from service.store import policies as repo
from service.store.keys import Actor
from service.store.models import (
    LifecycleAction,
    PolicyEvent,
    PolicyVersion,
    VersionStatus,
    utcnow,
)
from service.store.policies import ShadowView, VersionView
from service.store.policy_diff import Change, diff_documents
from service.store.policy_documents import check_auditable, parse_document
from service.store.policy_locks import Locked, flush_change, lock_policy, record_event, version_in
from service.store.stale_requests import current_changed


def require_version(session: Session, name: str, version: int) -> VersionView:
    view = repo.version_view(session, name, version)
    if view is None:
        if not repo.policy_exists(session, name):
            raise NotFound(f"no policy named {name!r}", code="unknown_policy")
        raise NotFound(f"policy {name!r} has no version {version}", code="unknown_version")
    return view


def check_submission(name: str, data: Any) -> PolicyDocument:
    """The checks a new draft of ``name`` must pass before it is stored (the API's and the
    console's submit): a valid document (422 ``invalid_policy`` with every error's field),
    naming the policy it is submitted to, that the audit can check."""
    document = parse_document(data)
    if document.name != name:
        raise Unprocessable(
            f"the document names policy {document.name!r} but was submitted to {name!r}",
            code="name_mismatch",
            field="name",
        )
    check_auditable(document)
    return document


def submit(session: Session, name: str, data: Any, author: Actor) -> VersionView:
    """Store a new draft version of policy ``name``, numbered after the last one."""
    document = check_submission(name, data)
    locked = lock_policy(session, name, switch=False, create=True)
    number = max(locked.versions, default=0) + 1
    row = PolicyVersion(
        name=name,
        version=number,
        document=document_json(document),
        content_hash=content_hash(document),
        author_key_id=author.key_id,
        author=author.name,
        created_at=utcnow(),
    )
    session.add(row)
    flush_change(session)
    record_event(session, locked.state, LifecycleAction.SUBMIT, author, to_version=number)
    flush_change(session)
    return VersionView(row, VersionStatus.DRAFT.value, None, None)


def _same_credential(row: PolicyVersion, actor: Actor) -> bool:
    if row.author_key_id is not None:
        return row.author_key_id == actor.key_id
    return row.author == actor.name  # a migrated version whose author named no key


def approve(session: Session, name: str, version: int, approver: Actor) -> VersionView:
    locked = lock_policy(session, name, switch=False)
    row = version_in(locked, name, version)
    status = locked.statuses[version]
    if status != VersionStatus.DRAFT.value:
        raise Conflict(
            f"{name} v{version} is {status}; only a draft can be approved",
            code="invalid_transition",
        )
    if _same_credential(row, approver):
        raise Forbidden(
            f"{name} v{version} was submitted with this key ({approver.name!r}); a different "
            "admin key must approve it (four-eyes rule)",
            code="four_eyes",
        )
    event = record_event(
        session, locked.state, LifecycleAction.APPROVE, approver, to_version=version
    )
    flush_change(session)
    return VersionView(row, VersionStatus.APPROVED.value, approver.name, event.at)


def _switch(
    session: Session,
    locked: Locked,
    target: int,
    actor: Actor,
    action: LifecycleAction,
    reason: str | None,
    expected: int | None,
) -> VersionView:
    """Make ``target`` the active version (the one active under the lock retires) and
    record it."""
    state = locked.state
    previous = state.active_version
    if state.shadow_version == target:
        # Shadowing the active version itself would only duplicate it.
        state.shadow_version = None
        record_event(session, state, LifecycleAction.UNSHADOW, actor, from_version=target)
    state.active_version = target
    record_event(
        session,
        state,
        action,
        actor,
        from_version=previous,
        to_version=target,
        reason=reason,
        expected=(expected,),
    )
    flush_change(session)
    return require_version(session, state.name, target)


def _repeats_switch(
    session: Session,
    name: str,
    action: LifecycleAction,
    expected: int | None,
    current: int | None,
    to_version: int | None,
) -> bool:
    """The policy's last switch is this very request's: ``action`` from ``expected`` to the
    version now active (which is ``to_version`` when one is named)."""
    if current is None or to_version not in (None, current):
        return False
    last = repo.last_switch(session, name)
    return (
        last is not None
        and last.action == action.value
        and last.from_version == expected
        and last.to_version == current
    )


def activate(
    session: Session,
    name: str,
    version: int,
    actor: Actor,
    reason: str | None = None,
    *,
    expected_current: int | None,
) -> VersionView:
    """Make an approved version the active one; the previously active version retires."""
    locked = lock_policy(session, name, switch=True)
    version_in(locked, name, version)
    current = locked.state.active_version
    if expected_current != current:
        action = LifecycleAction.ACTIVATE
        if _repeats_switch(session, name, action, expected_current, current, version):
            return require_version(session, name, version)
        raise current_changed(session, locked.state, expected_current, "active")
    status = locked.statuses[version]
    if status != VersionStatus.APPROVED.value:
        hint = " (use rollback to bring back a retired version)" if status == "retired" else ""
        raise Conflict(
            f"{name} v{version} is {status}; only an approved version can be activated{hint}",
            code="invalid_transition",
        )
    return _switch(
        session, locked, version, actor, LifecycleAction.ACTIVATE, reason, expected_current
    )


def rollback(
    session: Session,
    name: str,
    actor: Actor,
    reason: str,
    to_version: int | None = None,
    *,
    expected_current: int | None,
) -> VersionView:
    """Re-activate the previously active version, or the named approved/retired one."""
    if not reason or not reason.strip():
        raise Unprocessable("a rollback needs a reason", code="reason_required", field="reason")
    locked = lock_policy(session, name, switch=True)
    current = locked.state.active_version
    if expected_current != current:
        action = LifecycleAction.ROLLBACK
        if _repeats_switch(session, name, action, expected_current, current, to_version):
            assert current is not None  # a repeat leaves a version active
            return require_version(session, name, current)
        raise current_changed(session, locked.state, expected_current, "active")
    if current is None:
        raise Conflict(
            f"policy {name!r} has no active version to roll back", code="no_active_version"
        )
    if to_version is None:
        activation = repo.last_activation_of(session, name, current)
        if activation is None or activation.from_version is None:
            raise Conflict(
                f"{name} v{current} was the first active version; there is nothing "
                "to roll back to (name a version with to_version)",
                code="nothing_to_roll_back_to",
            )
        to_version = activation.from_version
    version_in(locked, name, to_version)
    if to_version == current:
        raise Conflict(f"{name} v{to_version} is already active", code="invalid_transition")
    status = locked.statuses[to_version]
    if status not in (VersionStatus.APPROVED.value, VersionStatus.RETIRED.value):
        raise Conflict(
            f"{name} v{to_version} is {status}; rollback needs an approved or retired version",
            code="invalid_transition",
        )
    return _switch(
        session,
        locked,
        to_version,
        actor,
        LifecycleAction.ROLLBACK,
        reason.strip(),
        expected_current,
    )


def set_shadow(
    session: Session, name: str, version: int, actor: Actor, *, expected_current: int | None
) -> ShadowView:
    """Evaluate an approved version beside the active one on every recommendation.

    ``expected_current`` is the shadow version the caller expects (``None``: none)."""
    locked = lock_policy(session, name, switch=True)
    version_in(locked, name, version)
    state = locked.state
    previous = state.shadow_version
    if expected_current != previous:
        last = repo.last_shadow_change(session, name)
        if (
            previous == version
            and last is not None
            and last.action == LifecycleAction.SHADOW.value
            and last.from_version == expected_current
            and last.to_version == version
        ):
            return ShadowView(name, version, last.actor, last.at)  # a repeat
        raise current_changed(session, state, expected_current, "shadow")
    if previous == version:
        raise Conflict(f"{name} v{version} is the shadow already", code="invalid_transition")
    status = locked.statuses[version]
    if status != VersionStatus.APPROVED.value:
        raise Conflict(
            f"{name} v{version} is {status}; only an approved (not active) version can "
            "be the shadow",
            code="invalid_transition",
        )
    state.shadow_version = version
    event = record_event(
        session,
        state,
        LifecycleAction.SHADOW,
        actor,
        from_version=previous,
        to_version=version,
        expected=(expected_current,),
    )
    flush_change(session)
    return ShadowView(name, version, actor.name, event.at)


def clear_shadow(
    session: Session, name: str, actor: Actor, *, expected_current: int | None
) -> None:
    """Stop shadow evaluation. ``expected_current``: the shadow version the caller ends."""
    locked = lock_policy(session, name, switch=True)
    state = locked.state
    previous = state.shadow_version
    if expected_current != previous:
        last = repo.last_shadow_change(session, name)
        if (
            previous is None
            and last is not None
            and last.action == LifecycleAction.UNSHADOW.value
            and last.from_version == expected_current
        ):
            return  # a repeat: that shadow has ended
        raise current_changed(session, state, expected_current, "shadow")
    if previous is None:
        raise NotFound(f"policy {name!r} has no shadow version", code="no_shadow")
    state.shadow_version = None
    record_event(
        session,
        state,
        LifecycleAction.UNSHADOW,
        actor,
        from_version=previous,
        expected=(expected_current,),
    )
    flush_change(session)


def history(session: Session, name: str) -> list[PolicyEvent]:
    rows = list(repo.events(session, name))
    if not rows:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    return rows


def diff(session: Session, name: str, from_version: int, to_version: int) -> list[Change]:
    a = require_version(session, name, from_version).row
    b = require_version(session, name, to_version).row
    return diff_documents(
        PolicyDocument.model_validate(a.document), PolicyDocument.model_validate(b.document)
    )
