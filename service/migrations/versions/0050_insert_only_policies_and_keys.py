"""Insert-only policy versions, lifecycle events, API keys and key events; the derived
policy state; credentials in every event.

- ``key_events`` (create, revoke) replace ``api_keys.revoked_at``: every key gets a create
  event at its creation time, every revoked key a revoke event at its revocation time.
- Policy versions lose ``status``, ``approver`` and ``approved_at`` (statuses follow from the
  events) and gain ``author_key_id``; events gain ``actor_key_id`` (both looked up by the
  recorded name; NULL where no key has it) and the ``expected_current`` a request carried
  (none before this revision).
- Where the stored status says more than the events (rows written outside the service), the
  missing events are recorded, with the reason ``RECORDED``: a submission for a version
  without one, an approval for an approved, active or retired version without one, a
  retirement for a retired version that no event shows active, and a shadow designation
  for a shadow without one.
- ``policy_state`` gets one row per policy: its active version (the one stored as active),
  its shadow version (``policy_shadows``, then dropped) and its last event.
- PostgreSQL: ``evenhand_refuse_change()`` and a trigger on each of the four insert-only
  tables refuse UPDATE and DELETE.

Revision ID: 0050
Revises: 0040
Create Date: 2026-12-04 19:00:00
"""

from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

import sqlalchemy as sa
from alembic import op

revision: str = "0050"
down_revision: str | None = "0040"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

RECORDED = "recorded by migration 0050 from the stored state"
MIGRATION_ACTOR = "migration-0050"
INSERT_ONLY = ("api_keys", "key_events", "policy_versions", "policy_events")
_STAMP = sa.DateTime(timezone=True)

_keys = sa.table(
    "api_keys",
    sa.column("id", sa.Integer),
    sa.column("name", sa.String),
    sa.column("created_at", _STAMP),
    sa.column("revoked_at", _STAMP),
)
_key_events = sa.table(
    "key_events",
    sa.column("key_id", sa.Integer),
    sa.column("action", sa.String),
    sa.column("at", _STAMP),
    sa.column("by_key_id", sa.Integer),
    sa.column("by", sa.String),
    sa.column("reason", sa.Text),
)
_versions = sa.table(
    "policy_versions",
    sa.column("name", sa.String),
    sa.column("version", sa.Integer),
    sa.column("status", sa.String),
    sa.column("author", sa.String),
    sa.column("author_key_id", sa.Integer),
    sa.column("approver", sa.String),
    sa.column("approved_at", _STAMP),
    sa.column("created_at", _STAMP),
)
_events = sa.table(
    "policy_events",
    sa.column("id", sa.Integer),
    sa.column("name", sa.String),
    sa.column("action", sa.String),
    sa.column("actor", sa.String),
    sa.column("actor_key_id", sa.Integer),
    sa.column("at", _STAMP),
    sa.column("from_version", sa.Integer),
    sa.column("to_version", sa.Integer),
    sa.column("reason", sa.Text),
    sa.column("expected_sent", sa.Boolean),
    sa.column("expected_current", sa.Integer),
)
_shadows = sa.table(
    "policy_shadows",
    sa.column("name", sa.String),
    sa.column("version", sa.Integer),
    sa.column("designated_by", sa.String),
    sa.column("designated_at", _STAMP),
)
_state = sa.table(
    "policy_state",
    sa.column("name", sa.String),
    sa.column("active_version", sa.Integer),
    sa.column("shadow_version", sa.Integer),
    sa.column("last_event_id", sa.Integer),
)

REFUSE_FUNCTION = """
CREATE OR REPLACE FUNCTION evenhand_refuse_change() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION 'evenhand: % on % refused: the table is insert-only', TG_OP, TG_TABLE_NAME;
END
$$
"""


def _now() -> datetime:
    return datetime.now(UTC)


def _create_tables() -> None:
    op.create_table(
        "key_events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("key_id", sa.Integer(), nullable=False),
        sa.Column("action", sa.String(length=16), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("by_key_id", sa.Integer(), nullable=True),
        sa.Column("by", sa.String(length=64), nullable=False),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.CheckConstraint("action IN ('create', 'revoke')", name=op.f("ck_key_events_action")),
        sa.ForeignKeyConstraint(
            ["by_key_id"], ["api_keys.id"], name=op.f("fk_key_events_by_key_id_api_keys")
        ),
        sa.ForeignKeyConstraint(
            ["key_id"], ["api_keys.id"], name=op.f("fk_key_events_key_id_api_keys")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_key_events")),
        sa.UniqueConstraint("key_id", "action", name=op.f("uq_key_events_key_id_action")),
        sqlite_autoincrement=True,
    )
    op.create_table(
        "policy_state",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("active_version", sa.Integer(), nullable=True),
        sa.Column("shadow_version", sa.Integer(), nullable=True),
        sa.Column("last_event_id", sa.Integer(), nullable=True),
        sa.CheckConstraint(
            "shadow_version IS NULL OR active_version IS NULL OR shadow_version <> active_version",
            name=op.f("ck_policy_state_shadow_not_active"),
        ),
        sa.ForeignKeyConstraint(
            ["last_event_id"],
            ["policy_events.id"],
            name=op.f("fk_policy_state_last_event_id_policy_events"),
        ),
        sa.ForeignKeyConstraint(
            ["name", "active_version"],
            ["policy_versions.name", "policy_versions.version"],
            name=op.f("fk_policy_state_name_active_version_policy_versions"),
        ),
        sa.ForeignKeyConstraint(
            ["name", "shadow_version"],
            ["policy_versions.name", "policy_versions.version"],
            name=op.f("fk_policy_state_name_shadow_version_policy_versions"),
        ),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_policy_state")),
    )
    with op.batch_alter_table("policy_events", schema=None) as batch_op:
        batch_op.add_column(sa.Column("actor_key_id", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("expected_sent", sa.Boolean(), nullable=True))
        batch_op.add_column(sa.Column("expected_current", sa.Integer(), nullable=True))
    with op.batch_alter_table("policy_versions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("author_key_id", sa.Integer(), nullable=True))


def _move_keys(bind: sa.Connection) -> None:
    for key_id, created_at, revoked_at in bind.execute(
        sa.select(_keys.c.id, _keys.c.created_at, _keys.c.revoked_at).order_by(_keys.c.id)
    ):
        bind.execute(
            _key_events.insert().values(
                key_id=key_id, action="create", at=created_at, by_key_id=None, by="operator"
            )
        )
        if revoked_at is not None:
            bind.execute(
                _key_events.insert().values(
                    key_id=key_id,
                    action="revoke",
                    at=revoked_at,
                    by_key_id=None,
                    by="operator",
                    reason="revoked before key events were recorded (migration 0050)",
                )
            )


def _key_of(column: Any) -> Any:
    return sa.select(_keys.c.id).where(_keys.c.name == column).scalar_subquery()


def _recorded_events(bind: sa.Connection, key_ids: dict[str, int]) -> None:
    """The events the stored statuses and shadows imply but no event records."""
    seen: dict[str, set[tuple[str, int]]] = {"submit": set(), "approve": set(), "active": set()}
    shadow_events: set[tuple[str, int]] = set()
    for name, action, from_version, to_version in bind.execute(
        sa.select(_events.c.name, _events.c.action, _events.c.from_version, _events.c.to_version)
    ):
        if action in ("submit", "approve") and to_version is not None:
            seen[action].add((name, to_version))
        elif action in ("activate", "rollback"):
            seen["active"].update((name, v) for v in (from_version, to_version) if v is not None)
        elif action == "retire" and from_version is not None:
            seen["active"].add((name, from_version))
        elif action == "shadow" and to_version is not None:
            shadow_events.add((name, to_version))

    def add(name: str, action: str, actor: str, at: datetime, **versions: int) -> None:
        bind.execute(
            _events.insert().values(
                name=name,
                action=action,
                actor=actor,
                actor_key_id=key_ids.get(actor),
                at=at,
                reason=RECORDED,
                expected_sent=False,
                expected_current=None,
                **versions,
            )
        )

    rows = bind.execute(
        sa.select(
            _versions.c.name,
            _versions.c.version,
            _versions.c.status,
            _versions.c.author,
            _versions.c.approver,
            _versions.c.approved_at,
            _versions.c.created_at,
        ).order_by(_versions.c.name, _versions.c.version)
    ).all()
    for name, version, status, author, approver, approved_at, created_at in rows:
        if (name, version) not in seen["submit"]:
            add(name, "submit", author, created_at, to_version=version)
        if status != "draft" and (name, version) not in seen["approve"]:
            add(
                name,
                "approve",
                approver or MIGRATION_ACTOR,
                approved_at or created_at,
                to_version=version,
            )
        if status == "retired" and (name, version) not in seen["active"]:
            add(name, "retire", MIGRATION_ACTOR, _now(), from_version=version)
    for name, version, by, at in bind.execute(
        sa.select(
            _shadows.c.name,
            _shadows.c.version,
            _shadows.c.designated_by,
            _shadows.c.designated_at,
        )
    ):
        if (name, version) not in shadow_events:
            add(name, "shadow", by, at, to_version=version)


def _fill_state(bind: sa.Connection) -> None:
    names = bind.execute(sa.select(_versions.c.name).distinct()).scalars().all()
    for name in names:
        active = bind.scalar(
            sa.select(_versions.c.version).where(
                _versions.c.name == name, _versions.c.status == "active"
            )
        )
        shadow = bind.scalar(sa.select(_shadows.c.version).where(_shadows.c.name == name))
        last = bind.scalar(sa.select(sa.func.max(_events.c.id)).where(_events.c.name == name))
        bind.execute(
            _state.insert().values(
                name=name, active_version=active, shadow_version=shadow, last_event_id=last
            )
        )


def upgrade() -> None:
    _create_tables()
    bind = op.get_bind()
    _move_keys(bind)
    bind.execute(
        _events.update().values(actor_key_id=_key_of(_events.c.actor), expected_sent=False)
    )
    bind.execute(_versions.update().values(author_key_id=_key_of(_versions.c.author)))
    key_ids = {str(n): int(i) for n, i in bind.execute(sa.select(_keys.c.name, _keys.c.id))}
    _recorded_events(bind, key_ids)
    _fill_state(bind)

    op.drop_table("policy_shadows")
    # SQLite: the insert-only tables are rebuilt with AUTOINCREMENT (no id is ever reused).
    autoincrement = {"sqlite_autoincrement": True}
    with op.batch_alter_table("api_keys", table_kwargs=autoincrement) as batch_op:
        batch_op.drop_column("revoked_at")
    with op.batch_alter_table("policy_events", table_kwargs=autoincrement) as batch_op:
        batch_op.alter_column("expected_sent", existing_type=sa.Boolean(), nullable=False)
        batch_op.create_check_constraint(
            batch_op.f("ck_policy_events_expected"), "expected_sent OR expected_current IS NULL"
        )
        batch_op.drop_index(batch_op.f("ix_policy_events_name"))
        batch_op.create_index("ix_policy_events_name_id", ["name", "id"], unique=False)
        batch_op.create_foreign_key(
            batch_op.f("fk_policy_events_name_to_version_policy_versions"),
            "policy_versions",
            ["name", "to_version"],
            ["name", "version"],
        )
        batch_op.create_foreign_key(
            batch_op.f("fk_policy_events_name_from_version_policy_versions"),
            "policy_versions",
            ["name", "from_version"],
            ["name", "version"],
        )
        batch_op.create_foreign_key(
            batch_op.f("fk_policy_events_actor_key_id_api_keys"),
            "api_keys",
            ["actor_key_id"],
            ["id"],
        )
    with op.batch_alter_table("policy_versions", table_kwargs=autoincrement) as batch_op:
        batch_op.drop_index(
            "uq_policy_versions_one_active",
            sqlite_where=sa.text("status = 'active'"),
            postgresql_where=sa.text("status = 'active'"),
        )
        batch_op.drop_constraint(batch_op.f("ck_policy_versions_status"), type_="check")
        batch_op.drop_constraint(batch_op.f("ck_policy_versions_four_eyes"), type_="check")
        batch_op.create_foreign_key(
            batch_op.f("fk_policy_versions_author_key_id_api_keys"),
            "api_keys",
            ["author_key_id"],
            ["id"],
        )
        batch_op.drop_column("approved_at")
        batch_op.drop_column("approver")
        batch_op.drop_column("status")

    if bind.dialect.name == "postgresql":
        op.execute(REFUSE_FUNCTION)
        for table in INSERT_ONLY:
            op.execute(
                f"CREATE TRIGGER {table}_insert_only BEFORE UPDATE OR DELETE ON {table} "
                "FOR EACH ROW EXECUTE FUNCTION evenhand_refuse_change()"
            )


def _statuses(bind: sa.Connection) -> dict[tuple[str, int], tuple[str, str | None, Any]]:
    """(status, approver, approved_at) of every version, as revision 0050 derives them."""
    active = {
        (n, v) for n, v in bind.execute(sa.select(_state.c.name, _state.c.active_version)) if v
    }
    approvals: dict[tuple[str, int], tuple[str, Any]] = {}
    was_active: set[tuple[str, int]] = set()
    for name, action, actor, at, from_version, to_version in bind.execute(
        sa.select(
            _events.c.name,
            _events.c.action,
            _events.c.actor,
            _events.c.at,
            _events.c.from_version,
            _events.c.to_version,
        ).order_by(_events.c.id)
    ):
        if action == "approve":
            approvals[(name, to_version)] = (actor, at)
        elif action in ("activate", "rollback"):
            was_active.update((name, v) for v in (from_version, to_version) if v is not None)
        elif action == "retire":
            was_active.add((name, from_version))
    out = {}
    for name, version in bind.execute(sa.select(_versions.c.name, _versions.c.version)):
        key = (name, version)
        if key in active:
            status = "active"
        elif key in was_active:
            status = "retired"
        elif key in approvals:
            status = "approved"
        else:
            status = "draft"
        approver, at = approvals.get(key, (None, None))
        out[key] = (status, approver, at)
    return out


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "postgresql":
        for table in INSERT_ONLY:
            op.execute(f"DROP TRIGGER IF EXISTS {table}_insert_only ON {table}")
        op.execute("DROP FUNCTION IF EXISTS evenhand_refuse_change()")

    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.add_column(sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True))
    revoked = _key_events.alias("revoked")
    bind.execute(
        _keys.update().values(
            revoked_at=sa.select(revoked.c.at)
            .where(revoked.c.key_id == _keys.c.id, revoked.c.action == "revoke")
            .scalar_subquery()
        )
    )

    with op.batch_alter_table("policy_versions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("status", sa.String(length=16), nullable=True))
        batch_op.add_column(sa.Column("approver", sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column("approved_at", sa.DateTime(timezone=True), nullable=True))
    for (name, version), (status, approver, at) in _statuses(bind).items():
        bind.execute(
            _versions.update()
            .where(_versions.c.name == name, _versions.c.version == version)
            .values(status=status, approver=approver, approved_at=at)
        )

    op.create_table(
        "policy_shadows",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("designated_by", sa.String(length=64), nullable=False),
        sa.Column("designated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["name", "version"],
            ["policy_versions.name", "policy_versions.version"],
            name=op.f("fk_policy_shadows_name_version_policy_versions"),
        ),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_policy_shadows")),
    )
    for name, version in bind.execute(
        sa.select(_state.c.name, _state.c.shadow_version).where(
            _state.c.shadow_version.is_not(None)
        )
    ):
        last = bind.execute(
            sa.select(_events.c.actor, _events.c.at)
            .where(
                _events.c.name == name,
                _events.c.action == "shadow",
                _events.c.to_version == version,
            )
            .order_by(_events.c.id.desc())
            .limit(1)
        ).first()
        by, at = (last[0], last[1]) if last is not None else (MIGRATION_ACTOR, _now())
        bind.execute(
            _shadows.insert().values(name=name, version=version, designated_by=by, designated_at=at)
        )

    with op.batch_alter_table("policy_versions", schema=None) as batch_op:
        batch_op.alter_column("status", existing_type=sa.String(length=16), nullable=False)
        batch_op.drop_constraint(
            batch_op.f("fk_policy_versions_author_key_id_api_keys"), type_="foreignkey"
        )
        batch_op.drop_column("author_key_id")
        batch_op.create_check_constraint(
            batch_op.f("ck_policy_versions_status"),
            "status IN ('draft', 'approved', 'active', 'retired')",
        )
        batch_op.create_check_constraint(
            batch_op.f("ck_policy_versions_four_eyes"), "approver IS NULL OR approver <> author"
        )
        batch_op.create_index(
            "uq_policy_versions_one_active",
            ["name"],
            unique=True,
            sqlite_where=sa.text("status = 'active'"),
            postgresql_where=sa.text("status = 'active'"),
        )
    with op.batch_alter_table("policy_events", schema=None) as batch_op:
        batch_op.drop_constraint(
            batch_op.f("fk_policy_events_actor_key_id_api_keys"), type_="foreignkey"
        )
        batch_op.drop_constraint(
            batch_op.f("fk_policy_events_name_from_version_policy_versions"), type_="foreignkey"
        )
        batch_op.drop_constraint(
            batch_op.f("fk_policy_events_name_to_version_policy_versions"), type_="foreignkey"
        )
        batch_op.drop_constraint(batch_op.f("ck_policy_events_expected"), type_="check")
        batch_op.drop_index("ix_policy_events_name_id")
        batch_op.create_index(batch_op.f("ix_policy_events_name"), ["name"], unique=False)
        batch_op.drop_column("expected_current")
        batch_op.drop_column("expected_sent")
        batch_op.drop_column("actor_key_id")
    op.drop_table("policy_state")
    op.drop_table("key_events")
