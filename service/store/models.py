"""Database tables, as typed SQLAlchemy models.

Constraint names follow one convention so migrations are stable across databases. Policy
versions, their lifecycle events, API keys and key events are insert-only (PostgreSQL refuses
UPDATE and DELETE on them: migration 0050); ``policy_state`` is the derived state the hot path
reads. Recommendations are the decision log: insert-only too; the log's seals cover ranges of
their ids (``service.store.sealing``) and nothing is ever written back to them.
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
    LargeBinary,
    MetaData,
    String,
    Text,
    UniqueConstraint,
    Uuid,
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
    # Recorded only by migration 0050, for a version stored as retired that no recorded
    # activation had made active; lifecycle actions retire a version by switching away.
    RETIRE = "retire"
    SHADOW = "shadow"
    UNSHADOW = "unshadow"


def _in(column: str, values: type[StrEnum]) -> str:
    return f"{column} IN (" + ", ".join(f"'{v.value}'" for v in values) + ")"


class ApiKey(Base):
    """A credential: insert-only (created and revoked by :class:`KeyEvent` rows)."""

    __tablename__ = "api_keys"
    __table_args__ = (
        CheckConstraint(_in("role", Role), name="role"),
        # The four insert-only tables never reuse an id on SQLite either (the log seals them
        # by id ranges).
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    # SHA-256 hex of the token; the token itself is shown once and never stored.
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class KeyAction(StrEnum):
    CREATE = "create"
    REVOKE = "revoke"


class KeyEvent(Base):
    """One step of a key's life: its creation, its revocation (insert-only).

    ``by_key_id`` is the admin key that acted (``POST /v1/keys/{name}/revoke``); NULL when the
    operator acted on the database with the CLI, and ``by`` then names the operating-system
    account that ran it. A key is created once and revoked at most once: the unique
    (key_id, action) index also serves the authentication lookup's anti-join.
    """

    __tablename__ = "key_events"
    __table_args__ = (
        CheckConstraint(_in("action", KeyAction), name="action"),
        UniqueConstraint("key_id", "action"),
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id"))
    action: Mapped[str] = mapped_column(String(16))
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    by_key_id: Mapped[int | None] = mapped_column(ForeignKey("api_keys.id"), default=None)
    by: Mapped[str] = mapped_column(String(64))
    reason: Mapped[str | None] = mapped_column(Text, default=None)


class PolicyVersion(Base):
    """A stored policy document: insert-only. Its status is derived from the policy's
    events (``service.store.policies.version_views``)."""

    __tablename__ = "policy_versions"
    __table_args__ = (
        UniqueConstraint("name", "version"),
        CheckConstraint("version >= 1", name="version_positive"),
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64))
    version: Mapped[int] = mapped_column(Integer)
    document: Mapped[dict[str, Any]] = mapped_column(JSON)
    content_hash: Mapped[str] = mapped_column(String(64))
    # The key that submitted it (NULL only for versions moved by migration 0050 whose author
    # named no key) and that key's name.
    author_key_id: Mapped[int | None] = mapped_column(ForeignKey("api_keys.id"), default=None)
    author: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class PolicyEvent(Base):
    """One lifecycle event (insert-only): which key did what, when, from which version to
    which, why, and the version the request expected to be current."""

    __tablename__ = "policy_events"
    __table_args__ = (
        CheckConstraint(_in("action", LifecycleAction), name="action"),
        CheckConstraint("expected_sent OR expected_current IS NULL", name="expected"),
        ForeignKeyConstraint(
            ["name", "from_version"], ["policy_versions.name", "policy_versions.version"]
        ),
        ForeignKeyConstraint(
            ["name", "to_version"], ["policy_versions.name", "policy_versions.version"]
        ),
        Index("ix_policy_events_name_id", "name", "id"),
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64))
    action: Mapped[str] = mapped_column(String(16))
    # The acting key (NULL only for events moved by migration 0050 whose actor named no key).
    actor_key_id: Mapped[int | None] = mapped_column(ForeignKey("api_keys.id"), default=None)
    actor: Mapped[str] = mapped_column(String(64))
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    from_version: Mapped[int | None] = mapped_column(Integer, default=None)
    to_version: Mapped[int | None] = mapped_column(Integer, default=None)
    reason: Mapped[str | None] = mapped_column(Text, default=None)
    # Whether the request carried expected_current, and its value (NULL: "none").
    expected_sent: Mapped[bool] = mapped_column(Boolean, default=False)
    expected_current: Mapped[int | None] = mapped_column(Integer, default=None)


class PolicyState(Base):
    """Derived state of one policy for the hot path: its active and shadow version and its
    last event. Not a log record: changed only by lifecycle actions, under the policy's lock,
    in the transaction that records the event it follows from. One row per policy, so at
    most one version is active by construction."""

    __tablename__ = "policy_state"
    __table_args__ = (
        ForeignKeyConstraint(
            ["name", "active_version"], ["policy_versions.name", "policy_versions.version"]
        ),
        ForeignKeyConstraint(
            ["name", "shadow_version"], ["policy_versions.name", "policy_versions.version"]
        ),
        CheckConstraint(
            "shadow_version IS NULL OR active_version IS NULL OR shadow_version <> active_version",
            name="shadow_not_active",
        ),
    )

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    active_version: Mapped[int | None] = mapped_column(Integer, default=None)
    shadow_version: Mapped[int | None] = mapped_column(Integer, default=None)
    last_event_id: Mapped[int | None] = mapped_column(ForeignKey("policy_events.id"), default=None)


class Recommendation(Base):
    """One decision as issued: the decision log record. Never updated or deleted (the one
    exception is a retention purge of whole sealed months); seals cover ranges of its ids."""

    __tablename__ = "recommendations"
    __table_args__ = (
        ForeignKeyConstraint(
            ["policy", "version"], ["policy_versions.name", "policy_versions.version"]
        ),
        # The audit's untallied tail and boundary days, and the daily warnings.
        Index("ix_recommendations_policy_issued_at", "policy", "issued_at"),
        # Outcomes and final decisions sent by (policy, case_id).
        Index("ix_recommendations_policy_case_id", "policy", "case_id"),
        # Ids are never reused on SQLite, even after the last row is deleted.
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    # A UUID (16 bytes on PostgreSQL); the API's name of the decision.
    recommendation_id: Mapped[str] = mapped_column(Uuid(as_uuid=False), unique=True)
    request_id: Mapped[str] = mapped_column(String(128), unique=True)
    # The first 16 bytes of SHA-256 of the request body: a repeated request_id with another
    # body is a 409. Not part of the record the log hashes.
    request_fingerprint: Mapped[bytes] = mapped_column(LargeBinary(16))
    case_id: Mapped[str] = mapped_column(String(128))
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
