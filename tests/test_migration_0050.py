"""Migration 0050 on a database with data written at revision 0040, on SQLite and PostgreSQL.

The 0040 data: admins alice and bob, a revoked admin, a scoring key; policy ``readmission``
written the way the service wrote it (v1 retired, v2 active, v3 approved and the shadow, v4
a draft, every step an event); policy ``legacy`` written outside the service (v1 active and
v2 retired, no events, an author and an approver that name no key). After the upgrade the
statuses the service derives, the keys that authenticate, the state rows and the recorded
events must say what the stored columns said; after a downgrade the columns come back.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from alembic import command
from sqlalchemy import Engine, create_engine, select, text
from sqlalchemy.exc import DBAPIError

from service.policy.document import PolicyDocument, content_hash
from service.settings import Settings
from service.store import keys, lifecycle, policies
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import alembic_config, upgrade
from service.store.models import ApiKey, KeyEvent, PolicyEvent
from service.store.scoring import DocumentCache, ScoringContext, resolve_plan
from tests.conftest import _create_postgres_database
from tests.helpers import TEST_SECRET, make_policy
from tests.insert_only import changes_allowed
from tests.lifecycle_invariants import check_history, check_state

T0 = datetime(2026, 9, 1, 8, 0, tzinfo=UTC)
TOKENS = {name: "eh_" + name[0] * 43 for name in ("alice", "bob", "old", "svc")}


def _at(minutes: int) -> datetime:
    return T0.replace(minute=minutes)


@pytest.fixture(params=["sqlite", "postgresql"])
def url_at_0040(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path}/at0040.db"
        upgrade(url, "0040")
        yield url
        return
    url, drop = _create_postgres_database()
    try:
        upgrade(url, "0040")
        yield url
    finally:
        drop()


def _stamp(engine: Engine, value: datetime) -> Any:
    # The 0040 columns: SQLite's are naive UTC text, PostgreSQL's timestamptz.
    return value.replace(tzinfo=None) if engine.dialect.name == "sqlite" else value


def _fill_0040(engine: Engine) -> None:
    doc = make_policy()
    digest = content_hash(PolicyDocument.model_validate(doc))
    legacy = make_policy(name="legacy")
    legacy_digest = content_hash(PolicyDocument.model_validate(legacy))
    s = lambda v: _stamp(engine, v)  # noqa: E731
    with engine.begin() as conn:
        for i, (name, role) in enumerate(
            [("alice", "admin"), ("bob", "admin"), ("old", "admin"), ("svc", "scoring")]
        ):
            conn.execute(
                text(
                    "INSERT INTO api_keys (name, role, token_hash, created_at, revoked_at) "
                    "VALUES (:n, :r, :h, :c, :x)"
                ),
                {
                    "n": name,
                    "r": role,
                    "h": hashlib.sha256(TOKENS[name].encode()).hexdigest(),
                    "c": s(_at(i)),
                    "x": s(_at(30)) if name == "old" else None,
                },
            )
        versions = [
            ("readmission", 1, doc, digest, "retired", "alice", "bob", _at(5)),
            ("readmission", 2, doc, digest, "active", "bob", "alice", _at(7)),
            ("readmission", 3, doc, digest, "approved", "alice", "bob", _at(9)),
            ("readmission", 4, doc, digest, "draft", "alice", None, None),
            ("legacy", 1, legacy, legacy_digest, "active", "ghost", "spectre", _at(2)),
            ("legacy", 2, legacy, legacy_digest, "retired", "ghost", "spectre", _at(3)),
        ]
        for name, version, document, h, status, author, approver, approved_at in versions:
            conn.execute(
                text(
                    "INSERT INTO policy_versions (name, version, document, content_hash, status, "
                    "author, approver, created_at, approved_at) "
                    "VALUES (:n, :v, :d, :h, :s, :a, :p, :c, :t)"
                ),
                {
                    "n": name,
                    "v": version,
                    "d": json.dumps(document),
                    "h": h,
                    "s": status,
                    "a": author,
                    "p": approver,
                    "c": s(_at(version)),
                    "t": None if approved_at is None else s(approved_at),
                },
            )
        events = [
            ("submit", "alice", 1, None, 1),
            ("approve", "bob", 5, None, 1),
            ("submit", "bob", 6, None, 2),
            ("approve", "alice", 7, None, 2),
            ("submit", "alice", 8, None, 3),
            ("approve", "bob", 9, None, 3),
            ("activate", "alice", 10, None, 1),
            ("activate", "bob", 11, 1, 2),
            ("submit", "alice", 12, None, 4),
            ("shadow", "alice", 13, None, 3),
        ]
        for action, actor, minute, from_version, to_version in events:
            conn.execute(
                text(
                    "INSERT INTO policy_events (name, action, actor, at, from_version, "
                    "to_version, reason) VALUES ('readmission', :a, :w, :t, :f, :v, NULL)"
                ),
                {"a": action, "w": actor, "t": s(_at(minute)), "f": from_version, "v": to_version},
            )
        conn.execute(
            text(
                "INSERT INTO policy_shadows (name, version, designated_by, designated_at) "
                "VALUES ('readmission', 3, 'alice', :t)"
            ),
            {"t": s(_at(13))},
        )


def _statuses_after(factory: Any, name: str) -> dict[int, tuple[str, str | None]]:
    with factory() as session:
        return {
            v.row.version: (v.status, v.approver) for v in policies.version_views(session, name)
        }


def test_upgrade_moves_statuses_approvals_revocations_and_shadows(url_at_0040: str) -> None:
    raw = create_engine(url_at_0040)
    _fill_0040(raw)
    raw.dispose()
    upgrade(url_at_0040)
    engine = create_db_engine(Settings(database_url=url_at_0040))
    factory = create_session_factory(engine)
    try:
        with factory() as session:
            # Keys: a create event each, a revoke event for the revoked one, at its time.
            moved = [
                (e.key_id, e.action, e.at, e.by_key_id, e.by)
                for e in session.scalars(select(KeyEvent).order_by(KeyEvent.id))
            ]
            ids = {str(n): int(i) for n, i in session.execute(select(ApiKey.name, ApiKey.id))}
            assert moved == [
                (ids["alice"], "create", _at(0), None, "operator"),
                (ids["bob"], "create", _at(1), None, "operator"),
                (ids["old"], "create", _at(2), None, "operator"),
                (ids["old"], "revoke", _at(30), None, "operator"),
                (ids["svc"], "create", _at(3), None, "operator"),
            ]
            live = {n: keys.authenticate(session, t) is not None for n, t in TOKENS.items()}
            assert live == {"alice": True, "bob": True, "old": False, "svc": True}
        # Statuses and approvals, now derived from the events and the state row.
        statuses = _statuses_after(factory, "readmission")
        assert statuses == {
            1: ("retired", "bob"),
            2: ("active", "alice"),
            3: ("approved", "bob"),
            4: ("draft", None),
        }
        assert _statuses_after(factory, "legacy") == {
            1: ("active", "spectre"),
            2: ("retired", "spectre"),
        }
        with factory() as session:
            state = policies.get_state(session, "readmission")
            assert state is not None
            events = list(policies.events(session, "readmission"))
            assert (state.active_version, state.shadow_version) == (2, 3)
            assert state.last_event_id == events[-1].id
            assert len(events) == 10  # consistent history: nothing recorded for it
            assert [e.actor_key_id for e in events[:2]] == [ids["alice"], ids["bob"]]
            assert all(not e.expected_sent and e.expected_current is None for e in events)
            check_history(events, {v: st for v, (st, _) in statuses.items()})
            check_state(events, 2, 3)
            shadow = policies.shadow_view(session, "readmission")
            assert shadow is not None and (shadow.designated_by, shadow.designated_at) == (
                "alice",
                _at(13),
            )
            versions = {r.version: r for r in policies.list_versions(session, "readmission")}
            assert versions[2].author_key_id == ids["bob"]
            # legacy: what its columns said, recorded as events by the migration.
            legacy = policies.get_state(session, "legacy")
            assert legacy is not None and (legacy.active_version, legacy.shadow_version) == (
                1,
                None,
            )
            recorded = [
                (e.action, e.actor, e.actor_key_id, e.from_version, e.to_version, e.reason)
                for e in policies.events(session, "legacy")
            ]
            why = "recorded by migration 0050 from the stored state"
            assert recorded == [
                ("submit", "ghost", None, None, 1, why),
                ("approve", "spectre", None, None, 1, why),
                ("submit", "ghost", None, None, 2, why),
                ("approve", "spectre", None, None, 2, why),
                ("retire", "migration-0050", None, 2, None, why),
            ]
            assert legacy.last_event_id == session.scalar(
                select(PolicyEvent.id)
                .where(PolicyEvent.name == "legacy")
                .order_by(PolicyEvent.id.desc())
            )
        # Scoring reads the moved state; the lifecycle goes on from it, by credential.
        ctx = ScoringContext(TEST_SECRET.encode(), DocumentCache())
        with engine.connect() as conn:
            plan = resolve_plan(conn, "readmission", ctx)
        assert (plan.version, plan.shadow_version) == (2, 3)
        with factory() as session:
            alice = keys.admin_actor(session, TOKENS["alice"])
            bob = keys.admin_actor(session, TOKENS["bob"])
            with pytest.raises(Exception, match="four-eyes"):
                lifecycle.approve(session, "readmission", 4, alice)
            session.rollback()
            lifecycle.approve(session, "readmission", 4, bob)
            lifecycle.activate(session, "readmission", 3, alice, "go", expected_current=2)
            session.commit()
        assert _statuses_after(factory, "readmission")[3] == ("active", "bob")
        if engine.dialect.name == "postgresql":
            with (
                changes_allowed(),  # past the suite's own check, to the database's
                pytest.raises(DBAPIError, match="insert-only"),
                engine.begin() as conn,
            ):
                conn.execute(text("UPDATE api_keys SET role = 'admin' WHERE name = 'svc'"))
    finally:
        engine.dispose()


def test_downgrade_restores_the_0040_columns(url_at_0040: str) -> None:
    raw = create_engine(url_at_0040)
    _fill_0040(raw)
    upgrade(url_at_0040, "0050")

    command.downgrade(alembic_config(url_at_0040), "0040")
    try:
        with raw.connect() as conn:
            rows = conn.execute(
                text(
                    "SELECT name, version, status, approver FROM policy_versions "
                    "ORDER BY name, version"
                )
            ).all()
            assert [tuple(r) for r in rows] == [
                ("legacy", 1, "active", "spectre"),
                ("legacy", 2, "retired", "spectre"),
                ("readmission", 1, "retired", "bob"),
                ("readmission", 2, "active", "alice"),
                ("readmission", 3, "approved", "bob"),
                ("readmission", 4, "draft", None),
            ]
            revoked = conn.execute(
                text("SELECT name FROM api_keys WHERE revoked_at IS NOT NULL")
            ).scalars()
            assert list(revoked) == ["old"]
            shadows = conn.execute(text("SELECT name, version, designated_by FROM policy_shadows"))
            assert [tuple(r) for r in shadows] == [("readmission", 3, "alice")]
    finally:
        raw.dispose()
    upgrade(url_at_0040)  # and up again
