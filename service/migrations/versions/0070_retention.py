"""Retention: purge records and the leaf hashes of purged records; the one exception to the
insert-only rule.

- ``log_purges``: one row per retention purge (``service.store.retention``), a record of the
  log (kind ``purge``, appended to the kinds a seal covers; seals written before this
  revision have no purge range, read as an empty one).
- ``purged_leaves``: per seal and purged kind, the leaf hashes of the records a purge deleted.
- PostgreSQL: ``evenhand_refuse_change()`` now lets a DELETE through on ``recommendations``,
  ``outcome_records`` and ``final_decisions`` when the transaction has set
  ``SET LOCAL evenhand.purging = 'on'`` (the purge does, and nothing else); every UPDATE, and a
  DELETE on any other table, is refused as before. The two new tables get the insert-only
  trigger. This guards against accidents and against a service role's mistakes: anyone can
  set the variable, and the database owner can drop the trigger. Tampering is found by
  `evenhand log verify`, not prevented here.

Revision ID: 0070
Revises: 0060
Create Date: 2026-12-05 10:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0070"
down_revision: str | None = "0060"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

INSERT_ONLY = ("log_purges", "purged_leaves")

REFUSE_FUNCTION = """
CREATE OR REPLACE FUNCTION evenhand_refuse_change() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF TG_OP = 'DELETE'
       AND TG_TABLE_NAME IN ('recommendations', 'outcome_records', 'final_decisions')
       AND current_setting('evenhand.purging', true) = 'on' THEN
        RETURN OLD;
    END IF;
    RAISE EXCEPTION 'evenhand: % on % refused: the table is insert-only', TG_OP, TG_TABLE_NAME;
END
$$
"""

REFUSE_FUNCTION_0050 = """
CREATE OR REPLACE FUNCTION evenhand_refuse_change() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION 'evenhand: % on % refused: the table is insert-only', TG_OP, TG_TABLE_NAME;
END
$$
"""


def upgrade() -> None:
    op.create_table(
        "log_purges",
        sa.Column("id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("through_seal", sa.Integer(), nullable=False),
        sa.Column("through_month", sa.String(length=7), nullable=False),
        sa.Column("counts", sa.JSON(), nullable=False),
        sa.Column("purged_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("by", sa.String(length=64), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_log_purges")),
        sqlite_autoincrement=True,
    )
    op.create_table(
        "purged_leaves",
        sa.Column("seal_id", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("hashes", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(
            ["seal_id"], ["seals.id"], name=op.f("fk_purged_leaves_seal_id_seals")
        ),
        sa.PrimaryKeyConstraint("seal_id", "kind", name=op.f("pk_purged_leaves")),
    )
    if op.get_bind().dialect.name == "postgresql":
        op.execute(REFUSE_FUNCTION)
        for table in INSERT_ONLY:
            op.execute(
                f"CREATE TRIGGER {table}_insert_only BEFORE UPDATE OR DELETE ON {table} "
                "FOR EACH ROW EXECUTE FUNCTION evenhand_refuse_change()"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        for table in INSERT_ONLY:
            op.execute(f"DROP TRIGGER IF EXISTS {table}_insert_only ON {table}")
        op.execute(REFUSE_FUNCTION_0050)
    op.drop_table("purged_leaves")
    op.drop_table("log_purges")
