"""Log guards: no TRUNCATE of a log table, ids never reused on SQLite, seals found by size.

- PostgreSQL: a statement trigger on every table of the log refuses TRUNCATE (the row
  triggers of migrations 0050, 0060 and 0070 do not fire on it).
- SQLite: ``recommendations`` and ``audit_snapshots`` are rebuilt with AUTOINCREMENT, as the
  models declare, so an id freed by a retention purge or a removed row is never handed out
  again (a reused id inside a sealed range would read as an inserted record).
- ``ix_seals_tree_size``: the sealer's ``block_tags`` and the proofs' leaf look-up find the
  seals holding a leaf position by ``tree_size`` instead of scanning every seal.

Revision ID: 0080
Revises: 0070
Create Date: 2026-12-04 21:40:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0080"
down_revision: str | None = "0070"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

LOG_TABLES = (
    "api_keys",
    "key_events",
    "policy_versions",
    "policy_events",
    "recommendations",
    "outcome_records",
    "final_decisions",
    "audit_snapshots",
    "seals",
    "tree_nodes",
    "signing_keys",
    "tally_batches",
    "tallies",
    "log_purges",
    "purged_leaves",
)
REBUILT_ON_SQLITE = ("recommendations", "audit_snapshots")


def upgrade() -> None:
    dialect = op.get_bind().dialect.name
    if dialect == "postgresql":
        for table in LOG_TABLES:
            op.execute(
                f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
                "FOR EACH STATEMENT EXECUTE FUNCTION evenhand_refuse_change()"
            )
    else:
        for table in REBUILT_ON_SQLITE:
            with op.batch_alter_table(
                table, recreate="always", table_kwargs={"sqlite_autoincrement": True}
            ):
                pass
    with op.batch_alter_table("seals") as batch_op:
        batch_op.create_index("ix_seals_tree_size", ["tree_size"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("seals") as batch_op:
        batch_op.drop_index("ix_seals_tree_size")
    if op.get_bind().dialect.name == "postgresql":
        for table in LOG_TABLES:
            op.execute(f"DROP TRIGGER IF EXISTS {table}_no_truncate ON {table}")
