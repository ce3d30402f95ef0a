"""What the console's lifecycle actions change, said before they are made, and how they are
made: the same store functions as the API (``service.store.lifecycle``), attributed to the
signed-in key, with the same expected-current-version guard and four-eyes rule."""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime

from fastapi import Response
from sqlalchemy.orm import Session

from service.audit.render_csv import to_csv
from service.audit.render_html import to_html
from service.audit.snapshot_model import Snapshot
from service.console.web import Form
from service.errors import Conflict, NotFound, Unprocessable
from service.store import lifecycle
from service.store import policies as repo
from service.store.keys import Actor
from service.store.models import PolicyEvent, PolicyState
from service.store.policies import VersionView

ACTIONS = ("approve", "activate", "rollback", "shadow-on", "shadow-off")


def _v(version: int | None) -> str:
    return "none" if version is None else f"v{version}"


@dataclass(frozen=True, slots=True)
class VersionRow:
    version: int
    status: str
    author: str
    created_at: datetime
    approver: str | None
    actions: list[str]


@dataclass(frozen=True, slots=True)
class EventRow:
    at: datetime
    actor: str
    action: str
    change: str
    reason: str | None


@dataclass(frozen=True, slots=True)
class Overview:
    name: str
    active: int | None
    shadow: int | None
    versions: list[VersionRow]
    events: list[EventRow]
    can_roll_back: bool


def _version_actions(view: VersionView, active: int | None, shadow: int | None) -> list[str]:
    if view.status == "draft":
        return ["approve"]
    if view.status == "approved":
        out = ["activate"]
        if view.row.version != shadow:
            out.append("shadow-on")
        return out
    return []


def policy_overview(
    name: str,
    views: Sequence[VersionView],
    state: PolicyState | None,
    events: Sequence[PolicyEvent],
) -> Overview:
    active = None if state is None else state.active_version
    shadow = None if state is None else state.shadow_version
    return Overview(
        name=name,
        active=active,
        shadow=shadow,
        versions=[
            VersionRow(
                v.row.version,
                v.status,
                v.row.author,
                v.row.created_at,
                v.approver,
                _version_actions(v, active, shadow),
            )
            for v in reversed(views)
        ],
        events=[
            EventRow(
                e.at,
                e.actor,
                e.action,
                f"{_v(e.from_version)} → {_v(e.to_version)}"
                if e.from_version is not None
                else _v(e.to_version),
                e.reason,
            )
            for e in reversed(events)
        ],
        can_roll_back=active is not None,
    )


@dataclass(frozen=True, slots=True)
class Plan:
    """A confirmation page: what the action will change, and the fields it posts."""

    name: str
    action: str
    title: str
    changes: list[str]
    guard: str | None  # the expected-current-version guard, in words
    version: int | None = None
    expected_current: int | None = None
    to_version: int | None = None
    reason: str = "none"  # "none", "optional" or "required"
    fields: dict[str, str] = field(default_factory=dict)


def _need_version(version: int | None) -> int:
    if version is None:
        raise Unprocessable("this action needs ?version=N", field="version")
    return version


def plan(session: Session, name: str, action: str, version: int | None) -> Plan:
    """What ``action`` would change now (read in ``session``); refuses an impossible one."""
    if action not in ACTIONS:
        raise NotFound(f"no console action {action!r}")
    views = repo.version_views(session, name)
    if not views:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    state = repo.get_state(session, name)
    active = None if state is None else state.active_version
    shadow = None if state is None else state.shadow_version
    if action == "approve":
        v = lifecycle.require_version(session, name, _need_version(version))
        return Plan(
            name,
            action,
            f"Approve {name} v{v.row.version}",
            [
                f"{name} v{v.row.version} ({v.status}, submitted by {v.row.author}) becomes "
                "approved, attributed to your key.",
                "Nothing changes for scoring: the active version stays "
                f"{_v(active)}. A key other than the author's must approve (four-eyes).",
            ],
            None,
            version=v.row.version,
        )
    if action == "activate":
        v = lifecycle.require_version(session, name, _need_version(version))
        return Plan(
            name,
            action,
            f"Activate {name} v{v.row.version}",
            [
                f"{name} v{v.row.version} becomes the active version: every recommendation "
                "from then on uses it.",
                f"The active version now is {_v(active)}"
                + ("; it retires." if active is not None else "."),
            ],
            f"expected current active version: {_v(active)}",
            version=v.row.version,
            expected_current=active,
            reason="optional",
        )
    if action == "rollback":
        if active is None:
            raise Conflict(f"policy {name!r} has no active version to roll back")
        target = version
        if target is None:
            activation = repo.last_activation_of(session, name, active)
            target = None if activation is None else activation.from_version
        if target is None:
            raise Conflict(
                f"{name} v{active} was the first active version; there is nothing to roll back to",
                code="nothing_to_roll_back_to",
            )
        return Plan(
            name,
            action,
            f"Roll back {name} to v{target}",
            [
                f"{name} v{target} becomes the active version again; v{active} retires.",
                "A rollback needs a reason: it is recorded in the history.",
            ],
            f"expected current active version: {_v(active)}",
            expected_current=active,
            to_version=target,
            reason="required",
        )
    if action == "shadow-on":
        v = lifecycle.require_version(session, name, _need_version(version))
        return Plan(
            name,
            action,
            f"Shadow {name} v{v.row.version}",
            [
                f"{name} v{v.row.version} is evaluated beside the active version on every "
                "recommendation; its results are recorded, never returned.",
                f"The shadow version now is {_v(shadow)}"
                + ("; it stops." if shadow is not None else "."),
            ],
            f"expected current shadow version: {_v(shadow)}",
            version=v.row.version,
            expected_current=shadow,
        )
    # shadow-off
    if shadow is None:
        raise NotFound(f"policy {name!r} has no shadow version", code="no_shadow")
    return Plan(
        name,
        action,
        f"End the shadow of {name}",
        [f"{name} v{shadow} stops being evaluated beside the active version."],
        f"expected current shadow version: {_v(shadow)}",
        expected_current=shadow,
    )


def perform(session: Session, name: str, action: str, form: Form, actor: Actor) -> None:
    """Make the change the confirmation page described (no commit: the caller commits)."""
    if action not in ACTIONS:
        raise NotFound(f"no console action {action!r}")
    expected = form.optional_int("expected_current")
    reason = form.get("reason") or None
    if action == "approve":
        lifecycle.approve(session, name, _need_version(form.optional_int("version")), actor)
    elif action == "activate":
        lifecycle.activate(
            session,
            name,
            _need_version(form.optional_int("version")),
            actor,
            reason,
            expected_current=expected,
        )
    elif action == "rollback":
        lifecycle.rollback(
            session,
            name,
            actor,
            reason or "",
            form.optional_int("to_version"),
            expected_current=expected,
        )
    elif action == "shadow-on":
        lifecycle.set_shadow(
            session,
            name,
            _need_version(form.optional_int("version")),
            actor,
            expected_current=expected,
        )
    else:
        lifecycle.clear_shadow(session, name, actor, expected_current=expected)


def report_response(
    content: Snapshot, name: str, month: str, kind: str, html_policy: str
) -> Response:
    """A stored report as a file. The HTML report carries its own inline stylesheet and
    charts, so it is served with its own Content-Security-Policy (inline style, no script,
    sandboxed) instead of the console's."""
    headers = {"X-Evenhand-Digest": content.digest}
    if kind == "report.csv":
        headers["Content-Disposition"] = f'attachment; filename="{name}-{month}.csv"'
        return Response(to_csv(content), media_type="text/csv", headers=headers)
    if kind == "report.html":
        headers["Content-Security-Policy"] = html_policy
        return Response(to_html(content), media_type="text/html", headers=headers)
    text = json.dumps(content.content(), indent=2, sort_keys=True, ensure_ascii=False)
    return Response(text, media_type="application/json", headers=headers)
