"""Request and response bodies of the policy routes."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from service.api.fields import OptionalReason, Reason, VersionNumber
from service.store.models import PolicyEvent
from service.store.policies import ShadowView, VersionView


class _In(BaseModel):
    model_config = ConfigDict(extra="forbid")


_EXPECTED = (
    "required: the version you expect to be {what} now (null: none). A repeat of a request "
    "that was carried out is answered with the same result and changes nothing; a request "
    "whose expectation no longer holds is refused (409 current_changed)."
)


class ActivateBody(_In):
    version: VersionNumber
    reason: OptionalReason | None = None
    expected_current: VersionNumber | None = Field(description=_EXPECTED.format(what="active"))


class RollbackBody(_In):
    to_version: VersionNumber | None = None
    reason: Reason = Field(description="why; kept in the history")
    expected_current: VersionNumber | None = Field(description=_EXPECTED.format(what="active"))


class ShadowBody(_In):
    version: VersionNumber
    expected_current: VersionNumber | None = Field(description=_EXPECTED.format(what="the shadow"))


class VersionSummary(BaseModel):
    name: str
    version: int
    status: str = Field(description="derived from the policy's events")
    content_hash: str
    author: str = Field(description="the name of the key that submitted it")
    approver: str | None = Field(description="the name of the key that approved it")
    created_at: datetime
    approved_at: datetime | None

    @classmethod
    def of(cls, view: VersionView) -> VersionSummary:
        row = view.row
        return cls(
            name=row.name,
            version=row.version,
            status=view.status,
            content_hash=row.content_hash,
            author=row.author,
            approver=view.approver,
            created_at=row.created_at,
            approved_at=view.approved_at,
        )


class VersionDetail(VersionSummary):
    document: dict[str, Any]

    @classmethod
    def of(cls, view: VersionView) -> VersionDetail:
        return cls(**VersionSummary.of(view).model_dump(), document=view.row.document)


class PolicySummary(BaseModel):
    name: str
    latest_version: int
    active_version: int | None
    shadow_version: int | None


class EventOut(BaseModel):
    action: str
    actor: str = Field(description="the name of the key that acted")
    actor_key_id: int | None = Field(
        description="the id of the key that acted (null only for events older than the "
        "identity of keys in histories)"
    )
    at: datetime
    from_version: int | None
    to_version: int | None
    reason: str | None
    expected_sent: bool = Field(description="whether the request carried expected_current")
    expected_current: int | None = Field(description="the expected_current it carried")

    @classmethod
    def of(cls, row: PolicyEvent) -> EventOut:
        return cls(
            action=row.action,
            actor=row.actor,
            actor_key_id=row.actor_key_id,
            at=row.at,
            from_version=row.from_version,
            to_version=row.to_version,
            reason=row.reason,
            expected_sent=row.expected_sent,
            expected_current=row.expected_current,
        )


class ShadowOut(BaseModel):
    name: str
    version: int
    designated_by: str | None = Field(description="the name of the key that designated it")
    designated_at: datetime | None

    @classmethod
    def of(cls, view: ShadowView) -> ShadowOut:
        return cls(
            name=view.name,
            version=view.version,
            designated_by=view.designated_by,
            designated_at=view.designated_at,
        )


class ChangeOut(BaseModel):
    section: str
    before: str | None
    after: str | None
    text: str


class DiffOut(BaseModel):
    name: str
    from_version: int
    to_version: int
    changes: list[ChangeOut]
    summary: str = Field(description="the changes as readable lines")
