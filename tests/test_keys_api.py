"""Keys listed and revoked over HTTP; revocation an insert-only event; the last admin key kept;
the authentication lookup one indexed statement."""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, event, select
from sqlalchemy.orm import Session, sessionmaker

from service.errors import ServiceError
from service.store import keys
from service.store.keys import Actor
from service.store.models import ApiKey, KeyEvent
from service.store.scoring import DocumentCache, ScoringContext, resolve_plan
from tests.helpers import TEST_SECRET, actor, bearer


def test_list_keys_never_shows_tokens_or_hashes(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    r = client.get("/v1/keys", headers=bearer(tokens["admin"]))
    assert r.status_code == 200
    listed = r.json()
    assert [(k["name"], k["role"], k["revoked"]) for k in listed] == [
        ("admin-author", "admin", False),
        ("admin-approver", "admin", False),
        ("scorer", "scoring", False),
        ("auditor", "audit", False),
    ]
    assert all(k["created_by"] == "operator" and k["revoked_at"] is None for k in listed)
    with session_factory() as session:
        hashes = session.scalars(select(ApiKey.token_hash)).all()
    for secret in [*hashes, *tokens.values()]:
        assert secret not in r.text
    assert client.get("/v1/keys", headers=bearer(tokens["audit"])).status_code == 403


def test_revoke_a_key_is_an_event_and_a_repeat_changes_nothing(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    admin = bearer(tokens["admin"])
    scoring = bearer(tokens["scoring"])
    assert client.get("/v1/log/verify", headers=scoring).status_code == 403  # a live key
    r = client.post("/v1/keys/scorer/revoke", json={"reason": "leaked in a log"}, headers=admin)
    assert r.status_code == 200, r.text
    body = r.json()
    assert (body["name"], body["revoked"], body["revoked_by"], body["revoke_reason"]) == (
        "scorer",
        True,
        "admin-author",
        "leaked in a log",
    )
    # Refused at once in this process (the revoking process forgets its cached keys).
    assert client.get("/v1/log/verify", headers=scoring).status_code == 401
    again = client.post("/v1/keys/scorer/revoke", json={"reason": "again"}, headers=admin)
    assert again.status_code == 200 and again.json() == body
    author = actor(session_factory, "admin-author")
    with session_factory() as session:
        revocations = session.scalars(
            select(KeyEvent).where(KeyEvent.action == "revoke").order_by(KeyEvent.id)
        ).all()
    assert [(e.by_key_id, e.by, e.reason) for e in revocations] == [
        (author.key_id, "admin-author", "leaked in a log")
    ]
    listed = {k["name"]: k for k in client.get("/v1/keys", headers=admin).json()}
    assert listed["scorer"] == body


def test_revoke_needs_a_reason_and_a_known_key(client: TestClient, tokens: dict[str, str]) -> None:
    admin = bearer(tokens["admin"])
    r = client.post("/v1/keys/scorer/revoke", json={}, headers=admin)
    assert r.status_code == 422 and r.json()["error"]["field"] == "reason"
    r = client.post("/v1/keys/scorer/revoke", json={"reason": ""}, headers=admin)
    assert r.status_code == 422
    r = client.post("/v1/keys/nobody/revoke", json={"reason": "x"}, headers=admin)
    assert r.status_code == 404 and r.json()["error"]["code"] == "key_not_found"


def test_an_admin_cannot_revoke_the_last_live_admin_key(
    client: TestClient, tokens: dict[str, str]
) -> None:
    admin = bearer(tokens["admin"])
    r = client.post("/v1/keys/admin-approver/revoke", json={"reason": "gone"}, headers=admin)
    assert r.status_code == 200
    r = client.post("/v1/keys/admin-author/revoke", json={"reason": "me too"}, headers=admin)
    assert r.status_code == 409 and r.json()["error"]["code"] == "last_admin_key"
    assert client.get("/v1/keys", headers=admin).status_code == 200  # still an admin


def test_two_admins_revoking_each_other_at_once_leave_one(
    session_factory: sessionmaker[Session],
) -> None:
    """The revocations queue (PostgreSQL: an advisory lock; SQLite: its write lock): the
    second sees the first and keeps the last admin key."""
    for attempt in range(10):
        with session_factory() as s:
            a = Actor.of(keys.create_key(s, f"a{attempt}", "admin")[0])
            b = Actor.of(keys.create_key(s, f"b{attempt}", "admin")[0])
            # The other admins of earlier attempts are revoked, so these two are the last.
            for view in keys.list_keys(s):
                if view.role == "admin" and not view.revoked and view.name not in (a.name, b.name):
                    keys.revoke_key(s, view.name, "setup", "operator", keep_an_admin=False)
            s.commit()
        barrier = threading.Barrier(2)

        def revoke(me: Actor, other: Actor, barrier: threading.Barrier = barrier) -> str:
            with session_factory() as s:
                barrier.wait(timeout=10)
                try:
                    keys.revoke_key(s, other.name, "race", me, keep_an_admin=True)
                    s.commit()
                    return "ok"
                except ServiceError as exc:
                    return exc.code

        with ThreadPoolExecutor(2) as pool:
            outcomes = sorted(pool.map(revoke, (a, b), (b, a)))
        assert outcomes == ["last_admin_key", "ok"]
        with session_factory() as s:
            assert keys.live_admin_count(s) == 1


@pytest.fixture
def statements(engine: Engine) -> Iterator[list[str]]:
    seen: list[str] = []

    def count(_conn: Any, _cursor: Any, statement: str, *_args: Any) -> None:
        if not statement.startswith(("BEGIN", "SAVEPOINT", "RELEASE")):
            seen.append(statement)

    event.listen(engine, "before_cursor_execute", count)
    yield seen
    event.remove(engine, "before_cursor_execute", count)


def test_the_hot_path_lookups_are_one_statement_each(
    engine: Engine,
    session_factory: sessionmaker[Session],
    make_key: Callable[..., str],
    publish: Callable[..., int],
    statements: list[str],
) -> None:
    """As cheap as before the key and policy tables became insert-only: the key by its
    hash (anti-joined with its revocation) and the plan (the state row with its versions)
    are one statement each."""
    token = make_key("scoring", "hot")
    publish()
    with session_factory() as session:
        statements.clear()
        assert keys.authenticate(session, token) is not None
        assert len(statements) == 1 and "key_events" in statements[0]
    ctx = ScoringContext(TEST_SECRET.encode(), DocumentCache())
    with engine.connect() as conn:
        resolve_plan(conn, "readmission", ctx)  # fills the document cache
        statements.clear()
        plan = resolve_plan(conn, "readmission", ctx)
        assert plan.version == 1 and len(statements) == 1
        assert "policy_state" in statements[0]
