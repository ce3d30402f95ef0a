"""Request and response bodies of the policy routes."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from service.api.fields import OptionalReason, Reason, VersionNumber
from service.store.models import PolicyEvent, PolicyShadow, PolicyVersion


class _In(BaseModel):
    model_config = ConfigDict(extra="forbid")


_EXPECTED = (
    "the version you expect to be {what} now (null: none). A repeat of a request that was "
    "carried out is answered with the same result and changes nothing; a request whose "
    "expectation no longer holds is refused (409 current_changed). Absent: not checked."
)


class ActivateBody(_In):
    version: VersionNumber
    reason: OptionalReason | None = None
    expected_current: VersionNumber | None = Field(
        default=None, description=_EXPECTED.format(what="active")
    )


class RollbackBody(_In):
    to_version: VersionNumber | None = None
    reason: Reason = Field(description="why; kept in the history")
    expected_current: VersionNumber | None = Field(
        default=None, description=_EXPECTED.format(what="active")
    )


class ShadowBody(_In):
    version: VersionNumber
    expected_current: VersionNumber | None = Field(
        default=None, description=_EXPECTED.format(what="the shadow")
    )


class VersionSummary(BaseModel):
    name: str
    version: int
    status: str
    content_hash: str
    author: str
    approver: str | None
    created_at: datetime
    approved_at: datetime | None

    @classmethod
    def of(cls, row: PolicyVersion) -> VersionSummary:
        return cls(
            name=row.name,
            version=row.version,
            status=row.status,
            content_hash=row.content_hash,
            author=row.author,
            approver=row.approver,
            created_at=row.created_at,
            approved_at=row.approved_at,
        )


class VersionDetail(VersionSummary):
    document: dict[str, Any]

    @classmethod
    def of(cls, row: PolicyVersion) -> VersionDetail:
        return cls(**VersionSummary.of(row).model_dump(), document=row.document)


class PolicySummary(BaseModel):
    name: str
    latest_version: int
    active_version: int | None
    shadow_version: int | None


class EventOut(BaseModel):
    action: str
    actor: str
    at: datetime
    from_version: int | None
    to_version: int | None
    reason: str | None

    @classmethod
    def of(cls, row: PolicyEvent) -> EventOut:
        return cls(
            action=row.action,
            actor=row.actor,
            at=row.at,
            from_version=row.from_version,
            to_version=row.to_version,
            reason=row.reason,
        )


class ShadowOut(BaseModel):
    name: str
    version: int
    designated_by: str
    designated_at: datetime

    @classmethod
    def of(cls, row: PolicyShadow) -> ShadowOut:
        return cls(
            name=row.name,
            version=row.version,
            designated_by=row.designated_by,
            designated_at=row.designated_at,
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
