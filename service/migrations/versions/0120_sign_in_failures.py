"""Failed console password sign-ins per name and per client address in fixed windows
(``service/store/sign_in_limits.py``), shared by every worker process.

Not a log table: counts change and rows of past windows are deleted.

Revision ID: 0120
Revises: 0110
Create Date: 2026-12-05 13:05:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0120"
down_revision: str | None = "0110"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "console_sign_in_failures",
        sa.Column("scope", sa.String(length=16), nullable=False),
        sa.Column("subject", sa.String(length=128), nullable=False),
        sa.Column("window_start", sa.DateTime(timezone=True), nullable=False),
        sa.Column("failures", sa.Integer(), nullable=False),
        sa.PrimaryKeyConstraint("scope", "subject", name=op.f("pk_console_sign_in_failures")),
    )


def downgrade() -> None:
    op.drop_table("console_sign_in_failures")
