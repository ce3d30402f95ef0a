"""Tables of the feedback loop and the audit: outcomes, their corrections, the person's final
decisions, and immutable report snapshots.

``outcomes`` holds the outcome that counts (one row per recommendation, keyed by the
recommendation's row id); every value it replaced is kept in ``outcome_corrections`` with the
reason. Outcomes and final decisions carry a copy of their recommendation's cohort fields
(policy, version, group, shadow version, issue time, action, probability): the decision log
is append-only, so the copy never goes stale, and the audit counts each table with a GROUP BY
over its own index instead of joining a million rows. ``audit_snapshots`` rows are written once and
never updated: a re-run of a month adds a new row.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    CheckConstraint,
    Double,
    ForeignKey,
    Index,
    Integer,
    SmallInteger,
    String,
    Text,
)
from sqlalchemy.orm import Mapped, mapped_column

from service.store.models import Base, BigId, Recommendation, UTCDateTime, utcnow


class _CohortCopy:
    """The recommendation's fields the audit groups and counts by (copied at write time)."""

    policy: Mapped[str] = mapped_column(String(64))
    version: Mapped[int] = mapped_column(Integer)
    group: Mapped[str] = mapped_column(String(256))
    shadow_version: Mapped[int | None] = mapped_column(Integer, default=None)
    issued_at: Mapped[datetime] = mapped_column(UTCDateTime)
    action: Mapped[bool] = mapped_column(Boolean)
    probability: Mapped[float] = mapped_column(Double)
    shadow_action: Mapped[bool | None] = mapped_column(Boolean, default=None)
    score: Mapped[float] = mapped_column(Double)


COHORT_COLUMNS = ("policy", "version", "group", "shadow_version", "issued_at")
"""Leading columns of every audit index: equality on the first four, a range on the last."""


class Outcome(_CohortCopy, Base):
    """The outcome that counts for one recommendation (the latest, after corrections)."""

    __tablename__ = "outcomes"
    __table_args__ = (
        CheckConstraint("outcome IN (0, 1)", name="outcome_binary"),
        Index(
            "ix_outcomes_audit",
            *COHORT_COLUMNS,
            "outcome",
            "action",
            "probability",
            "shadow_action",
            "score",
        ),
    )

    recommendation_pk: Mapped[int] = mapped_column(
        BigId, ForeignKey("recommendations.id"), primary_key=True, autoincrement=False
    )
    outcome: Mapped[int] = mapped_column(SmallInteger)
    observed_at: Mapped[datetime] = mapped_column(UTCDateTime)
    source: Mapped[str] = mapped_column(String(128))
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    corrections: Mapped[int] = mapped_column(Integer, default=0)


class OutcomeCorrection(Base):
    """An outcome value that a correction replaced, and why."""

    __tablename__ = "outcome_corrections"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    recommendation_pk: Mapped[int] = mapped_column(
        BigId, ForeignKey("recommendations.id"), index=True
    )
    previous_outcome: Mapped[int] = mapped_column(SmallInteger)
    previous_observed_at: Mapped[datetime] = mapped_column(UTCDateTime)
    previous_source: Mapped[str] = mapped_column(String(128))
    new_outcome: Mapped[int] = mapped_column(SmallInteger)
    reason: Mapped[str] = mapped_column(Text)
    corrected_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    corrected_by: Mapped[str] = mapped_column(String(64))


class FinalDecision(_CohortCopy, Base):
    """What the person finally decided: followed the recommendation, or overrode it."""

    __tablename__ = "final_decisions"
    __table_args__ = (Index("ix_final_decisions_audit", *COHORT_COLUMNS, "overridden"),)

    recommendation_pk: Mapped[int] = mapped_column(
        BigId, ForeignKey("recommendations.id"), primary_key=True, autoincrement=False
    )
    overridden: Mapped[bool] = mapped_column(Boolean)
    final_action: Mapped[bool] = mapped_column(Boolean)
    reason_code: Mapped[str | None] = mapped_column(String(64), default=None)
    decided_at: Mapped[datetime] = mapped_column(UTCDateTime)
    decided_by: Mapped[str | None] = mapped_column(String(128), default=None)
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class AuditSnapshot(Base):
    """One audit run's published result; never updated."""

    __tablename__ = "audit_snapshots"
    __table_args__ = (Index("ix_audit_snapshots_policy_month", "policy", "month"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    policy: Mapped[str] = mapped_column(String(64))
    month: Mapped[str] = mapped_column(String(7))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    created_by: Mapped[str] = mapped_column(String(64))
    time_zone: Mapped[str] = mapped_column(String(64))
    code_version: Mapped[str] = mapped_column(String(32))
    versions: Mapped[list[int]] = mapped_column(JSON)
    recommendations: Mapped[int] = mapped_column(Integer)
    outcomes: Mapped[int] = mapped_column(Integer)
    digest: Mapped[str] = mapped_column(String(64), unique=True)
    content: Mapped[dict[str, Any]] = mapped_column(JSON)
    # The same run without small-cell suppression: for the audit role and the cross-month
    # monitoring only, never published. None on snapshots written before it existed.
    internal: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)


AUDIT_COVERING_INDEX = "ix_recommendations_audit"

# Everything the audit reads from the decision log, in the order it groups by, so a month of
# one (version, group, shadow version) is one contiguous range of this index.
_cols = Recommendation.__table__.c
Index(
    AUDIT_COVERING_INDEX,
    *(_cols[name] for name in COHORT_COLUMNS),
    _cols.action,
    _cols.probability,
    _cols.shadow_action,
)
