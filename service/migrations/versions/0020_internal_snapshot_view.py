"""Audit snapshots keep their internal (unsuppressed) view beside the published one.

Revision ID: 0020
Revises: 0010
Create Date: 2026-12-04 17:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0020"
down_revision: str | None = "0010"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("audit_snapshots", schema=None) as batch_op:
        batch_op.add_column(sa.Column("internal", sa.JSON(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("audit_snapshots", schema=None) as batch_op:
        batch_op.drop_column("internal")
