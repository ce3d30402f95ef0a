"""Outcomes and final decisions carry their recommendation's score (calibration checks and
risk-adjusted charts count over the outcomes table alone).

Revision ID: 0030
Revises: 0020
Create Date: 2026-12-04 19:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0030"
down_revision: str | None = "0020"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_TABLES = ("outcomes", "final_decisions")


def upgrade() -> None:
    for table in _TABLES:
        with op.batch_alter_table(table, schema=None) as batch_op:
            batch_op.add_column(sa.Column("score", sa.Double(), nullable=True))
        op.execute(
            f"UPDATE {table} SET score = (SELECT r.score FROM recommendations AS r "
            f"WHERE r.id = {table}.recommendation_pk)"
        )
        with op.batch_alter_table(table, schema=None) as batch_op:
            batch_op.alter_column("score", existing_type=sa.Double(), nullable=False)


def downgrade() -> None:
    for table in _TABLES:
        with op.batch_alter_table(table, schema=None) as batch_op:
            batch_op.drop_column("score")
