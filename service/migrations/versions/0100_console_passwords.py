"""Console passwords: a person's name, the API key they stand for, and an scrypt hash.

One row per person (the primary key is the name) and at most one person per key (unique
``key_id``): what the person does in the console is attributed to that key's credential.
The row keeps the salt and the scrypt parameters next to the hash, so they can change later
without making stored hashes unreadable. Rows are replaced when a password is set again.

Revision ID: 0100
Revises: 0090
Create Date: 2026-12-05 09:05:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0100"
down_revision: str | None = "0090"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "console_passwords",
        sa.Column("person", sa.String(length=64), nullable=False),
        sa.Column("key_id", sa.Integer(), nullable=False),
        sa.Column("salt", sa.LargeBinary(length=16), nullable=False),
        sa.Column("hash", sa.LargeBinary(length=64), nullable=False),
        sa.Column("n", sa.Integer(), nullable=False),
        sa.Column("r", sa.Integer(), nullable=False),
        sa.Column("p", sa.Integer(), nullable=False),
        sa.Column("set_by", sa.String(length=64), nullable=False),
        sa.Column("set_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["key_id"], ["api_keys.id"], name=op.f("fk_console_passwords_key_id_api_keys")
        ),
        sa.PrimaryKeyConstraint("person", name=op.f("pk_console_passwords")),
        sa.UniqueConstraint("key_id", name=op.f("uq_console_passwords_key_id")),
    )


def downgrade() -> None:
    op.drop_table("console_passwords")
