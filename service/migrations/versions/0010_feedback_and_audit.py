"""Feedback and audit: outcomes, outcome corrections, final decisions, audit snapshots, and
the indexes the audit's counting scans.

Revision ID: 0010
Revises: 0001
Create Date: 2026-12-01 22:18:16.436411
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "audit_snapshots",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("policy", sa.String(length=64), nullable=False),
        sa.Column("month", sa.String(length=7), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(length=64), nullable=False),
        sa.Column("time_zone", sa.String(length=64), nullable=False),
        sa.Column("code_version", sa.String(length=32), nullable=False),
        sa.Column("versions", sa.JSON(), nullable=False),
        sa.Column("recommendations", sa.Integer(), nullable=False),
        sa.Column("outcomes", sa.Integer(), nullable=False),
        sa.Column("digest", sa.String(length=64), nullable=False),
        sa.Column("content", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_audit_snapshots")),
        sa.UniqueConstraint("digest", name=op.f("uq_audit_snapshots_digest")),
    )
    with op.batch_alter_table("audit_snapshots", schema=None) as batch_op:
        batch_op.create_index("ix_audit_snapshots_policy_month", ["policy", "month"], unique=False)

    op.create_table(
        "final_decisions",
        sa.Column(
            "recommendation_pk",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=False,
            nullable=False,
        ),
        sa.Column("overridden", sa.Boolean(), nullable=False),
        sa.Column("final_action", sa.Boolean(), nullable=False),
        sa.Column("reason_code", sa.String(length=64), nullable=True),
        sa.Column("decided_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("decided_by", sa.String(length=128), nullable=True),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("policy", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("group", sa.String(length=256), nullable=False),
        sa.Column("shadow_version", sa.Integer(), nullable=True),
        sa.Column("issued_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("action", sa.Boolean(), nullable=False),
        sa.Column("probability", sa.Double(), nullable=False),
        sa.Column("shadow_action", sa.Boolean(), nullable=True),
        sa.ForeignKeyConstraint(
            ["recommendation_pk"],
            ["recommendations.id"],
            name=op.f("fk_final_decisions_recommendation_pk_recommendations"),
        ),
        sa.PrimaryKeyConstraint("recommendation_pk", name=op.f("pk_final_decisions")),
    )
    with op.batch_alter_table("final_decisions", schema=None) as batch_op:
        batch_op.create_index(
            "ix_final_decisions_audit",
            ["policy", "version", "group", "shadow_version", "issued_at", "overridden"],
            unique=False,
        )

    op.create_table(
        "outcome_corrections",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column(
            "recommendation_pk",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            nullable=False,
        ),
        sa.Column("previous_outcome", sa.SmallInteger(), nullable=False),
        sa.Column("previous_observed_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("previous_source", sa.String(length=128), nullable=False),
        sa.Column("new_outcome", sa.SmallInteger(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("corrected_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("corrected_by", sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ["recommendation_pk"],
            ["recommendations.id"],
            name=op.f("fk_outcome_corrections_recommendation_pk_recommendations"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outcome_corrections")),
    )
    with op.batch_alter_table("outcome_corrections", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_outcome_corrections_recommendation_pk"),
            ["recommendation_pk"],
            unique=False,
        )

    op.create_table(
        "outcomes",
        sa.Column(
            "recommendation_pk",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=False,
            nullable=False,
        ),
        sa.Column("outcome", sa.SmallInteger(), nullable=False),
        sa.Column("observed_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("source", sa.String(length=128), nullable=False),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("corrections", sa.Integer(), nullable=False),
        sa.Column("policy", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("group", sa.String(length=256), nullable=False),
        sa.Column("shadow_version", sa.Integer(), nullable=True),
        sa.Column("issued_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("action", sa.Boolean(), nullable=False),
        sa.Column("probability", sa.Double(), nullable=False),
        sa.Column("shadow_action", sa.Boolean(), nullable=True),
        sa.CheckConstraint("outcome IN (0, 1)", name=op.f("ck_outcomes_outcome_binary")),
        sa.ForeignKeyConstraint(
            ["recommendation_pk"],
            ["recommendations.id"],
            name=op.f("fk_outcomes_recommendation_pk_recommendations"),
        ),
        sa.PrimaryKeyConstraint("recommendation_pk", name=op.f("pk_outcomes")),
    )
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.create_index(
            "ix_outcomes_audit",
            [
                "policy",
                "version",
                "group",
                "shadow_version",
                "issued_at",
                "outcome",
                "action",
                "probability",
                "shadow_action",
            ],
            unique=False,
        )

    with op.batch_alter_table("recommendations", schema=None) as batch_op:
        batch_op.create_index(
            "ix_recommendations_audit",
            [
                "policy",
                "version",
                "group",
                "shadow_version",
                "issued_at",
                "action",
                "probability",
                "shadow_action",
            ],
            unique=False,
        )


def downgrade() -> None:
    with op.batch_alter_table("recommendations", schema=None) as batch_op:
        batch_op.drop_index("ix_recommendations_audit")

    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.drop_index("ix_outcomes_audit")

    op.drop_table("outcomes")
    with op.batch_alter_table("outcome_corrections", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_outcome_corrections_recommendation_pk"))

    op.drop_table("outcome_corrections")
    with op.batch_alter_table("final_decisions", schema=None) as batch_op:
        batch_op.drop_index("ix_final_decisions_audit")

    op.drop_table("final_decisions")
    with op.batch_alter_table("audit_snapshots", schema=None) as batch_op:
        batch_op.drop_index("ix_audit_snapshots_policy_month")

    op.drop_table("audit_snapshots")
