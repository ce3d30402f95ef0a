"""The outcomes' audit index covers the score too, so the calibration sums are read from the
index alone.

Revision ID: 0040
Revises: 0030
Create Date: 2026-12-04 21:00:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0040"
down_revision: str | None = "0030"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_OLD = ["outcome", "action", "probability", "shadow_action"]
_COHORT = ["policy", "version", "group", "shadow_version", "issued_at"]


def upgrade() -> None:
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.drop_index("ix_outcomes_audit")
        batch_op.create_index("ix_outcomes_audit", [*_COHORT, *_OLD, "score"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.drop_index("ix_outcomes_audit")
        batch_op.create_index("ix_outcomes_audit", [*_COHORT, *_OLD], unique=False)
