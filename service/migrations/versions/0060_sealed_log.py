"""The sealed log: insert-only outcome records and final decisions, lean decisions, signed
seals by id ranges, tree nodes, signing keys and tally batches.

- ``outcome_records`` replaces ``outcomes`` and ``outcome_corrections``: every outcome ever
  reported is a record, a correction a later record with its reason (the latest counts). The
  moved history: for a recommendation with corrections, its first value (the first
  correction's ``previous_*``), then one record per correction; otherwise its one outcome.
  Records moved here say ``recorded_by`` = ``migration-0060`` where no actor was recorded.
- ``final_decisions`` gets its own id and ``recorded_by``, and loses the copied cohort columns.
- ``recommendations`` loses ``record_hash`` and ``seal_id`` (a seal now covers id ranges and
  nothing is written back), the copied-cohort audit index and the lone ``case_id`` index (a
  ``(policy, case_id)`` index replaces it); ``recommendation_id`` becomes a UUID (16 bytes on
  PostgreSQL) and ``request_fingerprint`` the first 16 bytes of the same SHA-256.
- ``audit_snapshots`` gains ``internal_digest`` (its internal view's own digest).
- The old seals are dropped: they were unsigned and covered recommendations only. The first
  seal after this revision covers every record of every kind, signed.
- PostgreSQL: the insert-only trigger of revision 0050 on every table of the log.

Irreversible: the data moved cannot be put back in the old shape without losing the records'
history. Restore a backup to go back.

Revision ID: 0060
Revises: 0050
Create Date: 2026-12-04 22:00:00
"""

import hashlib
import json
from collections.abc import Sequence
from typing import Any

import sqlalchemy as sa
from alembic import op

revision: str = "0060"
down_revision: str | None = "0050"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MIGRATION_ACTOR = "migration-0060"
INSERT_ONLY = (
    "recommendations",
    "outcome_records",
    "final_decisions",
    "audit_snapshots",
    "seals",
    "tree_nodes",
    "signing_keys",
    "tally_batches",
    "tallies",
)
_STAMP = sa.DateTime(timezone=True)
_BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def _new_tables() -> None:
    op.create_table(
        "signing_keys",
        sa.Column("key_id", sa.String(length=32), nullable=False),
        sa.Column("public_key", sa.LargeBinary(length=32), nullable=False),
        sa.Column("first_used_at", _STAMP, nullable=False),
        sa.PrimaryKeyConstraint("key_id", name=op.f("pk_signing_keys")),
    )
    op.create_table(
        "tree_nodes",
        sa.Column("level", sa.SmallInteger(), autoincrement=False, nullable=False),
        sa.Column("position", _BIG_ID, autoincrement=False, nullable=False),
        sa.Column("hash", sa.LargeBinary(length=32), nullable=False),
        sa.Column("tags", sa.LargeBinary(), nullable=True),
        sa.PrimaryKeyConstraint("level", "position", name=op.f("pk_tree_nodes")),
    )
    op.create_table(
        "tally_batches",
        sa.Column("id", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("created_at", _STAMP, nullable=False),
        sa.Column("time_zone", sa.String(length=64), nullable=False),
        sa.Column("ranges", sa.JSON(), nullable=False),
        sa.Column("digest", sa.LargeBinary(length=32), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_tally_batches")),
    )
    op.create_table(
        "tallies",
        sa.Column("batch_id", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("position", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("policy", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("group", sa.String(length=256), nullable=False),
        sa.Column("shadow_version", sa.Integer(), nullable=True),
        sa.Column("day", sa.Date(), nullable=False),
        sa.Column("vector", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(
            ["batch_id"], ["tally_batches.id"], name=op.f("fk_tallies_batch_id_tally_batches")
        ),
        sa.PrimaryKeyConstraint("batch_id", "position", name=op.f("pk_tallies")),
    )
    op.create_index("ix_tallies_policy_day", "tallies", ["policy", "day"], unique=False)
    op.create_table(
        "outcome_records",
        sa.Column("id", _BIG_ID, autoincrement=True, nullable=False),
        sa.Column("recommendation_pk", _BIG_ID, nullable=False),
        sa.Column("outcome", sa.SmallInteger(), nullable=False),
        sa.Column("observed_at", _STAMP, nullable=False),
        sa.Column("source", sa.String(length=128), nullable=False),
        sa.Column("correction_reason", sa.Text(), nullable=True),
        sa.Column("recorded_at", _STAMP, nullable=False),
        sa.Column("recorded_by", sa.String(length=64), nullable=False),
        sa.CheckConstraint("outcome IN (0, 1)", name=op.f("ck_outcome_records_outcome_binary")),
        sa.ForeignKeyConstraint(
            ["recommendation_pk"],
            ["recommendations.id"],
            name=op.f("fk_outcome_records_recommendation_pk_recommendations"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outcome_records")),
        sqlite_autoincrement=True,
    )
    op.create_index(
        "ix_outcome_records_recommendation",
        "outcome_records",
        ["recommendation_pk", "id"],
        unique=False,
    )


_outcome_records = sa.table(
    "outcome_records",
    sa.column("recommendation_pk", sa.BigInteger),
    sa.column("outcome", sa.SmallInteger),
    sa.column("observed_at", _STAMP),
    sa.column("source", sa.String),
    sa.column("correction_reason", sa.Text),
    sa.column("recorded_at", _STAMP),
    sa.column("recorded_by", sa.String),
)


def _move_outcomes(conn: sa.Connection) -> None:
    """Outcomes without corrections in one statement; the few with corrections one by one."""
    conn.execute(
        sa.text(
            "INSERT INTO outcome_records (recommendation_pk, outcome, observed_at, source, "
            "correction_reason, recorded_at, recorded_by) "
            "SELECT recommendation_pk, outcome, observed_at, source, NULL, recorded_at, "
            f"'{MIGRATION_ACTOR}' FROM outcomes WHERE corrections = 0 "
            "ORDER BY recorded_at, recommendation_pk"
        )
    )
    corrected = conn.execute(
        sa.text(
            "SELECT recommendation_pk, outcome, observed_at, source, recorded_at FROM outcomes "
            "WHERE corrections > 0 ORDER BY recorded_at, recommendation_pk"
        )
    ).all()
    for pk, outcome, observed_at, source, recorded_at in corrected:
        steps = conn.execute(
            sa.text(
                "SELECT previous_outcome, previous_observed_at, previous_source, new_outcome, "
                "reason, corrected_at, corrected_by FROM outcome_corrections "
                "WHERE recommendation_pk = :pk ORDER BY id"
            ),
            {"pk": pk},
        ).all()
        rows: list[dict[str, Any]] = []
        first = steps[0]
        rows.append(
            {
                "recommendation_pk": pk,
                "outcome": first.previous_outcome,
                "observed_at": first.previous_observed_at,
                "source": first.previous_source,
                "correction_reason": None,
                "recorded_at": first.corrected_at,
                "recorded_by": MIGRATION_ACTOR,
            }
        )
        for i, step in enumerate(steps):
            later = steps[i + 1] if i + 1 < len(steps) else None
            rows.append(
                {
                    "recommendation_pk": pk,
                    "outcome": step.new_outcome if later else outcome,
                    "observed_at": later.previous_observed_at if later else observed_at,
                    "source": later.previous_source if later else source,
                    "correction_reason": step.reason,
                    "recorded_at": step.corrected_at if later else recorded_at,
                    "recorded_by": step.corrected_by,
                }
            )
        conn.execute(_outcome_records.insert(), rows)


def _rebuild_final_decisions(conn: sa.Connection) -> None:
    conn.execute(
        sa.text(
            "CREATE TABLE final_decisions_0060 AS SELECT recommendation_pk, overridden, "
            "final_action, reason_code, decided_at, decided_by, recorded_at FROM final_decisions"
        )
    )
    op.drop_table("final_decisions")
    op.create_table(
        "final_decisions",
        sa.Column("id", _BIG_ID, autoincrement=True, nullable=False),
        sa.Column("recommendation_pk", _BIG_ID, nullable=False),
        sa.Column("overridden", sa.Boolean(), nullable=False),
        sa.Column("final_action", sa.Boolean(), nullable=False),
        sa.Column("reason_code", sa.String(length=64), nullable=True),
        sa.Column("decided_at", _STAMP, nullable=False),
        sa.Column("decided_by", sa.String(length=128), nullable=True),
        sa.Column("recorded_at", _STAMP, nullable=False),
        sa.Column("recorded_by", sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ["recommendation_pk"],
            ["recommendations.id"],
            name=op.f("fk_final_decisions_recommendation_pk_recommendations"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_final_decisions")),
        sa.UniqueConstraint("recommendation_pk", name=op.f("uq_final_decisions_recommendation_pk")),
        sqlite_autoincrement=True,
    )
    conn.execute(
        sa.text(
            "INSERT INTO final_decisions (recommendation_pk, overridden, final_action, "
            "reason_code, decided_at, decided_by, recorded_at, recorded_by) "
            "SELECT recommendation_pk, overridden, final_action, reason_code, decided_at, "
            f"decided_by, recorded_at, '{MIGRATION_ACTOR}' FROM final_decisions_0060 "
            "ORDER BY recorded_at, recommendation_pk"
        )
    )
    op.drop_table("final_decisions_0060")


def _lean_recommendations(conn: sa.Connection, dialect: str) -> None:
    with op.batch_alter_table("recommendations", schema=None) as batch_op:
        batch_op.drop_index("ix_recommendations_audit")
        batch_op.drop_index("ix_recommendations_case_id")
        batch_op.drop_index("ix_recommendations_seal_id")
        batch_op.drop_constraint("fk_recommendations_seal_id_seals", type_="foreignkey")
        batch_op.drop_column("seal_id")
        batch_op.drop_column("record_hash")
    if dialect == "postgresql":
        op.execute(
            "ALTER TABLE recommendations ALTER COLUMN recommendation_id TYPE uuid "
            "USING recommendation_id::uuid"
        )
        op.execute(
            "ALTER TABLE recommendations ALTER COLUMN request_fingerprint TYPE bytea "
            "USING decode(substr(request_fingerprint, 1, 32), 'hex')"
        )
    else:
        # SQLite keeps SQLAlchemy's Uuid as 32 hex digits and the fingerprint as a blob; the
        # column types are only names there, so the values are converted in place.
        rows = conn.execute(
            sa.text("SELECT id, recommendation_id, request_fingerprint FROM recommendations")
        ).all()
        for record_id, rid, fingerprint in rows:
            conn.execute(
                sa.text(
                    "UPDATE recommendations SET recommendation_id = :rid, "
                    "request_fingerprint = :fp WHERE id = :id"
                ),
                {
                    "rid": str(rid).replace("-", ""),
                    "fp": bytes.fromhex(str(fingerprint)[:32]),
                    "id": record_id,
                },
            )
        with op.batch_alter_table("recommendations", schema=None) as batch_op:
            batch_op.alter_column(
                "recommendation_id",
                existing_type=sa.String(length=36),
                type_=sa.Uuid(as_uuid=False),
                existing_nullable=False,
            )
            batch_op.alter_column(
                "request_fingerprint",
                existing_type=sa.String(length=64),
                type_=sa.LargeBinary(length=16),
                existing_nullable=False,
            )
    op.create_index(
        "ix_recommendations_policy_case_id", "recommendations", ["policy", "case_id"], unique=False
    )


def _canonical(value: Any) -> bytes:
    return json.dumps(
        value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def _snapshot_internal_digests(conn: sa.Connection) -> None:
    with op.batch_alter_table("audit_snapshots", schema=None) as batch_op:
        batch_op.add_column(sa.Column("internal_digest", sa.String(length=64), nullable=True))
    rows = conn.execute(sa.text("SELECT id, internal FROM audit_snapshots")).all()
    for snapshot_id, internal in rows:
        if internal is None:
            continue
        content = json.loads(internal) if isinstance(internal, str) else internal
        body = {k: v for k, v in content.items() if k != "digest"}
        conn.execute(
            sa.text("UPDATE audit_snapshots SET internal_digest = :d WHERE id = :id"),
            {"d": hashlib.sha256(_canonical(body)).hexdigest(), "id": snapshot_id},
        )


def _new_seals() -> None:
    op.create_table(
        "seals",
        sa.Column("id", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("created_at", _STAMP, nullable=False),
        sa.Column("ranges", sa.JSON(), nullable=False),
        sa.Column("leaf_count", sa.Integer(), nullable=False),
        sa.Column("tree_size", _BIG_ID, nullable=False),
        sa.Column("root", sa.LargeBinary(length=32), nullable=False),
        sa.Column("frontier", sa.LargeBinary(), nullable=False),
        sa.Column("tags", sa.LargeBinary(), nullable=False),
        sa.Column("key_id", sa.String(length=32), nullable=False),
        sa.Column("signature", sa.LargeBinary(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ["key_id"], ["signing_keys.key_id"], name=op.f("fk_seals_key_id_signing_keys")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_seals")),
    )


def upgrade() -> None:
    conn = op.get_bind()
    dialect = conn.dialect.name
    _new_tables()
    _move_outcomes(conn)
    with op.batch_alter_table("outcome_corrections", schema=None) as batch_op:
        batch_op.drop_index("ix_outcome_corrections_recommendation_pk")
    op.drop_table("outcome_corrections")
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.drop_index("ix_outcomes_audit")
    op.drop_table("outcomes")
    _rebuild_final_decisions(conn)
    _lean_recommendations(conn, dialect)
    op.drop_table("seals")
    _new_seals()
    _snapshot_internal_digests(conn)
    if dialect == "postgresql":
        for table in INSERT_ONLY:
            op.execute(
                f"CREATE TRIGGER {table}_insert_only BEFORE UPDATE OR DELETE ON {table} "
                "FOR EACH ROW EXECUTE FUNCTION evenhand_refuse_change()"
            )


def downgrade() -> None:
    raise NotImplementedError(
        "revision 0060 moved outcomes, final decisions and seals into the insert-only log and "
        "cannot be undone without losing history: restore a backup taken before upgrading"
    )
