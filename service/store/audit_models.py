"""Tables of the feedback loop, the audit and the log's seals: outcome records, final
decisions, report snapshots, seals, tree nodes, signing keys and tally batches. All
insert-only (the one exception is a retention purge of whole sealed months).

``outcome_records`` holds every outcome reported for a recommendation, first reports and
corrections alike; the outcome that counts is the latest record of the recommendation (its
highest id). A correction carries its reason. ``final_decisions`` holds what the person
finally decided, once per recommendation. ``audit_snapshots`` rows are written once: a re-run
of a month adds a new row.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    CheckConstraint,
    Date,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    SmallInteger,
    String,
    Text,
)
from sqlalchemy.orm import Mapped, mapped_column

from service.store.models import Base, BigId, UTCDateTime, utcnow


class OutcomeRecord(Base):
    """One outcome reported for a recommendation: a first report or a correction."""

    __tablename__ = "outcome_records"
    __table_args__ = (
        CheckConstraint("outcome IN (0, 1)", name="outcome_binary"),
        # The latest record of a recommendation: the outcome that counts.
        Index("ix_outcome_records_recommendation", "recommendation_pk", "id"),
        {"sqlite_autoincrement": True},
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    recommendation_pk: Mapped[int] = mapped_column(BigId, ForeignKey("recommendations.id"))
    outcome: Mapped[int] = mapped_column(SmallInteger)
    observed_at: Mapped[datetime] = mapped_column(UTCDateTime)
    source: Mapped[str] = mapped_column(String(128))
    correction_reason: Mapped[str | None] = mapped_column(Text, default=None)
    """None for a first report; a correction's reason otherwise."""
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    recorded_by: Mapped[str] = mapped_column(String(64))


class FinalDecision(Base):
    """What the person finally decided: followed the recommendation, or overrode it."""

    __tablename__ = "final_decisions"
    __table_args__ = ({"sqlite_autoincrement": True},)

    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    recommendation_pk: Mapped[int] = mapped_column(
        BigId, ForeignKey("recommendations.id"), unique=True
    )
    overridden: Mapped[bool] = mapped_column(Boolean)
    final_action: Mapped[bool] = mapped_column(Boolean)
    reason_code: Mapped[str | None] = mapped_column(String(64), default=None)
    decided_at: Mapped[datetime] = mapped_column(UTCDateTime)
    decided_by: Mapped[str | None] = mapped_column(String(128), default=None)
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    recorded_by: Mapped[str] = mapped_column(String(64))


class AuditSnapshot(Base):
    """One audit run's published result and its internal view; never updated."""

    __tablename__ = "audit_snapshots"
    __table_args__ = (
        Index("ix_audit_snapshots_policy_month", "policy", "month"),
        {"sqlite_autoincrement": True},
    )

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
    # monitoring only, never published.
    internal: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)
    internal_digest: Mapped[str | None] = mapped_column(String(64), default=None)
    """None only on snapshots written before the internal view existed (revision 0020)."""


class Seal(Base):
    """A signed tree head over the log after this seal's records.

    ``ranges`` gives, per kind of record, ``[after, through, count]``: the seal covers the
    records with ids in ``(after, through]`` (``count`` of them), ``after`` being the previous
    seal's ``through``. Membership is derived from these ranges; nothing is written back to a
    record. The seal's leaves are the records of each kind in id order, the kinds in the log's
    fixed order; ``tree_size`` counts the leaves of this seal and of all before it, ``root``
    is the Merkle tree head over them (RFC 9162). ``frontier`` is the roots of the perfect
    subtrees those leaves decompose into, largest first, 32 bytes each (their sizes are the
    binary digits of ``tree_size``): the next seal continues from it. ``tags`` holds the first
    8 bytes of the leaf hashes of this seal's leaves in the last, incomplete block of
    ``service.store.sealing.BLOCK`` leaves (a completed block keeps all its tags in its
    :class:`TreeNode`), so verification can name a bad record. ``signature`` is Ed25519 over
    the head (``service.log.heads``) by key ``key_id``.
    """

    __tablename__ = "seals"
    __table_args__ = (Index("ix_seals_tree_size", "tree_size"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    ranges: Mapped[dict[str, list[int]]] = mapped_column(JSON)
    leaf_count: Mapped[int] = mapped_column(Integer)
    tree_size: Mapped[int] = mapped_column(BigId)
    root: Mapped[bytes] = mapped_column(LargeBinary(32))
    frontier: Mapped[bytes] = mapped_column(LargeBinary)
    tags: Mapped[bytes] = mapped_column(LargeBinary)
    key_id: Mapped[str] = mapped_column(String(32), ForeignKey("signing_keys.key_id"))
    signature: Mapped[bytes] = mapped_column(LargeBinary(64))


class TreeNode(Base):
    """The root of one perfect, aligned subtree of the log: 2^level leaves from
    ``position * 2^level``, kept for every level from ``service.store.sealing.BLOCK_LEVEL``
    up, so a proof recomputes at most one block of leaves. At the block level, ``tags`` holds
    the first 8 bytes of each leaf hash of the block. Derived data: verification recomputes
    and compares it, and never trusts it."""

    __tablename__ = "tree_nodes"

    level: Mapped[int] = mapped_column(SmallInteger, primary_key=True, autoincrement=False)
    position: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=False)
    hash: Mapped[bytes] = mapped_column(LargeBinary(32))
    tags: Mapped[bytes | None] = mapped_column(LargeBinary, default=None)


class SigningKey(Base):
    """A public key that has signed tree heads (kept after rotation, so old heads verify)."""

    __tablename__ = "signing_keys"

    key_id: Mapped[str] = mapped_column(String(32), primary_key=True)
    public_key: Mapped[bytes] = mapped_column(LargeBinary(32))
    first_used_at: Mapped[datetime] = mapped_column(UTCDateTime)


class TallyBatch(Base):
    """The audit tallies of a range of sealed records of each kind (``ranges``: per kind
    ``[after, through]``, ``after`` being the previous batch's ``through``), by the day of
    the decision in ``time_zone``, with the SHA-256 ``digest`` of its tally rows
    (``service.log.tallies.digest``). A record of the log itself: the next seal covers it."""

    __tablename__ = "tally_batches"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    time_zone: Mapped[str] = mapped_column(String(64))
    ranges: Mapped[dict[str, list[int]]] = mapped_column(JSON)
    digest: Mapped[bytes] = mapped_column(LargeBinary(32))


class Tally(Base):
    """One cohort cell of one tally batch: the vector of ``service.log.tallies.FIELDS`` as a
    JSON array of integers (real-valued sums in units of 2^-64 outgrow 64-bit columns)."""

    __tablename__ = "tallies"
    # The audit sums a policy's tallies over the days of a month.
    __table_args__ = (Index("ix_tallies_policy_day", "policy", "day"),)

    batch_id: Mapped[int] = mapped_column(
        Integer, ForeignKey("tally_batches.id"), primary_key=True, autoincrement=False
    )
    position: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    policy: Mapped[str] = mapped_column(String(64))
    version: Mapped[int] = mapped_column(Integer)
    group: Mapped[str] = mapped_column(String(256))
    shadow_version: Mapped[int | None] = mapped_column(Integer)
    day: Mapped[date] = mapped_column(Date)
    vector: Mapped[list[int]] = mapped_column(JSON)


class LogPurge(Base):
    """A retention purge (``service.store.retention``): the personal-data records (decisions,
    outcome records, final decisions) of every seal up to ``through_seal`` were deleted.
    ``through_month`` is the last month (in the audit's time zone) some of whose records are
    gone: the month of that seal's creation. ``counts`` gives the rows deleted per kind,
    ``by`` who ran it (a credential's name, or ``cli``). A record of the log itself (kind
    ``purge``), written in the transaction that deletes, sealed by the next seal."""

    __tablename__ = "log_purges"
    __table_args__ = ({"sqlite_autoincrement": True},)

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    through_seal: Mapped[int] = mapped_column(Integer)
    through_month: Mapped[str] = mapped_column(String(7))
    counts: Mapped[dict[str, int]] = mapped_column(JSON)
    purged_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    by: Mapped[str] = mapped_column(String(64))


class PurgedLeaves(Base):
    """The leaf hashes (32 bytes each, in tree order) of one seal's records of one purged
    kind, kept when the records are deleted: a one-way commitment to each record, not the
    record. Verification recomputes the seal's tree from them with the records that remain,
    so its root, frontier, tree nodes and signature are still checked in full, and proofs of
    any record kept (before or after the purge) still compute. Derived data like
    :class:`TreeNode`: a wrong hash no longer gives the signed root."""

    __tablename__ = "purged_leaves"

    seal_id: Mapped[int] = mapped_column(
        Integer, ForeignKey("seals.id"), primary_key=True, autoincrement=False
    )
    kind: Mapped[str] = mapped_column(String(16), primary_key=True)
    hashes: Mapped[bytes] = mapped_column(LargeBinary)
