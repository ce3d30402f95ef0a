"""The answer to a stale lifecycle request: 409 ``current_changed`` with the current state."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from service.errors import Conflict
from service.store import policies as repo
from service.store.models import PolicyState


def _version_text(version: int | None, role: str) -> str:
    return f"no version is {role}" if version is None else f"v{version} is {role}"


def current_changed(
    session: Session, state: PolicyState, expected: int | None, what: str
) -> Conflict:
    """409 for a stale request: what the caller expected, what is current, and the state."""
    name = state.name
    active, shadow = state.active_version, state.shadow_version
    current = active if what == "active" else shadow
    last = (
        repo.last_switch(session, name)
        if what == "active"
        else repo.last_shadow_change(session, name)
    )
    since = ""
    details: list[dict[str, Any]] = [
        {
            "code": "active_version",
            "message": _version_text(active, "active"),
            "field": "active_version",
            "value": active,
        },
        {
            "code": "shadow_version",
            "message": _version_text(shadow, "the shadow"),
            "field": "shadow_version",
            "value": shadow,
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
                    "actor_key_id": last.actor_key_id,
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
