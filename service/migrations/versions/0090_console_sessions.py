"""Console sessions: one row per signed-in console session, shared by every worker.

The row holds the SHA-256 of the session id (never the id or the API key), the key's id,
name and role, the session's CSRF token and its start and last request times. It is not a
log table: rows change (``last_seen``) and are deleted at sign-out and expiry.

Revision ID: 0090
Revises: 0080
Create Date: 2026-12-05 07:55:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0090"
down_revision: str | None = "0080"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "console_sessions",
        sa.Column("id_hash", sa.String(length=64), nullable=False),
        sa.Column("key_id", sa.Integer(), nullable=False),
        sa.Column("key_name", sa.String(length=64), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("csrf", sa.String(length=64), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("last_seen", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["key_id"], ["api_keys.id"], name=op.f("fk_console_sessions_key_id_api_keys")
        ),
        sa.PrimaryKeyConstraint("id_hash", name=op.f("pk_console_sessions")),
    )


def downgrade() -> None:
    op.drop_table("console_sessions")
