"""Database tables, as typed SQLAlchemy models.

Constraint names follow one convention so migrations are stable across databases. Policy
versions never change once written (the document and its content hash are set on insert);
only their lifecycle status and approval fields move. Recommendations are the decision log:
append-only, each carrying the hash of its canonical encoding (``service.store.records``) and,
once sealed, the seal it belongs to.
"""

from __future__ import annotations

from datetime import UTC, datetime
from enum import StrEnum
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    CheckConstraint,
    DateTime,
    Dialect,
    Double,
    ForeignKey,
    ForeignKeyConstraint,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
    text,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

NAMING_CONVENTION = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_N_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class UTCDateTime(TypeDecorator[datetime]):
    """Timezone-aware UTC datetimes on every database (SQLite stores them naive)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime: pass an aware datetime (UTC)")
        value = value.astimezone(UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


# A 64-bit id that is still SQLite's rowid alias (only INTEGER PRIMARY KEY is).
BigId = BigInteger().with_variant(Integer, "sqlite")


def utcnow() -> datetime:
    return datetime.now(UTC)


class Role(StrEnum):
    SCORING = "scoring"
    AUDIT = "audit"
    ADMIN = "admin"


class VersionStatus(StrEnum):
    DRAFT = "draft"
    APPROVED = "approved"
    ACTIVE = "active"
    RETIRED = "retired"


class LifecycleAction(StrEnum):
    SUBMIT = "submit"
    APPROVE = "approve"
    ACTIVATE = "activate"
    ROLLBACK = "rollback"
    RETIRE = "retire"
    SHADOW = "shadow"
    UNSHADOW = "unshadow"


def _in(column: str, values: type[StrEnum]) -> str:
    return f"{column} IN (" + ", ".join(f"'{v.value}'" for v in values) + ")"


class ApiKey(Base):
    __tablename__ = "api_keys"
    __table_args__ = (CheckConstraint(_in("role", Role), name="role"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    # SHA-256 hex of the token; the token itself is shown once and never stored.
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime, default=None)


class PolicyVersion(Base):
    __tablename__ = "policy_versions"
    __table_args__ = (
        UniqueConstraint("name", "version"),
        CheckConstraint(_in("status", VersionStatus), name="status"),
        CheckConstraint("approver IS NULL OR approver <> author", name="four_eyes"),
        CheckConstraint("version >= 1", name="version_positive"),
        # Exactly one active version per policy name, enforced by the database itself.
        Index(
            "uq_policy_versions_one_active",
            "name",
            unique=True,
            sqlite_where=text("status = 'active'"),
            postgresql_where=text("status = 'active'"),
        ),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64))
    version: Mapped[int] = mapped_column(Integer)
    document: Mapped[dict[str, Any]] = mapped_column(JSON)
    content_hash: Mapped[str] = mapped_column(String(64))
    status: Mapped[str] = mapped_column(String(16), default=VersionStatus.DRAFT.value)
    author: Mapped[str] = mapped_column(String(64))
    approver: Mapped[str | None] = mapped_column(String(64), default=None)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    approved_at: Mapped[datetime | None] = mapped_column(UTCDateTime, default=None)


class PolicyEvent(Base):
    """One lifecycle event: who did what, when, from which version to which, and why."""

    __tablename__ = "policy_events"
    __table_args__ = (CheckConstraint(_in("action", LifecycleAction), name="action"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), index=True)
    action: Mapped[str] = mapped_column(String(16))
    actor: Mapped[str] = mapped_column(String(64))
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    from_version: Mapped[int | None] = mapped_column(Integer, default=None)
    to_version: Mapped[int | None] = mapped_column(Integer, default=None)
    reason: Mapped[str | None] = mapped_column(Text, default=None)


class PolicyShadow(Base):
    """The (at most one) approved version evaluated beside the active one of a policy."""

    __tablename__ = "policy_shadows"
    __table_args__ = (
        ForeignKeyConstraint(
            ["name", "version"], ["policy_versions.name", "policy_versions.version"]
        ),
    )

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    version: Mapped[int] = mapped_column(Integer)
    designated_by: Mapped[str] = mapped_column(String(64))
    designated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class Seal(Base):
    """A Merkle root over a set of records, chained to the previous seal's hash."""

    __tablename__ = "seals"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    record_count: Mapped[int] = mapped_column(Integer)
    first_record_id: Mapped[int] = mapped_column(BigId)
    last_record_id: Mapped[int] = mapped_column(BigId)
    root_hash: Mapped[str] = mapped_column(String(64))
    previous_seal_hash: Mapped[str | None] = mapped_column(String(64))
    seal_hash: Mapped[str] = mapped_column(String(64), unique=True)


class Recommendation(Base):
    """One decision as issued: the decision log record."""

    __tablename__ = "recommendations"
    __table_args__ = (
        ForeignKeyConstraint(
            ["policy", "version"], ["policy_versions.name", "policy_versions.version"]
        ),
        Index("ix_recommendations_policy_issued_at", "policy", "issued_at"),
        # Ids are never reused on SQLite, even after the last row is deleted.
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    recommendation_id: Mapped[str] = mapped_column(String(36), unique=True)
    request_id: Mapped[str] = mapped_column(String(128), unique=True)
    # SHA-256 of the canonical request body: a repeated request_id with another body is a 409.
    request_fingerprint: Mapped[str] = mapped_column(String(64))
    case_id: Mapped[str] = mapped_column(String(128), index=True)
    policy: Mapped[str] = mapped_column(String(64))
    version: Mapped[int] = mapped_column(Integer)
    score: Mapped[float] = mapped_column(Double)
    attributes: Mapped[dict[str, Any]] = mapped_column(JSON)
    group: Mapped[str] = mapped_column(String(256))
    rule: Mapped[str] = mapped_column(String(256))
    probability: Mapped[float] = mapped_column(Double)
    draw: Mapped[float] = mapped_column(Double)
    action: Mapped[bool] = mapped_column(Boolean)
    action_label: Mapped[str] = mapped_column(String(256))
    issued_at: Mapped[datetime] = mapped_column(UTCDateTime)
    shadow_version: Mapped[int | None] = mapped_column(Integer, default=None)
    shadow_probability: Mapped[float | None] = mapped_column(Double, default=None)
    shadow_action: Mapped[bool | None] = mapped_column(Boolean, default=None)
    record_hash: Mapped[str] = mapped_column(String(64))
    seal_id: Mapped[int | None] = mapped_column(ForeignKey("seals.id"), index=True, default=None)
