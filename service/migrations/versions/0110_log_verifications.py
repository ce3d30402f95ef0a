"""Runs of the log's verification with their results, so the console shows the last one
and a run can go on off the request (``service/store/log_verifications.py``).

A row is written when a run starts and completed when it ends. Not a log table: the row of a
run changes when it finishes.

Revision ID: 0110
Revises: 0100
Create Date: 2026-12-05 13:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0110"
down_revision: str | None = "0100"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_BIG = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "log_verifications",
        sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("started_by", sa.String(length=128), nullable=False),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("ok", sa.Boolean(), nullable=True),
        sa.Column("seals_checked", _BIG, nullable=True),
        sa.Column("records_checked", _BIG, nullable=True),
        sa.Column("tally_batches_checked", _BIG, nullable=True),
        sa.Column("purged_through_seal", _BIG, nullable=True),
        sa.Column("purged_leaves", _BIG, nullable=True),
        sa.Column("unsealed", sa.JSON(), nullable=True),
        sa.Column("problem_kind", sa.String(length=32), nullable=True),
        sa.Column("problem_id", sa.BigInteger(), nullable=True),
        sa.Column("problem_reason", sa.Text(), nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_log_verifications")),
    )


def downgrade() -> None:
    op.drop_table("log_verifications")
