"""Initial schema: policy versions and lifecycle, API keys, decision log and seals.

Revision ID: 0001
Revises:
Create Date: 2026-12-01 22:00:48.059958
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "api_keys",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.CheckConstraint("role IN ('scoring', 'audit', 'admin')", name=op.f("ck_api_keys_role")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_api_keys")),
        sa.UniqueConstraint("name", name=op.f("uq_api_keys_name")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_api_keys_token_hash")),
    )
    op.create_table(
        "policy_events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("action", sa.String(length=16), nullable=False),
        sa.Column("actor", sa.String(length=64), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("from_version", sa.Integer(), nullable=True),
        sa.Column("to_version", sa.Integer(), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.CheckConstraint(
            "action IN ('submit', 'approve', 'activate', 'rollback', 'retire', 'shadow', 'unshadow')",
            name=op.f("ck_policy_events_action"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_policy_events")),
    )
    with op.batch_alter_table("policy_events", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_policy_events_name"), ["name"], unique=False)

    op.create_table(
        "policy_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("document", sa.JSON(), nullable=False),
        sa.Column("content_hash", sa.String(length=64), nullable=False),
        sa.Column("status", sa.String(length=16), nullable=False),
        sa.Column("author", sa.String(length=64), nullable=False),
        sa.Column("approver", sa.String(length=64), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("approved_at", sa.DateTime(timezone=True), nullable=True),
        sa.CheckConstraint(
            "status IN ('draft', 'approved', 'active', 'retired')",
            name=op.f("ck_policy_versions_status"),
        ),
        sa.CheckConstraint(
            "approver IS NULL OR approver <> author", name=op.f("ck_policy_versions_four_eyes")
        ),
        sa.CheckConstraint("version >= 1", name=op.f("ck_policy_versions_version_positive")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_policy_versions")),
        sa.UniqueConstraint("name", "version", name=op.f("uq_policy_versions_name_version")),
    )
    with op.batch_alter_table("policy_versions", schema=None) as batch_op:
        batch_op.create_index(
            "uq_policy_versions_one_active",
            ["name"],
            unique=True,
            sqlite_where=sa.text("status = 'active'"),
            postgresql_where=sa.text("status = 'active'"),
        )

    op.create_table(
        "seals",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("record_count", sa.Integer(), nullable=False),
        sa.Column(
            "first_record_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False
        ),
        sa.Column(
            "last_record_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False
        ),
        sa.Column("root_hash", sa.String(length=64), nullable=False),
        sa.Column("previous_seal_hash", sa.String(length=64), nullable=True),
        sa.Column("seal_hash", sa.String(length=64), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_seals")),
        sa.UniqueConstraint("seal_hash", name=op.f("uq_seals_seal_hash")),
    )
    op.create_table(
        "policy_shadows",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("designated_by", sa.String(length=64), nullable=False),
        sa.Column("designated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["name", "version"],
            ["policy_versions.name", "policy_versions.version"],
            name=op.f("fk_policy_shadows_name_version_policy_versions"),
        ),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_policy_shadows")),
    )
    op.create_table(
        "recommendations",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("recommendation_id", sa.String(length=36), nullable=False),
        sa.Column("request_id", sa.String(length=128), nullable=False),
        sa.Column("request_fingerprint", sa.String(length=64), nullable=False),
        sa.Column("case_id", sa.String(length=128), nullable=False),
        sa.Column("policy", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("score", sa.Double(), nullable=False),
        sa.Column("attributes", sa.JSON(), nullable=False),
        sa.Column("group", sa.String(length=256), nullable=False),
        sa.Column("rule", sa.String(length=256), nullable=False),
        sa.Column("probability", sa.Double(), nullable=False),
        sa.Column("draw", sa.Double(), nullable=False),
        sa.Column("action", sa.Boolean(), nullable=False),
        sa.Column("action_label", sa.String(length=256), nullable=False),
        sa.Column("issued_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("shadow_version", sa.Integer(), nullable=True),
        sa.Column("shadow_probability", sa.Double(), nullable=True),
        sa.Column("shadow_action", sa.Boolean(), nullable=True),
        sa.Column("record_hash", sa.String(length=64), nullable=False),
        sa.Column("seal_id", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(
            ["policy", "version"],
            ["policy_versions.name", "policy_versions.version"],
            name=op.f("fk_recommendations_policy_version_policy_versions"),
        ),
        sa.ForeignKeyConstraint(
            ["seal_id"], ["seals.id"], name=op.f("fk_recommendations_seal_id_seals")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_recommendations")),
        sa.UniqueConstraint("recommendation_id", name=op.f("uq_recommendations_recommendation_id")),
        sa.UniqueConstraint("request_id", name=op.f("uq_recommendations_request_id")),
        sqlite_autoincrement=True,
    )
    with op.batch_alter_table("recommendations", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_recommendations_case_id"), ["case_id"], unique=False)
        batch_op.create_index(
            "ix_recommendations_policy_issued_at", ["policy", "issued_at"], unique=False
        )
        batch_op.create_index(batch_op.f("ix_recommendations_seal_id"), ["seal_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("recommendations", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_recommendations_seal_id"))
        batch_op.drop_index("ix_recommendations_policy_issued_at")
        batch_op.drop_index(batch_op.f("ix_recommendations_case_id"))

    op.drop_table("recommendations")
    op.drop_table("policy_shadows")
    op.drop_table("seals")
    with op.batch_alter_table("policy_versions", schema=None) as batch_op:
        batch_op.drop_index(
            "uq_policy_versions_one_active",
            sqlite_where=sa.text("status = 'active'"),
            postgresql_where=sa.text("status = 'active'"),
        )

    op.drop_table("policy_versions")
    with op.batch_alter_table("policy_events", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_policy_events_name"))

    op.drop_table("policy_events")
    op.drop_table("api_keys")
